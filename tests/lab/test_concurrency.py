"""Concurrent writers: eight training processes at once on the embedded sqlite store and on the tracking
server, every run, param and metric counted; and a fresh sqlite store opened by several processes at once."""

from __future__ import annotations

import multiprocessing as mp
import os

import pytest
from labkit import TINY, open_store_in_child, tracking_server, train_in_child, unique_experiment, warm_dataset
from mlflow.tracking import MlflowClient

pytestmark = pytest.mark.lab

N_RUNS = 8
# per run: train/val x (loss, reconstruction), one value per epoch, plus best/* once (TINY trains
# reconstruction only)
EPOCH_KEYS = ["train/loss", "train/reconstruction", "val/loss", "val/reconstruction"]


def _context():
    """Worker processes forked from a server that imported coreach once: eight processes at once without
    paying eight interpreter start-ups and torch imports on a 2-core machine."""
    ctx = mp.get_context("forkserver")
    ctx.set_forkserver_preload(["labkit", "coreach.training.run", "coreach.config.check", "mlflow.tracking"])
    return ctx


def _run_all(target, argsets, timeout=300):
    ctx = _context()
    queue = ctx.Queue()
    procs = [ctx.Process(target=target, args=(*args, queue)) for args in argsets]
    for p in procs:
        p.start()
    try:
        results = [queue.get(timeout=timeout) for _ in procs]
    finally:
        for p in procs:
            p.join(timeout=30)
            if p.is_alive():
                p.kill()
    errors = [r[1] for r in results if r[0] != "ok"]
    assert not errors, errors
    return [r[1] for r in results]


def _expected_params(workdir, overrides) -> dict[str, str]:
    """The params one run means to record (training/run.py's run_params), seed aside."""
    from coreach.config.check import compose_config
    from coreach.training.run import prepare, run_params

    here = os.getcwd()
    os.chdir(workdir)
    try:
        cfg = compose_config("train", overrides)
        _, episodes, train_s, val_s = prepare(cfg)
        return run_params(cfg, episodes, train_s, val_s)
    finally:
        os.chdir(here)


def _check_counts(client: MlflowClient, experiment: str, summaries: list[dict], params: dict[str, str]) -> None:
    exp = client.get_experiment_by_name(experiment)
    runs = client.search_runs([exp.experiment_id], max_results=1000)
    assert sorted(r.info.run_id for r in runs) == sorted(s["run_id"] for s in summaries)
    assert len(runs) == N_RUNS
    by_id = {s["run_id"]: s for s in summaries}
    for run in runs:
        rid = run.info.run_id
        assert run.info.status == "FINISHED"
        assert sorted(run.data.params) == sorted(params)  # every key, none lost
        # values too; the seed and, through it, the episode split differ between runs
        varies = ("seed", "dataset.train_samples", "dataset.val_samples")
        assert {k: v for k, v in run.data.params.items() if k not in varies} == {
            k: v for k, v in params.items() if k not in varies}  # fmt: skip
        split = int(run.data.params["dataset.train_samples"]) + int(run.data.params["dataset.val_samples"])
        assert split == int(params["dataset.train_samples"]) + int(params["dataset.val_samples"])
        epochs = by_id[rid]["epochs"]
        for key in EPOCH_KEYS:
            steps = [m.step for m in client.get_metric_history(rid, key)]
            assert sorted(steps) == list(range(epochs)), (rid, key, steps)  # one value per epoch, none lost
            assert len(client.get_metric_history(rid, f"best/{key}")) == 1
        assert [a.path for a in client.list_artifacts(rid, "decoder")] == ["decoder/decoder.json",
                                                                            "decoder/decoder.safetensors"]  # fmt: skip
    total = sum(len(client.get_metric_history(r.info.run_id, k)) for r in runs for k in EPOCH_KEYS)
    assert total == sum(s["epochs"] for s in summaries) * len(EPOCH_KEYS)
    assert sum(len(r.data.params) for r in runs) == N_RUNS * len(params)


def test_fresh_sqlite_store_opened_by_four_processes_at_once(workdir):
    # Without tracking's store lock the processes race in MLflow's schema migration (errors such as
    # "duplicate column" or "alembic_version ... 0 found"): this test is what catches the lock missing.
    uri = f"sqlite:///{workdir / 'fresh.db'}"
    exp_ids = _run_all(open_store_in_child, [(uri, "fresh")] * 4, timeout=120)
    assert len(set(exp_ids)) == 1
    client = MlflowClient(uri)
    assert [e.name for e in client.search_experiments() if e.name == "fresh"] == ["fresh"]


def test_eight_parallel_runs_on_sqlite_record_everything(workdir):
    overrides = [*TINY, "tracking.experiment=concurrent"]
    warm_dataset(workdir, overrides)
    from omegaconf import OmegaConf

    from coreach import tracking

    uri = f"sqlite:///{workdir / 'mlflow.db'}"
    tracking.client(OmegaConf.create({"uri": uri, "experiment": "concurrent", "artifacts": None}))  # store once
    env = {k: v for k, v in os.environ.items() if k != "MLFLOW_TRACKING_URI"}
    summaries = _run_all(train_in_child, [(str(workdir), [*overrides, f"seed={i}"], env) for i in range(N_RUNS)])
    _check_counts(MlflowClient(uri), "concurrent", summaries, _expected_params(workdir, overrides))


def test_eight_parallel_runs_on_the_server_record_everything(workdir, monkeypatch):
    uri = tracking_server()
    monkeypatch.setenv("COREACH_TRACKING_URI", uri)
    experiment = unique_experiment("concurrent")
    overrides = [*TINY, "tracking=server", f"tracking.experiment={experiment}"]
    warm_dataset(workdir, overrides)
    env = {k: v for k, v in os.environ.items() if k != "MLFLOW_TRACKING_URI"}
    env["COREACH_TRACKING_URI"] = uri
    summaries = _run_all(train_in_child, [(str(workdir), [*overrides, f"seed={i}"], env) for i in range(N_RUNS)])
    _check_counts(MlflowClient(uri), experiment, summaries, _expected_params(workdir, overrides))
