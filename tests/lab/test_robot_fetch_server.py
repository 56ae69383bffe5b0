"""The robot computer's fetch against the real MLflow server CI starts (proxied artifact access).

A tiny decoder is trained and released twice through the server (relaxed gates) and fielded with `coreach
promote`. A runtime-only install (pipeline/coreach-robot, built into a fresh virtual environment with no torch)
then fetches it into a cache that has never seen the releasing machine's disk, opens a Session and steps it;
a rollback is picked up by the next fetch. Tampering with the server's artifact store, and versions that are
not fetchable, are refused in one line with the previous `current` left as it was. Hashes are checked against
hashlib, the registry through MLflow's own client.
"""

from __future__ import annotations

import hashlib
import http.server
import json
import os
import subprocess
import sys
import textwrap
import threading
import urllib.error
import urllib.request
from pathlib import Path

import pytest
from labkit import COREACH, _env_file_value, cli_json, missing, run_cli, tracking_server, unique_experiment
from mlflow.tracking import MlflowClient

pytestmark = pytest.mark.lab

ROOT = Path(__file__).resolve().parents[2]
SOURCES = os.pathsep.join(str(ROOT / d) for d in ("pipeline", "plugins", "conf"))
SUITE = "held-out-short"
# a barely trained decoder passes these, so the publishing path runs (tests/test_release.py does the same)
RELEASE = [f"gate_suites=[{SUITE}.yaml]", "episodes=1", "latency.steps=300", "latency.warmup=20", "parity_n=1000",
           "gates.success_lo=0", "gates.recovery_lo=0", "gates.max_violations=1000000", "gates.stick_gain_median=0",
           "gates.latency_p99_us=1000000"]  # fmt: skip
TRAIN = ["dataset.episodes=40", "trainer.max_epochs=2", "data.batch_size=128"]


def server_artifacts() -> Path:
    """The folder the CI server keeps proxied artifacts in (--artifacts-destination)."""
    folder = os.environ.get("COREACH_SERVER_ARTIFACTS") or _env_file_value("postgres-mlflow.env",
                                                                             "COREACH_SERVER_ARTIFACTS")
    if not folder:
        missing("the tracking server's artifact folder", "start .ci/services/postgres-mlflow.sh (it writes "
                                                         "COREACH_SERVER_ARTIFACTS to its env file)")
    return Path(folder)


def store_file(uri: str, name: str) -> Path:
    """Where the server keeps file `name` of the bundle at `uri` (mlflow-artifacts:/<path>)."""
    assert uri.startswith("mlflow-artifacts:/"), uri
    return server_artifacts() / uri[len("mlflow-artifacts:/"):].lstrip("/") / name


@pytest.fixture(scope="module")
def released(tmp_path_factory):
    """Two released versions of one model on the server, version 1 fielded."""
    uri = tracking_server()
    cwd = tmp_path_factory.mktemp("robot-release")
    held_out = (ROOT / "conf" / "coreach_conf" / "suite" / "held-out.yaml").read_text()
    (cwd / f"{SUITE}.yaml").write_text(held_out.replace("name: held-out", f"name: {SUITE}")
                                       .replace("horizon_s: 30.0", "horizon_s: 10.0"))
    experiment, name = unique_experiment("lab-robot"), unique_experiment("robot-decoder")
    env = {**os.environ, "COREACH_TRACKING_URI": uri, "COREACH_EXPERIMENT": experiment}
    server = ["tracking=server", f"tracking.experiment={experiment}"]
    run_id = cli_json(["train", *TRAIN, *server], cwd, env)["runs"][0]["run_id"]
    for _ in range(2):
        res = run_cli(["release", f"run={run_id}", f"name={name}", *RELEASE, *server], cwd, env)
        assert res.returncode == 0, res.stderr[-3000:]
    client = MlflowClient(uri)
    versions = {v: client.get_model_version(name, v) for v in ("1", "2")}
    for mv in versions.values():  # the release's side of the contract: the version's source is its bundle
        assert mv.source == mv.tags["coreach.bundle_uri"] and mv.tags["coreach.gate_passed"] == "true"
    released = {"uri": uri, "name": name, "cwd": cwd, "env": env, "client": client, "run_id": run_id,
            "bundle_uri": {v: mv.tags["coreach.bundle_uri"] for v, mv in versions.items()},
            "manifest_sha256": {v: mv.tags["coreach.manifest_sha256"] for v, mv in versions.items()},
            "release_run": {v: mv.tags["coreach.release_run"] for v, mv in versions.items()}}
    promote(released, "1")
    return released


def promote(released, *args: str, command: str = "promote") -> None:
    """`coreach promote` (or `rollback`) on the releasing machine (the registry commands read MLFLOW_TRACKING_URI)."""
    env = {**released["env"], "MLFLOW_TRACKING_URI": released["uri"], "CI": "true"}
    res = subprocess.run([COREACH, command, released["name"], *args], cwd=released["cwd"], env=env,
                         capture_output=True, text=True, timeout=300)  # fmt: skip
    assert res.returncode == 0, res.stderr[-2000:]


def robot(args: list[str], cwd: Path, python: str = sys.executable, timeout: float = 120) -> subprocess.CompletedProcess:
    """coreach-robot ARGS: this checkout's modules by default, or an installed copy (`python` of another venv)."""
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "MLFLOW_TRACKING_URI")}
    if python == sys.executable:
        env["PYTHONPATH"] = SOURCES
    env["HOME"] = str(cwd)  # nothing from this user's home (no default cache, no pip config)
    return subprocess.run([python, "-m", "coreach.runtime.robot_cli", *args], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=timeout)  # fmt: skip


def one_line_error(res: subprocess.CompletedProcess, code: int, *words: str) -> str:
    lines = res.stderr.strip().splitlines()
    assert res.returncode == code, (res.returncode, res.stdout[-1000:], res.stderr[-2000:])
    assert len(lines) == 1 and lines[0].startswith("coreach-robot: error: "), res.stderr
    assert "Traceback" not in res.stderr
    for w in words:
        assert w in lines[0], lines[0]
    return lines[0]


def current(cache: Path, name: str) -> str | None:
    link = cache / name / "current"
    return os.readlink(link) if link.is_symlink() else None


# ------------------------------------------------------------------------------------------ the robot's venv
@pytest.fixture(scope="module")
def robot_venv(tmp_path_factory) -> Path:
    """A fresh virtual environment with numpy, onnxruntime and the runtime-only distribution, nothing else."""
    venv = tmp_path_factory.mktemp("robot-venv") / "venv"
    subprocess.run([sys.executable, "-m", "venv", str(venv)], check=True, timeout=120)
    python = venv / "bin" / "python"
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PIP_REQUIRE_VIRTUALENV")}
    res = subprocess.run([str(python), "-m", "pip", "install", "--quiet", "--disable-pip-version-check", "numpy",
                          "onnxruntime", str(ROOT / "pipeline" / "coreach-robot")], env=env, capture_output=True,
                         text=True, timeout=600)  # fmt: skip
    assert res.returncode == 0, res.stderr[-3000:]
    return python


def test_runtime_only_install_fetches_runs_and_follows_a_rollback(released, robot_venv, tmp_path):
    name, python = released["name"], str(robot_venv)
    robot_home = tmp_path / "robot"  # a second client: its own folder, its own cache, no PYTHONPATH
    robot_home.mkdir()
    cache = robot_home / "bundles"
    fetch = ["fetch", name, "--server", released["uri"], "--cache", str(cache)]

    res = robot(fetch, robot_home, python)
    assert res.returncode == 0, res.stderr[-2000:]
    assert f"{name}@fielded: version 1 is current (downloaded and verified)" in res.stdout
    assert "Cautions" in res.stdout and "not a medical device" in res.stdout
    assert current(cache, name) == "v1"
    bundle = cache / name / "v1"
    # the cached manifest is the one the registry names (hashlib, not our own helper)
    assert hashlib.sha256((bundle / "manifest.json").read_bytes()).hexdigest() == released["manifest_sha256"]["1"]
    manifest = json.loads((bundle / "manifest.json").read_text())
    assert sorted(p.name for p in bundle.iterdir()) == sorted([*manifest["files"], "manifest.json"])
    for fname, digest in manifest["files"].items():
        assert hashlib.sha256((bundle / fname).read_bytes()).hexdigest() == digest
    assert manifest["training_run_id"] == released["run_id"]

    script = textwrap.dedent(f"""
        import json, sys
        import numpy as np
        import coreach
        from coreach.runtime.fetch import current_bundle
        from coreach.runtime.session import Session
        s = Session.open(current_bundle({str(cache)!r}, {name!r}))
        q = np.array(s.manifest.q_home)
        stick = np.array([0.6, -0.3])
        moved = 0
        for i in range(1000):
            qd = s.step(stick, q, now_s=i * 0.01)
            q = q + 0.01 * qd
            moved += bool(np.any(qd != 0))
        heavy = sorted(m for m in sys.modules if m.split('.')[0] in ('torch', 'lightning', 'mlflow', 'hydra'))
        print(json.dumps({{"steps": 1000, "moved": moved, "fault": s.fault, "finite": bool(np.isfinite(q).all()),
                           "coreach": coreach.__file__, "heavy": heavy}}))
    """)
    out = subprocess.run([python, "-c", script], cwd=robot_home, capture_output=True, text=True, timeout=300,
                         env={k: v for k, v in os.environ.items() if k != "PYTHONPATH"})  # fmt: skip
    assert out.returncode == 0, out.stderr[-3000:]
    ran = json.loads(out.stdout.strip().splitlines()[-1])
    assert ran["fault"] is None and ran["finite"] and ran["moved"] > 0 and ran["heavy"] == []
    assert ran["coreach"].startswith(str(robot_venv.parent.parent))  # the installed copy, not this checkout
    for module in ("torch", "mlflow"):
        gone = subprocess.run([python, "-c", f"import {module}"], capture_output=True, text=True, timeout=60)
        assert gone.returncode != 0 and "ModuleNotFoundError" in gone.stderr

    # a newer version fielded, then rolled back: each picked up by the next fetch
    promote(released, "2")
    res = robot(fetch, robot_home, python)
    assert res.returncode == 0, res.stderr[-2000:]
    assert "version 2 is current (downloaded and verified; was version 1)" in res.stdout
    assert current(cache, name) == "v2"
    promote(released, command="rollback")
    res = robot(fetch, robot_home, python)
    assert res.returncode == 0, res.stderr[-2000:]
    assert "version 1 is current (already in the cache, verified again; was version 2)" in res.stdout
    assert current(cache, name) == "v1"
    res = robot(["status", name, "--cache", str(cache), "--json"], robot_home, python)
    assert res.returncode == 0, res.stderr
    status = json.loads(res.stdout)
    (row,) = status["bundles"]
    assert status["cautions"] and (row["current"], row["verified"], row["cached"]) == ("1", True, ["1", "2"])


# ------------------------------------------------------------------------------------------ refusals
def _fielded_cache(released, folder: Path) -> Path:
    """A robot cache whose `current` is version 1, fetched from the server."""
    promote(released, "1")
    cache = folder / "bundles"
    res = robot(["fetch", released["name"], "--server", released["uri"], "--cache", str(cache)], folder)
    assert res.returncode == 0, res.stderr[-2000:]
    assert current(cache, released["name"]) == "v1"
    return cache


@pytest.fixture
def fielded_cache(released, tmp_path):
    return _fielded_cache(released, tmp_path)


@pytest.fixture(scope="module")
def shared_cache(released, tmp_path_factory):
    """One fielded cache for the refusals, which must all leave it as it is."""
    return _fielded_cache(released, tmp_path_factory.mktemp("robot-refusals"))


def _left_alone(cache: Path, name: str) -> None:
    """The previous bundle is current, still verifies, and nothing half-written was left beside it."""
    assert current(cache, name) == "v1"
    assert sorted(p.name for p in (cache / name).iterdir()) == [".lock", "current", "v1", "v1.json"]
    res = robot(["status", name, "--cache", str(cache)], cache.parent)
    assert res.returncode == 0 and "version 1 is current (verified)" in res.stdout, res.stdout + res.stderr


def test_tampering_in_the_store_is_refused_and_current_stays(released, fielded_cache, tmp_path):
    name, cache = released["name"], fielded_cache
    fetch = ["fetch", name, "--server", released["uri"], "--cache", str(cache)]
    promote(released, "2")
    onnx = store_file(released["bundle_uri"]["2"], "decoder.onnx")
    manifest = store_file(released["bundle_uri"]["2"], "manifest.json")
    original_onnx, original_manifest = onnx.read_bytes(), manifest.read_bytes()
    try:
        # a bundle file changed in the store: its sha256 no longer matches the manifest
        onnx.write_bytes(original_onnx[:-8] + bytes(8))
        line = one_line_error(robot(fetch, tmp_path), 3, "decoder.onnx", "changed in the store")
        assert hashlib.sha256(onnx.read_bytes()).hexdigest()[:16] in line
        _left_alone(cache, name)
        onnx.write_bytes(original_onnx)
        # the manifest changed in the store (here: made to list the changed file): not the one the registry names
        data = json.loads(original_manifest)
        data["files"]["decoder.onnx"] = hashlib.sha256(original_onnx[:-8] + bytes(8)).hexdigest()
        manifest.write_text(json.dumps(data, indent=2))
        line = one_line_error(robot(fetch, tmp_path), 3, "manifest.json", "coreach.manifest_sha256")
        assert hashlib.sha256(manifest.read_bytes()).hexdigest()[:16] in line
        _left_alone(cache, name)
    finally:
        onnx.write_bytes(original_onnx)
        manifest.write_bytes(original_manifest)
    res = robot(fetch, tmp_path)  # restored: fetched as released
    assert res.returncode == 0 and current(cache, name) == "v2", res.stderr


def _register(released, **tags: str) -> str:
    """Another registered model with one version and the given tags, fielded; returns its name."""
    client, name = released["client"], unique_experiment("robot-odd")
    client.create_registered_model(name)
    mv = client.create_model_version(name, released["bundle_uri"]["1"], run_id=released["release_run"]["1"])
    for k, v in tags.items():
        client.set_model_version_tag(name, mv.version, k.replace("__", "."), v)
    client.set_registered_model_alias(name, "fielded", mv.version)
    return name


@pytest.mark.parametrize("case", ["unknown model", "unknown alias", "no bundle", "not fully published",
                                  "bad manifest tag", "storage credentials", "server silent"])
def test_what_cannot_be_fetched_is_one_line_and_changes_nothing(released, shared_cache, tmp_path, case):
    uri, cache = released["uri"], shared_cache
    good = {"coreach__bundle_uri": released["bundle_uri"]["1"],
            "coreach__manifest_sha256": released["manifest_sha256"]["1"], "coreach__gate_passed": "true"}
    ref, server, words = released["name"], uri, ()
    if case == "unknown model":
        ref, words = unique_experiment("never-released"), ("no such registered model",)
    elif case == "unknown alias":
        ref, words = f"{released['name']}@nowhere", ("has no alias @nowhere",)
    elif case == "no bundle":  # a version released before bundles were kept in the store
        ref = _register(released, coreach__gate_passed="true", coreach__manifest_sha256="0" * 64)
        words = ("coreach.bundle_uri", "release it again")
    elif case == "not fully published":  # a release that stopped before its last tag
        ref = _register(released, **{k: v for k, v in good.items() if k != "coreach__gate_passed"})
        words = ("not fully published",)
    elif case == "bad manifest tag":
        ref, words = _register(released, **{**good, "coreach__manifest_sha256": "abc"}), ("coreach.manifest_sha256",)
    elif case == "storage credentials":  # a server without proxied artifact access hands out bucket URIs
        ref = _register(released, **{**good, "coreach__bundle_uri": "s3://lab-bucket/1/abc/artifacts/bundle"})
        words = ("storage credentials", "--serve-artifacts")
    elif case == "server silent":
        server, words = "http://127.0.0.1:9", ("does not answer",)
    res = robot(["fetch", ref, "--server", server, "--cache", str(cache), "--timeout", "3"], tmp_path)
    one_line_error(res, 2, *words)
    _left_alone(cache, released["name"])


class _CuttingProxy(http.server.BaseHTTPRequestHandler):
    """Forwards GETs to the real server; answers for decoder.onnx are cut off halfway (a dropped link)."""

    upstream = ""

    def do_GET(self):  # noqa: N802 - http.server's name
        try:
            with urllib.request.urlopen(self.upstream + self.path, timeout=30) as resp:
                status, body, kind = resp.status, resp.read(), resp.headers.get("Content-Type", "")
        except urllib.error.HTTPError as exc:
            status, body, kind = exc.code, exc.read(), exc.headers.get("Content-Type", "")
        self.send_response(status)
        self.send_header("Content-Type", kind)
        self.send_header("Content-Length", str(len(body)))
        self.end_headers()
        cut = self.path.endswith("/decoder.onnx")
        self.wfile.write(body[: len(body) // 2] if cut else body)
        if cut:
            self.close_connection = True

    def log_message(self, *args):
        pass


def test_a_download_cut_off_midway_changes_nothing(released, fielded_cache, tmp_path):
    name, cache = released["name"], fielded_cache
    promote(released, "2")
    handler = type("Proxy", (_CuttingProxy,), {"upstream": released["uri"]})
    proxy = http.server.ThreadingHTTPServer(("127.0.0.1", 0), handler)
    threading.Thread(target=proxy.serve_forever, daemon=True).start()
    try:
        res = robot(["fetch", name, "--server", f"http://127.0.0.1:{proxy.server_port}", "--cache", str(cache),
                     "--timeout", "5"], tmp_path)  # fmt: skip
    finally:
        proxy.shutdown()
    one_line_error(res, 2, "decoder.onnx", "cut off")
    _left_alone(cache, name)
