"""Pre-emption: a training killed mid-run continues from its last checkpoint into the same MLflow run and ends
exactly where an uninterrupted run with the same seed ends."""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from conftest import cli_env
from mlflow.tracking import MlflowClient

COREACH = str(Path(sys.executable).parent / "coreach")
# cVAE with the goal entropy term: the stochastic parts (latent noise, stick samples) must also resume exactly
ARGS = ["dataset.episodes=60", "trainer.max_epochs=6", "trainer.patience=100", "data.batch_size=64",
        "+experiment=cvae_goal_entropy", "model.hidden=[64,64]"]


def _train(workdir, *extra):
    res = subprocess.run([COREACH, "--json", "train", *ARGS, *extra], cwd=workdir, capture_output=True, text=True,
                         env=cli_env(), timeout=900)
    return res


def _start(workdir):
    return subprocess.Popen([COREACH, "train", *ARGS], cwd=workdir, env=cli_env(),
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)


def _wait_for_epochs(client, n, proc, exclude, timeout=600):
    """Run id of the running training (not `exclude`), once it has logged n epochs."""
    t0 = time.time()
    while time.time() - t0 < timeout:
        assert proc.poll() is None, proc.stderr.read()
        exp = client.get_experiment_by_name("coreach")
        runs = client.search_runs([exp.experiment_id]) if exp else []
        for r in runs:
            if r.info.run_id != exclude and len(client.get_metric_history(r.info.run_id, "val/loss")) >= n:
                return r.info.run_id
        time.sleep(0.2)
    raise AssertionError("training did not reach the expected epoch in time")


@pytest.mark.slow
@pytest.mark.parametrize("sig", [signal.SIGKILL, signal.SIGTERM], ids=["sigkill", "sigterm"])
def test_killed_training_resumes_to_identical_metrics(workdir, sig):
    reference = _train(workdir)
    assert reference.returncode == 0, reference.stderr
    ref = json.loads(reference.stdout)["runs"][0]

    client = MlflowClient(f"sqlite:///{workdir / 'mlflow.db'}")
    proc = _start(workdir)
    run_id = _wait_for_epochs(client, 2, proc, exclude=ref["run_id"])
    proc.send_signal(sig)
    code = proc.wait(timeout=120)
    if sig == signal.SIGTERM:
        assert code == 143
        ckpts = Path(client.get_run(run_id).data.tags["coreach.output_dir"]) / "checkpoints"
        assert (ckpts / "preempted.ckpt").exists()
        assert client.get_run(run_id).info.status == "KILLED"
    assert run_id != ref["run_id"]

    resumed = _train(workdir, f"resume={run_id}")
    assert resumed.returncode == 0, resumed.stderr
    out = json.loads(resumed.stdout)["runs"][0]
    assert out["run_id"] == run_id  # the same MLflow run continues
    assert out["metrics"] == ref["metrics"] and out["best_epoch"] == ref["best_epoch"]
    final_ref = client.get_run(ref["run_id"]).data.metrics
    final = client.get_run(run_id).data.metrics
    assert final["val/loss"] == final_ref["val/loss"] and final["train/loss"] == final_ref["train/loss"]
    steps = sorted({m.step for m in client.get_metric_history(run_id, "val/loss")})
    assert steps == list(range(6))
    assert client.get_run(run_id).info.status == "FINISHED"


def test_resume_refuses_unknown_run_and_changed_config(workdir):
    res = _train(workdir, "resume=0123456789abcdef0123456789abcdef")
    assert res.returncode == 2 and "option resume" in res.stderr and "Traceback" not in res.stderr
