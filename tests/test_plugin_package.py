"""An outside package adds a regulariser through the entry-point group; coreach finds it and trains with it."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

from conftest import SMALL, cli_env
from mlflow.tracking import MlflowClient

HERE = Path(__file__).parent
COREACH = str(Path(sys.executable).parent / "coreach")


def test_outside_regulariser_is_listed_and_trains(workdir):
    site = workdir / "site"
    subprocess.run(
        [sys.executable, "-m", "pip", "install", "--quiet", "--no-deps", "--no-build-isolation",
         "--target", str(site), str(HERE / "plugin_example")],
        check=True, capture_output=True, text=True, timeout=300, cwd=workdir,
    )
    env = cli_env(PYTHONPATH=os.pathsep.join([str(site), os.environ.get("PYTHONPATH", "")]))

    listed = subprocess.run([COREACH, "--json", "plugins"], capture_output=True, text=True, env=env, cwd=workdir)
    assert listed.returncode == 0, listed.stderr
    plugins = {(p["kind"], p["name"]): p for p in json.loads(listed.stdout)}
    assert plugins[("loss", "effort")]["origin"].startswith("coreach-effort-example")
    assert plugins[("loss", "kl")]["origin"] == "built-in"

    res = subprocess.run(
        [COREACH, "--json", "train", *SMALL, "loss=[reconstruction,kl,effort]", "loss.effort.weight=0.05"],
        capture_output=True, text=True, env=env, cwd=workdir, timeout=600,
    )
    assert res.returncode == 0, res.stderr
    (summary,) = json.loads(res.stdout)["runs"]
    run = MlflowClient(f"sqlite:///{workdir / 'mlflow.db'}").get_run(summary["run_id"])
    assert run.data.params["loss.effort._target_"] == "coreach_effort.Effort"
    assert run.data.params["loss.effort.weight"] == "0.05"
    assert run.data.metrics["val/effort"] > 0
