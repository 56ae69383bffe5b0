"""Closed-loop data aggregation: labels from the demonstrator's velocity law, visited states, one round end to end,
and one-line refusals that leave nothing in the dataset cache."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
from conftest import FAST, cli_env
from mlflow.tracking import MlflowClient

from coreach.aggregation.visits import Visits
from coreach.demonstrator import rollout as scripted
from coreach.episodes import load_parquet
from coreach_plugins.labeller.scripted import ScriptedLabeller
from test_demonstrator import PlanarArm, flat_scenario

COREACH = str(Path(sys.executable).parent / "coreach")
TINY = ["dataset.episodes=40", *FAST, "aggregate.rollout.episodes=2", "aggregate.rollout.horizon_s=8.0"]


def run(args, cwd):
    return subprocess.run([COREACH, *args], cwd=cwd, capture_output=True, text=True, env=cli_env(), timeout=600)


def test_scripted_labels_equal_the_noise_free_demonstrators_action():
    """The labeller and the demonstrator share one velocity law: at the first step of noise-free
    demonstrations (approach phase) the label is exactly the recorded action."""
    arm, sc = PlanarArm(), flat_scenario()
    demo = scripted(arm, sc, 6, seed=4, noise=0.0)
    q = demo.q[:, 0]
    pos, rot = arm.fk(q)
    E = q.shape[0]
    visits = Visits(q=q, ee_pos=pos, ee_rot=rot, goal=demo.goals, fine_phase=torch.zeros(E, dtype=torch.bool),
                    targets=demo.layout.targets, goal_rot=demo.layout.approach_rot, episode=torch.arange(E),
                    step=torch.zeros(E, dtype=torch.long), dt=demo.dt)  # fmt: skip
    labels = ScriptedLabeller().label(arm, visits)
    torch.testing.assert_close(labels, demo.qd[:, 0], atol=1e-12, rtol=0)
    # in the fine phase the label heads along the fine motion instead
    fine = ScriptedLabeller().label(arm, Visits(**{**visits.__dict__, "fine_phase": torch.ones(E, dtype=torch.bool)}))
    assert not torch.allclose(fine, labels)


@pytest.mark.parametrize(
    "override, expected",
    [
        ("aggregate.rollout_seeds=[]", "option aggregate.rollout_seeds: expected a non-empty list"),
        ("aggregate.start_run=0123456789abcdef0123456789abcdef", "is not a trained decoder"),
        ("aggregate.rollout.layout_offset=[0.6,0.0,0.0]", "out of reach"),
    ],
)
def test_bad_input_is_one_line_exit_2_and_writes_no_dataset(workdir, override, expected):
    res = run(["aggregate", *TINY, override], workdir)
    assert res.returncode == 2, res.stderr
    lines = [ln for ln in res.stderr.strip().splitlines() if ln.startswith("coreach: error")]
    assert len(lines) == 1 and expected in lines[0], res.stderr
    assert "Traceback" not in res.stderr
    assert not (workdir / "data" / "aggregate").exists()


@pytest.mark.slow
def test_one_round_adds_labelled_closed_loop_states_and_records_the_lineage(workdir):
    res = run(["--json", "aggregate", *TINY, "aggregate.rollout_seeds=[3]"], workdir)
    assert res.returncode == 0, res.stderr
    (summary,) = json.loads(res.stdout)["runs"]
    first, second = summary["rounds"]
    assert summary["run_id"] == second["run_id"] != first["run_id"]
    added = second["added"]
    assert second["episodes"] == first["episodes"] + added["episodes"] and added["states"] > 0
    # the summary carries the last round's training figures, as `coreach train` reports them
    assert summary["val_loss"] == pytest.approx(second["val_loss"]) and summary["epochs"] >= 1
    assert "val/reconstruction" in summary["metrics"]

    client = MlflowClient(f"sqlite:///{workdir / 'mlflow.db'}")
    parent = client.get_run(summary["parent_run"])
    assert parent.data.tags["coreach.stage"] == "aggregate" and parent.info.status == "FINISHED"
    assert parent.data.tags["coreach.source_run"] == summary["run_id"]
    history = client.get_metric_history(parent.info.run_id, "aggregate/success")
    assert sorted(m.step for m in history) == [0, 1]
    tags = client.get_run(second["run_id"]).data.tags
    assert tags["coreach.aggregate.parent"] == parent.info.run_id and tags["coreach.aggregate.round"] == "1"
    assert tags["coreach.aggregate.previous"] == first["run_id"]
    assert tags["coreach.dataset_sha256"] == second["dataset"] != first["dataset"]

    # the added episodes are the visited states, labelled with the demonstrator's velocity law
    from coreach.world.urdf_arm import UrdfArm

    data = load_parquet(second["path"])
    new = [e for e in data if e.episode_id >= 1_000_000]
    assert len(new) == added["episodes"] and sum(len(e) for e in new) == added["states"]
    arm = UrdfArm()
    e = new[0]
    pos, _ = arm.fk(torch.as_tensor(e.q))
    np.testing.assert_allclose(e.ee_pos, pos.double().numpy(), atol=1e-9)
    assert np.abs(e.qd).max() <= float(arm.qd_max.max()) + 1e-9


def test_table_output_names_every_round_and_how_to_vet_the_result():
    from rich.console import Console

    from coreach.commands.summaries import print_aggregate

    summary = {"label": "cvae", "parent_run": "p" * 32, "run_id": "b" * 32, "rounds": [
        {"round": 0, "run_id": "a" * 32, "episodes": 40, "score": {"success": 0.25, "episodes": 16}},
        {"round": 1, "run_id": "b" * 32, "episodes": 56, "added": {"episodes": 16, "states": 3200},
         "score": {"success": 0.5, "episodes": 16}},
    ]}  # fmt: skip
    console = Console(record=True, width=250)
    print_aggregate(console, summary)
    text = console.export_text()
    assert "a" * 32 in text and "3200" in text and "0.25 (n=16)" in text and "0.50 (n=16)" in text
    assert f"candidates=[{'b' * 32},direct,blend]" in text


@pytest.mark.slow
def test_a_start_run_gives_its_recipe_to_every_round(workdir):
    """From `aggregate.start_run`, rounds retrain the start run's model, loss and data (its logged config), not
    the command's defaults; setting one of those on the command line as well is refused in one line."""
    res = run(["--json", "train", "model=vae", "dataset.episodes=30", *FAST, "label=start-vae"], workdir)
    assert res.returncode == 0, res.stderr
    start = json.loads(res.stdout)["runs"][0]["run_id"]
    rollout = ["aggregate.rollout.episodes=2", "aggregate.rollout.horizon_s=8.0", "aggregate.rollout_seeds=[3]"]
    clash = run(["aggregate", f"aggregate.start_run={start}", "model=linear", *rollout], workdir)
    assert clash.returncode == 2, clash.stderr
    (line,) = clash.stderr.strip().splitlines()
    assert "the command line also sets model" in line, line
    res = run(["--json", "aggregate", f"aggregate.start_run={start}", *rollout], workdir)
    assert res.returncode == 0, res.stderr
    (summary,) = json.loads(res.stdout)["runs"]
    first, second = summary["rounds"]
    assert first["run_id"] == start and first["episodes"] == 30  # the start run's dataset, not the default's
    assert summary["label"] == "start-vae"
    client = MlflowClient(f"sqlite:///{workdir / 'mlflow.db'}")
    params = {k: client.get_run(r).data.params for k, r in (("start", start), ("round", second["run_id"]))}
    model_keys = [k for k in params["start"] if k.startswith("model.")]
    assert model_keys and all(params["round"].get(k) == params["start"][k] for k in model_keys)
