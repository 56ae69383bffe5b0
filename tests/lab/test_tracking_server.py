"""Against the shared tracking server (PostgreSQL backend) that .ci/run starts: a sweep on local joblib
workers records every run and metric, the model registry keeps versions and aliases, a second client and
the plain REST API see the same runs, and `coreach compare` ranks them."""

from __future__ import annotations

import csv
import json
import os
import urllib.request

import pytest
from labkit import TINY, cli_json, run_cli, tracking_server, unique_experiment, warm_dataset
from mlflow.tracking import MlflowClient

pytestmark = pytest.mark.lab

SEEDS = [0, 1, 2]
EPOCH_KEYS = ["train/loss", "train/reconstruction", "val/loss", "val/reconstruction"]


@pytest.fixture(scope="module")
def server_sweep(tmp_path_factory):
    """One 3-run sweep through `coreach train -m hydra/launcher=local tracking=server`, shared by the tests."""
    uri = tracking_server()
    cwd = tmp_path_factory.mktemp("server-sweep")
    experiment = unique_experiment("lab-sweep")
    overrides = [*TINY, "tracking=server", f"tracking.experiment={experiment}"]
    warm_dataset(cwd, overrides)
    env = {**os.environ, "COREACH_TRACKING_URI": uri}
    seeds = "seed=" + ",".join(map(str, SEEDS))
    payload = cli_json(["train", "-m", "hydra/launcher=local", *overrides, seeds], cwd, env)
    return {"uri": uri, "experiment": experiment, "runs": payload["runs"], "cwd": cwd, "env": env}


def test_joblib_sweep_on_the_server_records_every_run_and_metric(server_sweep):
    runs = server_sweep["runs"]
    assert len(runs) == len(SEEDS)  # summaries gathered from the workers' folders
    client = MlflowClient(server_sweep["uri"])
    exp = client.get_experiment_by_name(server_sweep["experiment"])
    found = client.search_runs([exp.experiment_id])
    assert sorted(r.info.run_id for r in found) == sorted(r["run_id"] for r in runs)
    assert sorted(int(r.data.params["seed"]) for r in found) == SEEDS
    assert len({r.data.tags["coreach.sweep"] for r in found}) == 1  # one sweep, one tag
    by_id = {r["run_id"]: r for r in runs}
    for run in found:
        assert run.info.status == "FINISHED"
        epochs = by_id[run.info.run_id]["epochs"]
        for key in EPOCH_KEYS:
            assert [m.step for m in client.get_metric_history(run.info.run_id, key)] == list(range(epochs))
        # the value the run reported is the value the server holds
        assert run.data.metrics["best/val/loss"] == pytest.approx(by_id[run.info.run_id]["val_loss"])


def test_a_second_client_and_the_rest_api_see_the_same_runs(server_sweep):
    expected = sorted(r["run_id"] for r in server_sweep["runs"])
    other = MlflowClient(tracking_uri=server_sweep["uri"])
    exp = other.get_experiment_by_name(server_sweep["experiment"])
    assert sorted(r.info.run_id for r in other.search_runs([exp.experiment_id])) == expected
    # MLflow's documented REST endpoint, without the Python client in between
    body = json.dumps({"experiment_ids": [exp.experiment_id], "max_results": 100}).encode()
    req = urllib.request.Request(f"{server_sweep['uri']}/api/2.0/mlflow/runs/search", data=body,
                                 headers={"Content-Type": "application/json"})  # fmt: skip
    with urllib.request.urlopen(req, timeout=30) as resp:
        rest = json.loads(resp.read())
    assert sorted(r["info"]["run_id"] for r in rest["runs"]) == expected


def test_registry_versions_and_aliases(server_sweep):
    client = MlflowClient(server_sweep["uri"])
    name = unique_experiment("lab-decoder")
    first, second = server_sweep["runs"][0]["run_id"], server_sweep["runs"][1]["run_id"]
    client.create_registered_model(name)
    v1 = client.create_model_version(name, f"runs:/{first}/decoder", run_id=first)
    v2 = client.create_model_version(name, f"runs:/{second}/decoder", run_id=second)
    assert (int(v1.version), int(v2.version)) == (1, 2)
    client.set_registered_model_alias(name, "candidate", v1.version)
    got = client.get_model_version_by_alias(name, "candidate")
    assert (got.version, got.run_id) == (v1.version, first)
    # moving the alias, seen by another client
    client.set_registered_model_alias(name, "candidate", v2.version)
    got = MlflowClient(server_sweep["uri"]).get_model_version_by_alias(name, "candidate")
    assert (got.version, got.run_id) == (v2.version, second)
    assert sorted(int(v.version) for v in client.search_model_versions(f"name = '{name}'")) == [1, 2]
    # the registered source holds the decoder files the run logged
    files = sorted(a.path for a in client.list_artifacts(first, "decoder"))
    assert files == ["decoder/decoder.json", "decoder/decoder.safetensors"]


def test_compare_ranks_the_sweep_from_the_server(server_sweep, tmp_path):
    sweep = MlflowClient(server_sweep["uri"]).get_run(server_sweep["runs"][0]["run_id"]).data.tags["coreach.sweep"]
    out = tmp_path / "cmp"
    res = run_cli(["compare", "--uri", server_sweep["uri"], "--experiment", server_sweep["experiment"],
                   "--sweep", sweep, "--out", str(out)], tmp_path)  # fmt: skip
    assert res.returncode == 0, res.stderr
    with open(out / "leaderboard.csv") as fh:
        rows = list(csv.DictReader(fh))
    assert sorted(r["run_id"] for r in rows) == sorted(r["run_id"] for r in server_sweep["runs"])
    losses = [float(r["best/val/reconstruction"]) for r in rows]
    assert losses == sorted(losses)
    expected = sorted(r["metrics"]["val/reconstruction"] for r in server_sweep["runs"])
    assert losses == pytest.approx(expected)
    assert (out / "leaderboard.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
