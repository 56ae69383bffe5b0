"""Static checks of docker/ (no Docker engine runs here): the compose stack's services, volumes, credentials
and ports refer to each other consistently, and the image installs pinned CPU torch before the project,
as the Makefile does, runs as a non-root user and starts `coreach`."""

from __future__ import annotations

import json
import re
import shlex
import tomllib
from pathlib import Path
from urllib.parse import urlsplit

import pytest
import yaml

ROOT = Path(__file__).resolve().parents[1]
COMPOSE = ROOT / "docker" / "compose.yaml"
DOCKERFILE = ROOT / "docker" / "Dockerfile"
# default ports of the stock images, from memory of their documentation: PostgreSQL 5432, MinIO's S3 API 9000
DEFAULT_PORTS = {"postgres": 5432, "minio": 9000}


def interpolate(value: str) -> str:
    """Compose's variable syntax with nothing set: `${VAR:-default}` -> default, `$$` -> `$`."""
    value = re.sub(r"\$\{[A-Za-z_][A-Za-z0-9_]*:-([^}]*)\}", r"\1", value)
    assert not re.search(r"(?<!\$)\$\{", value), f"variable without a default: {value}"
    return value.replace("$$", "$")


def resolved(node):
    if isinstance(node, str):
        return interpolate(node)
    if isinstance(node, list):
        return [resolved(x) for x in node]
    if isinstance(node, dict):
        return {k: resolved(v) for k, v in node.items()}
    return node


@pytest.fixture(scope="module")
def compose() -> dict:
    return resolved(yaml.safe_load(COMPOSE.read_text()))


@pytest.fixture(scope="module")
def services(compose) -> dict:
    return compose["services"]


def args_of(service: dict) -> dict[str, str]:
    """`--key=value` / `--key value` / `--flag` arguments of a service's command."""
    cmd = service.get("command", [])
    cmd = shlex.split(cmd) if isinstance(cmd, str) else list(cmd)
    out, i = {}, 0
    while i < len(cmd):
        tok = cmd[i]
        if tok.startswith("--") and "=" in tok:
            key, val = tok[2:].split("=", 1)
            out[key] = val
        elif tok.startswith("--"):
            nxt = cmd[i + 1] if i + 1 < len(cmd) else None
            if nxt is not None and not nxt.startswith("--"):
                out[tok[2:]], i = nxt, i + 1
            else:
                out[tok[2:]] = ""
        i += 1
    return out


def listen_port(services: dict, name: str) -> int:
    if name == "mlflow":
        return int(args_of(services["mlflow"])["port"])
    return DEFAULT_PORTS[name]


def env_of(service: dict) -> dict[str, str]:
    env = service.get("environment", {})
    if isinstance(env, list):
        env = dict(item.split("=", 1) for item in env)
    return {k: str(v) for k, v in env.items()}


def test_compose_has_the_lab_services(services):
    assert {"postgres", "mlflow", "minio", "bucket-init", "trainer"} <= set(services)
    for name, svc in services.items():
        assert "image" in svc or "build" in svc, name


def test_depends_on_names_existing_services_with_usable_conditions(services):
    for name, svc in services.items():
        deps = svc.get("depends_on", {})
        deps = {d: {"condition": "service_started"} for d in deps} if isinstance(deps, list) else deps
        for dep, spec in deps.items():
            assert dep in services and dep != name, (name, dep)
            cond = spec.get("condition", "service_started")
            if cond == "service_healthy":
                assert "healthcheck" in services[dep], f"{name} waits for {dep} to be healthy; it has no healthcheck"
            elif cond == "service_completed_successfully":
                assert services[dep].get("restart", "no") == "no", f"{dep} is a one-off job; it must not restart"
            else:
                assert cond == "service_started", cond
    # the chain the trainer relies on
    assert services["trainer"]["depends_on"]["mlflow"]["condition"] == "service_healthy"
    assert {"postgres", "bucket-init"} <= set(services["mlflow"]["depends_on"])


def test_named_volumes_are_declared_and_used(compose, services):
    declared = set(compose.get("volumes", {}))
    used = set()
    for svc in services.values():
        for vol in svc.get("volumes", []):
            source = vol.split(":", 1)[0] if isinstance(vol, str) else vol["source"]
            if not source.startswith((".", "/")):  # a named volume, not a bind mount
                used.add(source)
    assert used == declared
    assert {"postgres-data", "minio-data"} <= used  # the database and the artifacts survive a restart


def test_trainer_reaches_the_tracking_server_on_its_port(services):
    uri = urlsplit(env_of(services["trainer"])["COREACH_TRACKING_URI"])
    assert uri.hostname == "mlflow" and uri.hostname in services
    port = listen_port(services, "mlflow")
    assert uri.port == port
    # the published port maps onto the port the server listens on
    published = [str(p).split(":")[-1] for p in services["mlflow"].get("ports", [])]
    assert published == [str(port)]
    # MLflow refuses Host headers it does not know: the name the trainer uses must be allowed
    allowed = args_of(services["mlflow"])["allowed-hosts"].split(",")
    assert f"mlflow:{port}" in allowed
    # the healthcheck asks the same port
    assert f":{port}/health" in " ".join(services["mlflow"]["healthcheck"]["test"])
    # the trainer's tracking config reads that variable (conf/tracking/server.yaml)
    assert "COREACH_TRACKING_URI" in (ROOT / "conf" / "coreach_conf" / "tracking" / "server.yaml").read_text()
    assert "tracking=server" in services["trainer"]["command"]


def test_server_store_and_artifacts_point_at_the_stack(services):
    args = args_of(services["mlflow"])
    db = urlsplit(args["backend-store-uri"])
    assert db.scheme == "postgresql+psycopg2"  # plain postgresql:// asks for a driver that is not installed
    pg = env_of(services["postgres"])
    assert (db.hostname, db.port) == ("postgres", listen_port(services, "postgres"))
    assert (db.username, db.password, db.path.lstrip("/")) == (
        pg["POSTGRES_USER"], pg["POSTGRES_PASSWORD"], pg["POSTGRES_DB"])  # fmt: skip
    # artifacts: served through the tracking server, kept in the bucket the init job creates
    assert "serve-artifacts" in args
    bucket = urlsplit(args["artifacts-destination"])
    assert bucket.scheme == "s3" and bucket.hostname == env_of(services["bucket-init"])["MLFLOW_BUCKET"]
    env = env_of(services["mlflow"])
    s3 = urlsplit(env["MLFLOW_S3_ENDPOINT_URL"])
    assert (s3.hostname, s3.port) == ("minio", listen_port(services, "minio"))
    minio = env_of(services["minio"])
    assert (env["AWS_ACCESS_KEY_ID"], env["AWS_SECRET_ACCESS_KEY"]) == (
        minio["MINIO_ROOT_USER"], minio["MINIO_ROOT_PASSWORD"])  # fmt: skip
    init = env_of(services["bucket-init"])
    assert (init["MINIO_ROOT_USER"], init["MINIO_ROOT_PASSWORD"]) == (minio["MINIO_ROOT_USER"],
                                                                      minio["MINIO_ROOT_PASSWORD"])  # fmt: skip
    assert f"http://minio:{listen_port(services, 'minio')}" in " ".join(services["bucket-init"]["command"])


def test_trainer_sweep_is_a_valid_coreach_command(services, workdir):
    from coreach.commands.table import COMMANDS
    from coreach.config.check import preflight

    cmd = list(services["trainer"]["command"])
    assert cmd[0] in COMMANDS and COMMANDS[cmd[0]].hydra and "-m" in cmd
    overrides = [c for c in cmd[1:] if c != "-m"]
    preflight(COMMANDS[cmd[0]].config, overrides, multirun=True)  # raises ConfigError naming the override at fault


# ---- the image ----------------------------------------------------------------------------------------


def dockerfile_instructions(path: Path = DOCKERFILE) -> list[tuple[str, str]]:
    """(INSTRUCTION, arguments) with continuation lines joined and comments dropped."""
    lines, out, buf = path.read_text().splitlines(), [], ""
    for line in lines:
        if not buf and (not line.strip() or line.lstrip().startswith("#")):
            continue
        if line.lstrip().startswith("#"):
            continue
        if line.rstrip().endswith("\\"):
            buf += line.rstrip()[:-1] + " "
            continue
        buf += line
        word, _, rest = buf.strip().partition(" ")
        out.append((word.upper(), rest.strip()))
        buf = ""
    return out


def makefile_install_steps() -> tuple[str, list[str]]:
    """The Makefile's torch pin and the pip commands of its install recipe, in order."""
    text = (ROOT / "Makefile").read_text()
    torch = re.search(r"^TORCH\s*:=\s*(\S+)", text, re.M).group(1)
    recipe = re.search(r"^\$\(STAMP\):.*\n((?:\t.*\n)+)", text, re.M).group(1)
    pips = [ln.strip() for ln in recipe.splitlines() if "pip install" in ln]
    return torch, [p.replace("$(TORCH)", torch) for p in pips]


def pip_install_runs() -> list[str]:
    return [args for ins, args in dockerfile_instructions() if ins == "RUN" and "pip install" in args]


def test_makefile_installs_pinned_torch_before_the_project():
    torch, pips = makefile_install_steps()
    assert re.fullmatch(r"torch==\d+\.\d+\.\d+", torch)
    assert torch in pips[0] and "-e" in pips[1] and "." in pips[1]


def test_image_installs_the_makefiles_torch_first_from_the_cpu_index():
    torch, _ = makefile_install_steps()
    runs = pip_install_runs()
    assert len(runs) == 2
    first, project = runs
    assert torch in shlex.split(first)  # the same exact pin as the Makefile
    assert "--index-url https://download.pytorch.org/whl/cpu" in first
    tokens = shlex.split(project)
    targets = [t for t in tokens[tokens.index("install") + 1 :] if not t.startswith("-")]
    assert targets and all(t == "." or t.startswith(".[") for t in targets)  # only the project, after torch
    assert "--upgrade" not in tokens and "-U" not in tokens  # nothing that could replace the CPU wheel
    extras = re.findall(r"\[([^\]]+)\]", project)
    optional = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["optional-dependencies"]
    for extra in ",".join(extras).split(","):
        if extra:
            assert extra in optional, f"extra {extra!r} not in pyproject.toml"
    server = " ".join(optional["server"])
    assert "psycopg2" in server and "boto3" in server  # PostgreSQL store, S3 artifacts


def test_image_base_user_and_entrypoint():
    ins = dockerfile_instructions()
    names = [i for i, _ in ins]
    assert ins[0] == ("FROM", "python:3.11-slim")
    users = [a for i, a in ins if i == "USER"]
    assert users and users[-1] not in ("root", "0") and not users[-1].startswith(("root:", "0:"))
    # the switch to that user comes after every install step and before the entry point
    last_run = max(k for k, n in enumerate(names) if n == "RUN")
    assert names.index("USER") > last_run
    entry = [a for i, a in ins if i == "ENTRYPOINT"]
    assert [json.loads(e) for e in entry] == [["coreach"]]
    scripts = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["scripts"]
    assert "coreach" in scripts
    # everything the image copies exists in the repository
    for i, a in ins:
        if i == "COPY":
            for src in a.split()[:-1]:
                assert (ROOT / src).exists(), src


# ---- the robot computer's image and service -----------------------------------------------------------
ROBOT_DOCKERFILE = ROOT / "docker" / "Dockerfile.robot"
ROBOT_DIST = ROOT / "pipeline" / "coreach-robot"


def robot_instructions() -> list[tuple[str, str]]:
    return dockerfile_instructions(ROBOT_DOCKERFILE)


def test_robot_image_installs_only_the_runtime_distribution():
    ins = robot_instructions()
    assert ins[0] == ("FROM", "python:3.11-slim")
    text = " ".join(f"{i} {a}" for i, a in ins).lower()  # the instructions, not the comments
    assert "torch" not in text and "mlflow" not in text
    runs = [a for i, a in ins if i == "RUN" and "pip install" in a]
    assert len(runs) == 1
    tokens = shlex.split(runs[0].split("&&")[0])
    targets = [t for t in tokens[tokens.index("install") + 1 :] if not t.startswith("-")]
    assert targets == ["./pipeline/coreach-robot"]  # its dependencies are numpy, onnxruntime, array-api-compat
    # everything the distribution force-includes is copied into the build, at the same place
    workdir = [a for i, a in ins if i == "WORKDIR"][0]
    copied = {a.split()[0] for i, a in ins if i == "COPY"}
    assert all((ROOT / src).exists() for src in copied)
    included = tomllib.loads((ROBOT_DIST / "pyproject.toml").read_text())["tool"]["hatch"]["build"]["targets"]["wheel"]
    for src in included["force-include"]:
        rel = (ROBOT_DIST / src).resolve().relative_to(ROOT)
        assert rel.parts[0] in copied, f"{rel} is not copied into {workdir}"
    ignore = (ROOT / "docker" / "Dockerfile.robot.dockerignore").read_text().split()
    assert {"*", "!pipeline/", "!plugins/"} <= set(ignore)  # the build context holds what the COPYs take


def test_robot_image_user_cache_and_entrypoint():
    ins = robot_instructions()
    names = [i for i, _ in ins]
    users = [a for i, a in ins if i == "USER"]
    assert users and users[-1] not in ("root", "0")
    assert names.index("USER") > max(k for k, n in enumerate(names) if n == "RUN")
    assert [json.loads(a) for i, a in ins if i == "ENTRYPOINT"] == [["coreach-robot"]]
    scripts = tomllib.loads((ROBOT_DIST / "pyproject.toml").read_text())["project"]["scripts"]
    assert "coreach-robot" in scripts
    env = " ".join(a for i, a in ins if i == "ENV")
    cache = re.search(r"COREACH_ROBOT_CACHE=(\S+)", env).group(1)
    run_text = " ".join(a for i, a in ins if i == "RUN")
    assert f"mkdir -p {cache}" in run_text and f"chown {users[-1]}:{users[-1]} {cache}" in run_text


def test_robot_service_fetches_the_fielded_bundle_from_the_stack(services):
    from coreach.runtime.fetch import parse_ref
    from coreach.runtime.robot_cli import parser

    robot = services["robot"]
    assert robot["build"]["dockerfile"] == "docker/Dockerfile.robot"
    assert (ROOT / "docker" / robot["build"]["context"] / robot["build"]["dockerfile"]).resolve() == ROBOT_DOCKERFILE
    env = env_of(robot)
    uri = urlsplit(env["COREACH_TRACKING_URI"])
    port = listen_port(services, "mlflow")
    assert (uri.hostname, uri.port) == ("mlflow", port)
    assert f"mlflow:{port}" in args_of(services["mlflow"])["allowed-hosts"].split(",")
    assert "serve-artifacts" in args_of(services["mlflow"])  # the robot has no S3 credentials
    assert not {"AWS_ACCESS_KEY_ID", "AWS_SECRET_ACCESS_KEY"} & set(env)
    assert robot["depends_on"]["mlflow"]["condition"] == "service_healthy"
    ns = parser().parse_args(list(robot["command"]))  # a valid coreach-robot command line
    assert ns.command == "fetch" and parse_ref(ns.ref)[1] == "fielded"
    mounts = {v.split(":", 1)[1]: v.split(":", 1)[0] for v in robot["volumes"]}
    assert env["COREACH_ROBOT_CACHE"] in mounts  # fetched bundles survive the container
