"""A sweep through SLURM with Hydra's submitit launcher (`hydra/launcher=slurm`) on the single-node cluster
.ci/run starts: every run lands in tracking, and the jobs really ran under SLURM."""

from __future__ import annotations

import re
import subprocess
import time
from pathlib import Path

import pytest
from labkit import TINY, cli_json, slurm_env, warm_dataset
from mlflow.tracking import MlflowClient

pytestmark = pytest.mark.lab

SEEDS = [0, 1]


def test_sweep_through_slurm_lands_every_run_in_tracking(workdir):
    env = slurm_env()
    uri = f"sqlite:///{workdir / 'mlflow.db'}"  # jobs run on this machine, so a store by absolute path works
    overrides = [*TINY, f"tracking.uri={uri}", "tracking.experiment=slurm"]
    warm_dataset(workdir, overrides)
    launcher = ["hydra/launcher=slurm", "hydra.launcher.cpus_per_task=1", "hydra.launcher.mem_gb=1",
                "hydra.launcher.timeout_min=10"]  # fmt: skip
    payload = cli_json(["train", "-m", *launcher, *overrides, "seed=" + ",".join(map(str, SEEDS))], workdir, env)
    runs = payload["runs"]
    assert len(runs) == len(SEEDS)
    client = MlflowClient(uri)
    exp = client.get_experiment_by_name("slurm")
    found = client.search_runs([exp.experiment_id])
    assert sorted(r.info.run_id for r in found) == sorted(r["run_id"] for r in runs)
    assert all(r.info.status == "FINISHED" for r in found)
    assert sorted(int(r.data.params["seed"]) for r in found) == SEEDS
    for run in found:
        assert len(client.get_metric_history(run.info.run_id, "val/loss")) >= 1
    # the runs really were SLURM jobs: submitit's folders are named by job id (`<array id>_<task>`), and
    # SLURM itself reports those array tasks as completed (finished jobs stay listed for MinJobAge = 60 s)
    sweep_dir = Path(runs[0]["output_dir"]).parents[1]
    # (plus a folder named by the bare array id, where submitit keeps the array's submission script)
    job_dirs = sorted(p.name for p in (sweep_dir / ".submitit").iterdir() if p.is_dir() and "_" in p.name)
    assert len(job_dirs) == len(SEEDS) and len({d.split("_")[0] for d in job_dirs}) == 1, job_dirs
    array_id = job_dirs[0].split("_")[0]
    # submitit returns once a task's result file exists; SLURM may still be wrapping the task up
    deadline = time.monotonic() + 60
    while True:
        shown = subprocess.run(["scontrol", "show", "job", array_id], capture_output=True, text=True, env=env,
                               timeout=30)  # fmt: skip
        assert shown.returncode == 0, shown.stderr
        states = re.findall(r"JobState=(\w+)", shown.stdout)
        if states == ["COMPLETED"] * len(SEEDS) or time.monotonic() > deadline:
            break
        assert set(states) <= {"COMPLETED", "RUNNING", "COMPLETING"}, shown.stdout
        time.sleep(1)
    assert states == ["COMPLETED"] * len(SEEDS), shown.stdout
