"""`coreach compare`: leaderboard of an experiment's training runs (table, CSV, PNG) from a store filled with
known values, so ranking, filtering and vetting intervals can be checked exactly."""

from __future__ import annotations

import csv
import json
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import cli_env
from mlflow.entities import Metric, Param
from mlflow.tracking import MlflowClient

from coreach.commands import compare as cmp
from coreach.errors import ConfigError, CoreachError

COREACH = str(Path(sys.executable).parent / "coreach")

# label -> (sweep, model, loss terms, seed, best val reconstruction, best val loss)
RUNS = {
    "a": ("s1", "LinearDecoder", ["reconstruction"], 0, 0.30, 0.30),
    "b": ("s1", "StateVAE", ["reconstruction", "kl"], 1, 0.10, 0.12),
    "c": ("s1", "ConditionalVAE", ["reconstruction", "kl"], 2, 0.20, 0.25),
    "d": ("s2", "ConditionalVAE", ["reconstruction", "kl", "goal_entropy"], 0, 0.05, 0.40),
}


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    """One store for the module (creating an MLflow sqlite store takes seconds); tests only read it."""
    workdir = tmp_path_factory.mktemp("compare-store")
    uri = f"sqlite:///{workdir / 'mlflow.db'}"
    client = MlflowClient(uri)
    exp = client.create_experiment("lab", artifact_location=(workdir / "mlartifacts").as_uri())
    ids = {}
    for label, (sweep, model, losses, seed, rec, loss) in RUNS.items():
        tags = {"coreach.stage": "train", "coreach.label": label, "coreach.sweep": sweep}
        rid = client.create_run(exp, run_name=label, tags=tags).info.run_id
        params = [Param("model._target_", f"coreach_plugins.model.x.{model}"), Param("seed", str(seed))]
        params += [Param(f"loss.{t}._target_", f"coreach_plugins.loss.{t}.T") for t in losses]
        params += [Param(f"loss.{t}.weight", "1.0") for t in losses]
        metrics = [Metric("best/val/reconstruction", rec, 0, 0), Metric("best/val/loss", loss, 0, 0),
                   Metric("val/loss", loss, 0, 1)]  # fmt: skip
        client.log_batch(rid, metrics=metrics, params=params)
        client.set_terminated(rid)
        ids[label] = rid
    # vetting results on two runs, in the two interval namings the command accepts
    client.log_batch(ids["b"], metrics=[Metric("vet/nominal/success/value", 0.8, 0, 0),
                                         Metric("vet/nominal/success/lo", 0.6, 0, 0),
                                         Metric("vet/nominal/success/hi", 0.9, 0, 0),
                                         Metric("vet/nominal/success/n", 20, 0, 0)])  # fmt: skip
    client.log_batch(ids["c"], metrics=[Metric("vet/nominal/success", 0.5, 0, 0),
                                         Metric("vet/nominal/success_lo", 0.3, 0, 0),
                                         Metric("vet/nominal/success_hi", 0.7, 0, 0),
                                         Metric("vet/nominal/path", 1.4, 0, 0)])  # fmt: skip
    # a vetting run of its own is not a training run: never on the leaderboard
    vet = client.create_run(exp, run_name="vet b", tags={"coreach.stage": "vet", "coreach.sweep": "s1"})
    client.log_batch(vet.info.run_id, metrics=[Metric("best/val/reconstruction", 0.0, 0, 0)])
    return {"uri": uri, "ids": ids, "dir": workdir}


def test_ranks_by_reconstruction_and_filters_by_sweep(store, tmp_path):
    out = tmp_path / "cmp"
    res = cmp.compare(store["uri"], "lab", "s1", out)
    assert res["sort"] == "best/val/reconstruction"
    expected = sorted((v[4], k) for k, v in RUNS.items() if v[0] == "s1")  # lower is better
    assert [r.label for r in res["rows"]] == [k for _, k in expected]
    with open(out / "leaderboard.csv") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["label"] for r in rows] == [k for _, k in expected]
    assert [float(r["best/val/reconstruction"]) for r in rows] == [v for v, _ in expected]
    assert [r["rank"] for r in rows] == ["1", "2", "3"]
    b = next(r for r in rows if r["label"] == "b")
    assert (b["model"], b["losses"], b["seed"], b["sweep"]) == ("StateVAE", "kl+reconstruction", "1", "s1")
    assert b["run_id"] == store["ids"]["b"]


def test_vetting_intervals_shown_where_they_exist(store, tmp_path):
    res = cmp.compare(store["uri"], "lab", None, tmp_path / "cmp")
    rows = {r.label: r for r in res["rows"]}
    assert rows["b"].vet["vet/nominal/success"] == cmp.Interval(0.8, 0.6, 0.9)
    assert rows["c"].vet["vet/nominal/success"] == cmp.Interval(0.5, 0.3, 0.7)
    assert rows["c"].vet["vet/nominal/path"] == cmp.Interval(1.4, None, None)
    assert "vet/nominal/success/n" not in rows["b"].vet and rows["a"].vet == {}
    assert rows["b"].vet["vet/nominal/success"].text() == "0.8 [0.6, 0.9]"
    with open(tmp_path / "cmp" / "leaderboard.csv") as fh:
        csv_rows = {r["label"]: r for r in csv.DictReader(fh)}
    c = csv_rows["c"]
    assert (float(c["vet/nominal/success"]), float(c["vet/nominal/success_lo"]),
            float(c["vet/nominal/success_hi"])) == (0.5, 0.3, 0.7)  # fmt: skip
    assert csv_rows["a"]["vet/nominal/success"] == ""  # nothing invented for an unvetted run


def test_sort_by_any_metric_and_limit(store, tmp_path):
    res = cmp.compare(store["uri"], "lab", None, tmp_path / "cmp", sort="best/val/loss", limit=2)
    by_loss = sorted(RUNS, key=lambda k: RUNS[k][5])
    assert [r.label for r in res["rows"]] == by_loss[:2]
    # a vetting metric ranks too; runs without it come last
    res = cmp.compare(store["uri"], "lab", None, tmp_path / "cmp", sort="vet/nominal/success")
    assert [r.label for r in res["rows"]][:2] == ["c", "b"]
    with pytest.raises(ConfigError, match="--sort"):
        cmp.compare(store["uri"], "lab", None, tmp_path / "cmp", sort="best/val/nothing")


def test_png_is_an_image_of_the_ranking(store, tmp_path):
    import matplotlib.image

    out = tmp_path / "cmp"
    cmp.compare(store["uri"], "lab", None, out)
    img = matplotlib.image.imread(out / "leaderboard.png")
    assert img.ndim == 3 and img.shape[0] > 100 and img.shape[1] > 500  # two panels: ranking and vetting
    assert not [p for p in out.iterdir() if p.name.startswith(".")]  # no temporary files left behind


def test_files_are_replaced_whole_or_not_at_all(store, monkeypatch, tmp_path):
    out = tmp_path / "cmp"
    cmp.compare(store["uri"], "lab", None, out)
    before = [(out / f).read_bytes() for f in ("leaderboard.csv", "leaderboard.png")]

    def broken(*a, **k):
        raise RuntimeError("renderer failed")

    monkeypatch.setattr(cmp, "png_bytes", broken)
    with pytest.raises(RuntimeError):
        cmp.compare(store["uri"], "lab", "s1", out)
    assert [(out / f).read_bytes() for f in ("leaderboard.csv", "leaderboard.png")] == before  # the old pair
    assert not [p for p in out.iterdir() if p.name.startswith(".")]


def test_unknown_experiment_empty_sweep_and_missing_store(store, tmp_path):
    with pytest.raises(CoreachError, match="'nope'"):
        cmp.compare(store["uri"], "nope", None, tmp_path)
    with pytest.raises(CoreachError, match="no training runs"):
        cmp.compare(store["uri"], "lab", "s9", tmp_path)
    missing = tmp_path / "none" / "mlflow.db"
    with pytest.raises(CoreachError, match="does not exist"):
        cmp.compare(f"sqlite:///{missing}", "lab", None, tmp_path)
    assert not missing.exists()  # reading never creates a store


def test_cli_json_and_one_line_errors(store, tmp_path):
    run = lambda *a: subprocess.run([COREACH, *a], cwd=tmp_path, capture_output=True, text=True,  # noqa: E731
                                    env=cli_env(), timeout=300)  # fmt: skip
    res = run("--json", "compare", "--uri", store["uri"], "--experiment", "lab", "--sweep", "s2", "--out", "o")
    assert res.returncode == 0, res.stderr
    payload = json.loads(res.stdout)
    assert [r["label"] for r in payload["runs"]] == ["d"]
    assert (tmp_path / "o" / "leaderboard.csv").exists()
    res = run("compare", "--experiment", "lab", "--frobnicate")
    assert res.returncode == 2 and res.stderr.count("\n") == 1 and "--frobnicate" in res.stderr
    res = run("compare", "--uri", store["uri"], "--experiment", "nope")
    assert res.returncode == 2 and "nope" in res.stderr and "Traceback" not in res.stderr
