"""Helpers for the lab tests: find the services .ci/run started, and fail (CI) or skip (elsewhere) without them."""

from __future__ import annotations

import json
import os
import shlex
import subprocess
import sys
import urllib.request
import uuid
from pathlib import Path

import pytest

COREACH = str(Path(sys.executable).parent / "coreach")
SERVICES_DIR = Path(os.environ.get("COREACH_SERVICES_DIR", "/tmp/coreach-services"))
# the smallest training that still exercises everything a run records (tests/conftest.py SMALL, linear)
TINY = ["dataset.episodes=40", "trainer.max_epochs=2", "data.batch_size=128", "model=linear", "loss=[reconstruction]"]


def in_ci() -> bool:
    return os.environ.get("CI", "").lower() in ("1", "true", "yes")


def _env_file_value(file: str, name: str) -> str | None:
    """`export NAME=value` from an env file a service script wrote (for runs outside .ci/run)."""
    path = SERVICES_DIR / file
    if not path.exists():
        return None
    for line in path.read_text().splitlines():
        parts = shlex.split(line)
        if len(parts) == 2 and parts[0] == "export" and parts[1].startswith(name + "="):
            return parts[1].split("=", 1)[1]
    return None


def missing(service: str, how: str) -> None:
    """In CI a missing service is a failure (its start-up broke); elsewhere the test is skipped, saying why."""
    message = f"{service} is not configured: {how}"
    if in_ci():
        pytest.fail(f"CI=true but {message} (see the service's start-up output above the test run)")
    pytest.skip(message)


def tracking_server() -> str:
    """URI of the MLflow tracking server for the tests, checked with /health."""
    uri = os.environ.get("COREACH_TRACKING_URI") or _env_file_value("postgres-mlflow.env", "COREACH_TRACKING_URI")
    if not uri:
        missing("the MLflow tracking server",
                "run `.ci/services/postgres-mlflow.sh start` (or set COREACH_TRACKING_URI)")  # fmt: skip
    try:
        with urllib.request.urlopen(f"{uri}/health", timeout=10) as resp:
            assert resp.status == 200
    except (OSError, AssertionError) as exc:
        pytest.fail(f"tracking server {uri} is configured but does not answer /health: {exc}")
    return uri


def slurm_env() -> dict[str, str]:
    """Environment with SLURM_CONF for the test cluster, after checking that it answers."""
    conf = os.environ.get("SLURM_CONF") or _env_file_value("slurm.env", "SLURM_CONF")
    if not conf:
        missing("the SLURM test cluster", "run `.ci/services/slurm.sh start` as root (or set SLURM_CONF)")
    env = {**os.environ, "SLURM_CONF": conf}
    try:
        res = subprocess.run(["sinfo", "-h", "-o", "%T"], capture_output=True, text=True, env=env, timeout=20)
    except (OSError, subprocess.TimeoutExpired) as exc:
        pytest.fail(f"SLURM_CONF={conf} is set but sinfo failed: {exc}")
    if res.returncode != 0 or not res.stdout.strip():
        pytest.fail(f"SLURM_CONF={conf} is set but the cluster does not answer: {res.stderr.strip()}")
    return env


def unique_experiment(prefix: str) -> str:
    """A fresh experiment name, so counts on a shared server see only this test's runs."""
    return f"{prefix}-{uuid.uuid4().hex[:10]}"


def run_cli(args: list[str], cwd: Path, env: dict | None = None, timeout: float = 600) -> subprocess.CompletedProcess:
    base = {k: v for k, v in (env or os.environ).items() if k != "MLFLOW_TRACKING_URI"}
    base["CI"] = "true"  # no progress bars
    return subprocess.run([COREACH, *args], cwd=cwd, env=base, capture_output=True, text=True, timeout=timeout)


def cli_json(args: list[str], cwd: Path, env: dict | None = None, timeout: float = 600) -> dict:
    res = run_cli(["--json", *args], cwd, env, timeout)
    assert res.returncode == 0, res.stderr[-3000:]
    return json.loads(res.stdout)  # stdout must be JSON alone, whatever the launcher or the store


def warm_dataset(cwd: Path, overrides: list[str]) -> None:
    """Generate the demonstrations once in `cwd/data`, so parallel runs read the cache instead of racing."""
    from coreach.config.check import compose_config
    from coreach.host.registry import build_plugin

    here = Path.cwd()
    os.chdir(cwd)
    try:
        cfg = compose_config("train", overrides)
        robot = build_plugin(cfg.robot, "robot")
        build_plugin(cfg.dataset, "dataset").load(robot)
    finally:
        os.chdir(here)


def train_in_child(workdir: str, overrides: list[str], env: dict[str, str], queue) -> None:
    """One training run in a worker process (started by a forkserver that preloaded coreach): report its
    summary or its error through `queue`."""
    try:
        os.chdir(workdir)
        os.environ.clear()
        os.environ.update(env)
        import torch

        torch.set_num_threads(1)  # 8 processes share 2 cores
        from coreach.config.check import compose_config
        from coreach.training.run import train

        summary = train(compose_config("train", overrides))
        queue.put(("ok", {k: summary[k] for k in ("run_id", "epochs", "experiment_id")}))
    except BaseException as exc:  # noqa: BLE001 - reported to the parent, which fails the test
        queue.put(("error", f"{type(exc).__name__}: {exc}"))


def open_store_in_child(uri: str, experiment: str, queue) -> None:
    """coreach.tracking.client on a store, in a worker process; report success or the error."""
    try:
        from omegaconf import OmegaConf

        from coreach import tracking

        _, exp_id = tracking.client(OmegaConf.create({"uri": uri, "experiment": experiment, "artifacts": None}))
        queue.put(("ok", exp_id))
    except BaseException as exc:  # noqa: BLE001
        queue.put(("error", f"{type(exc).__name__}: {exc}"))
