"""The `coreach` command as a user runs it: JSON on stdout, sweeps, plugins, and one-line errors."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest
from conftest import FAST, SMALL, cli_env
from mlflow.tracking import MlflowClient

COREACH = str(Path(sys.executable).parent / "coreach")


def run(args, cwd, **env):
    return subprocess.run([COREACH, *args], cwd=cwd, capture_output=True, text=True, env=cli_env(**env), timeout=600)


def test_train_json_prints_only_json(workdir):
    res = run(["--json", "train", *SMALL, "model=linear", "loss=[reconstruction]"], workdir)
    assert res.returncode == 0, res.stderr
    payload = json.loads(res.stdout)  # nothing but JSON on stdout
    (summary,) = payload["runs"]
    assert summary["label"] == "LinearDecoder" and len(summary["run_id"]) == 32
    assert (workdir / "mlflow.db").exists()


def test_multirun_tags_runs_as_one_sweep(workdir):
    res = run(["--json", "train", "-m", *SMALL, "model=linear,vae", "loss=[reconstruction]"], workdir)
    assert res.returncode == 0, res.stderr
    runs = json.loads(res.stdout)["runs"]
    assert len(runs) == 2
    client = MlflowClient(f"sqlite:///{workdir / 'mlflow.db'}")
    tags = {client.get_run(r["run_id"]).data.tags.get("coreach.sweep") for r in runs}
    assert len(tags) == 1 and None not in tags
    assert {client.get_run(r["run_id"]).data.params["model._target_"].rsplit(".", 1)[1] for r in runs} == {
        "LinearDecoder",
        "StateVAE",
    }


def test_plugins_lists_every_kind_with_origin(workdir):
    res = run(["--json", "plugins"], workdir)
    assert res.returncode == 0, res.stderr
    found = {(p["kind"], p["name"]): p for p in json.loads(res.stdout)}
    for key in [("robot", "seven_joint_arm"), ("dataset", "parquet_file"), ("belief", "boltzmann"), ("model", "cvae"),
                ("loss", "goal_entropy")]:
        assert found[key]["origin"] == "built-in"


def _bad_dataset(workdir: Path) -> Path:
    """A copy of a generated dataset with one NaN joint velocity in episode 3."""
    from coreach.config.check import compose_config
    from coreach.training.run import build_plugin

    cfg = compose_config("train", SMALL)
    robot = build_plugin(cfg.robot, "robot")
    src = Path(build_plugin(cfg.dataset, "dataset").cache_path(robot))
    build_plugin(cfg.dataset, "dataset").load(robot)
    table = pq.read_table(src)
    qd = table.column("qd").to_pylist()
    episodes = np.array(table.column("episode").to_pylist())
    row = int(np.flatnonzero(episodes == 3)[2])
    qd[row][1] = float("nan")
    import pyarrow as pa

    idx = table.schema.get_field_index("qd")
    table = table.set_column(idx, table.schema.field("qd"), pa.array(qd, type=table.schema.field("qd").type))
    bad = workdir / "bad.parquet"
    pq.write_table(table, bad)
    return bad


BAD_INPUTS = {
    "unknown plugin": (["model=transformer"], "model=transformer"),
    "bad option type": (["model.hidden=abc"], "model.hidden"),
    "unknown option": (["+model.lattent=3"], "model.lattent"),
    "missing urdf": (["robot.urdf=/nonexistent/arm.urdf"], "/nonexistent/arm.urdf"),
}
BAD_DATA_OPTIONS = {
    "mandatory path": (["dataset=parquet_file"], "dataset.path"),
}


@pytest.mark.parametrize("case", sorted(BAD_INPUTS) + sorted(BAD_DATA_OPTIONS))
def test_bad_input_gives_one_line_and_nonzero_exit(workdir, case):
    if case in BAD_INPUTS:
        overrides, needle = BAD_INPUTS[case]
        overrides = [*SMALL, *overrides]
    else:
        overrides, needle = BAD_DATA_OPTIONS[case]
        overrides = [*FAST, *overrides]
    res = run(["train", *overrides], workdir)
    assert res.returncode == 2
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, res.stderr
    assert lines[0].startswith("coreach: error:") and needle in lines[0]
    assert "Traceback" not in res.stderr and res.stdout == ""
    assert not (workdir / "mlflow.db").exists()  # nothing written for a run that never started


def test_nan_in_dataset_names_file_episode_and_column(workdir):
    bad = _bad_dataset(workdir)
    res = run(["train", *FAST, "dataset=parquet_file", f"dataset.path={bad}"], workdir)
    assert res.returncode == 2
    (line,) = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert "bad.parquet" in line and "episode 3" in line and "qd" in line
    assert not (workdir / "mlflow.db").exists()
    # with --debug the traceback is shown
    res = run(["--debug", "train", *FAST, "dataset=parquet_file", f"dataset.path={bad}"], workdir)
    assert res.returncode == 2 and "Traceback" in res.stderr


def test_a_bad_override_is_blamed_not_a_neighbour_whose_key_it_contains():
    from coreach.config.check import _culprit

    given = ["train_overrides=[aggregate.rollout_seeds=[1,2]]", "out=/tmp/x"]
    message = "no viable alternative at input '[aggregate.rollout_seeds='"
    assert _culprit(ValueError(message), given) == given[0]  # it does not parse on its own
    # a well-formed override is named by its whole key only: 'out' inside 'rollout' does not count
    assert _culprit(ValueError("Could not override 'aggregate.rollout'"), ["out=1", "aggregate.rollout=2"]) == \
        "aggregate.rollout=2"


def test_unquoted_overrides_inside_a_list_get_a_hint(tmp_path):
    res = run(["recipes", "train_overrides=[trainer.max_epochs=5]"], tmp_path)
    assert res.returncode == 2
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("coreach: error: option train_overrides=")
    assert 'need quotes: key=["a.b=1","c=2"]' in lines[0]


def test_a_tracking_server_that_does_not_answer_is_one_line(tmp_path):
    """Nobody listens at the configured server: one line within seconds (MLflow's own retries last minutes)."""
    import socket

    with socket.socket() as s:  # a port nobody listens on once closed
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    res = subprocess.run([COREACH, "bundles"], cwd=tmp_path, capture_output=True, text=True, timeout=120,
                         env=cli_env(MLFLOW_TRACKING_URI=f"http://127.0.0.1:{port}"))  # fmt: skip
    assert res.returncode == 2, res.stderr
    (line,) = res.stderr.strip().splitlines()
    assert line == (f"coreach: error: tracking server http://127.0.0.1:{port}: does not answer (after retries); "
                    "start it, or check tracking.uri / COREACH_TRACKING_URI / MLFLOW_TRACKING_URI")  # fmt: skip


def test_cfg_job_prints_only_the_composed_config(tmp_path):
    """`coreach train --cfg job` prints the config as YAML (Hydra) and nothing after it: the output parses."""
    import yaml  # PyYAML, installed with hydra-core

    res = subprocess.run([COREACH, "train", "model=vae", "--cfg", "job"], cwd=tmp_path, capture_output=True,
                         text=True, env=cli_env(), timeout=120)  # fmt: skip
    assert res.returncode == 0, res.stderr
    cfg = yaml.safe_load(res.stdout)
    assert cfg["model"]["_target_"].endswith("VAE") or "vae" in str(cfg["model"]).lower(), cfg["model"]
    assert not (tmp_path / "mlflow.db").exists()  # nothing ran


def test_every_command_finds_the_store_the_same_way(tmp_path, monkeypatch):
    """tracking.uri / --uri, else COREACH_TRACKING_URI (what the robot's fetch reads too), else
    MLFLOW_TRACKING_URI, else ./mlflow.db; a plain path to a sqlite file means that file."""
    from coreach.tracking import resolve_uri

    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("COREACH_TRACKING_URI", raising=False)
    monkeypatch.delenv("MLFLOW_TRACKING_URI", raising=False)
    assert resolve_uri(None) == f"sqlite:///{tmp_path / 'mlflow.db'}"
    monkeypatch.setenv("MLFLOW_TRACKING_URI", "http://mlflow-var:5000")
    assert resolve_uri(None) == "http://mlflow-var:5000"
    monkeypatch.setenv("COREACH_TRACKING_URI", "http://coreach-var:5000")
    assert resolve_uri(None) == "http://coreach-var:5000"
    assert resolve_uri("http://given:5000") == "http://given:5000"
    assert resolve_uri("./lab.db") == f"sqlite:///{tmp_path / 'lab.db'}"
    (tmp_path / "store.sqlite").write_bytes(b"")
    assert resolve_uri("store.sqlite") == f"sqlite:///{tmp_path / 'store.sqlite'}"


def test_compare_takes_a_plain_sqlite_path(workdir):
    """`coreach compare --uri ./mlflow.db` reads that file (was: MLflow refused a URI without a scheme)."""
    res = subprocess.run([COREACH, "train", "model=linear", *SMALL], cwd=workdir, capture_output=True, text=True,
                         env=cli_env(), timeout=600)  # fmt: skip
    assert res.returncode == 0, res.stderr
    res = subprocess.run([COREACH, "--json", "compare", "--uri", "./mlflow.db", "--out", "cmp"], cwd=workdir,
                         capture_output=True, text=True, env=cli_env(), timeout=300)  # fmt: skip
    assert res.returncode == 0, res.stderr
    assert (workdir / "cmp" / "leaderboard.csv").is_file()
