"""Joint trajectories of vetting episodes as Parquet: a real (tiny) rollout read back value for value, and the
`coreach vet trajectories=true` option end to end in the test process (file, JSON, terminal tables, report)."""

from __future__ import annotations

import json

import numpy as np
import pyarrow.parquet as pq
import pytest
import torch
import yaml

from coreach.control.safety_filter import SEPARATION
from coreach.safety import SafetyLimits
from coreach.vetting.loop import rollout
from coreach.vetting.suite import suite_from_dict
from coreach.vetting.trajectories import write_trajectories
from coreach.control.belief_model import BoltzmannGoalBelief
from coreach_plugins.interface.direct import DirectControl
from coreach.world.urdf_arm import UrdfArm

# 2 episodes of 2 s (20 steps): enough to move, small enough for a second
TINY = dict(scenario="bedside_shelf", episodes=2, seed=12345, horizon_s=2.0,
            operator={"_target_": "coreach_plugins.operator.boltzmann.BoltzmannOperator", "greedy": True})  # fmt: skip


@pytest.fixture(scope="module")
def tiny_record():
    robot = UrdfArm()
    suite = suite_from_dict(dict(TINY), "tiny.yaml")
    return rollout(robot, DirectControl(), suite.build_operator(), suite, BoltzmannGoalBelief(beta=40.0),
                   SafetyLimits.for_robot(robot), suite.generator())  # fmt: skip


def test_parquet_reads_back_the_record(tiny_record, tmp_path):
    rec = tiny_record
    ex = rec.extras
    E, T1, n = ex["q"].shape
    path = write_trajectories({"direct": rec, "again": rec}, tmp_path / "traj.parquet")
    assert [p.name for p in tmp_path.iterdir()] == ["traj.parquet"]  # the temporary file was renamed
    table = pq.read_table(path)
    assert table.num_rows == 2 * E * T1
    df = table.to_pandas()
    one = df[df["interface"] == "direct"].sort_values(["episode", "step"])
    assert one["episode"].tolist() == [e for e in range(E) for _ in range(T1)]
    assert one["step"].tolist() == list(range(T1)) * E
    np.testing.assert_allclose(one["t"].to_numpy(), np.tile(np.arange(T1) * rec.dt, E))
    q = one[[f"q_{j}" for j in range(n)]].to_numpy().reshape(E, T1, n)
    assert np.array_equal(q, ex["q"].numpy())  # bit for bit: float64 in, float64 out
    qd = one[[f"qd_{j}" for j in range(n)]].to_numpy().reshape(E, T1, n)
    assert np.array_equal(qd[:, :-1], ex["qd"].numpy()) and np.isnan(qd[:, -1]).all()
    assert float(np.abs(qd[:, :-1]).max()) > 0  # the arm moved: a zero table would pass the rest too
    tool = one[["tool_x", "tool_y", "tool_z"]].to_numpy().reshape(E, T1, 3)
    assert np.array_equal(tool, rec.ee_path.numpy())
    for key in ("sep_furniture", "sep_person", "sep_self"):
        assert np.array_equal(one[key].to_numpy().reshape(E, T1), ex[key].numpy())
    names = rec.goal_names
    assert one.groupby("episode")["goal_final"].first().tolist() == [names[int(g)] for g in rec.goal_final]
    assert one.groupby("episode")["goal_initial"].first().tolist() == [names[int(g)] for g in rec.goal_initial]
    held = one["separation_held"].to_numpy().reshape(E, T1)
    assert list(held[:, :-1].ravel()) == list(((ex["limits"] & SEPARATION) > 0).numpy().ravel())
    assert all(v is None or v != v for v in held[:, -1])  # null: the last row has no command
    excess = table.column("person_excess").to_pylist()
    assert excess[T1 - 1] is None and excess[0] is False
    assert "rad" in json.loads(table.schema.metadata[b"coreach.units"])["q_*"]


def test_vet_option_writes_the_file_and_names_it(workdir, capsys):
    from coreach.commands.summaries import print_summary
    from coreach.config.check import compose_config
    from coreach.vetting.stage import vet

    assert compose_config("vet", [])["trajectories"] is False  # off unless asked
    # the stage first checks the demonstrator reaches every goal within the horizon: 10 s does (100 steps)
    small = dict(TINY, horizon_s=10.0)
    (workdir / "tiny.yaml").write_text(yaml.safe_dump(small))
    cfg = compose_config("vet", ["candidates=[direct]", f"suite={workdir / 'tiny.yaml'}", "log=false",
                                 "report_dir=rep", "trajectories=true"])  # fmt: skip
    result = vet(cfg)
    path = workdir / "rep" / "trajectories.parquet"
    assert result["trajectories"] == str(path.resolve())
    table = pq.read_table(path)
    assert table.num_rows == 2 * 101 and set(table.column("interface").to_pylist()) == {"direct"}
    assert not [p for p in (workdir / "rep").iterdir() if p.suffix == ".tmp"]

    print_summary("vet", [result], as_json=True)
    out = json.loads(capsys.readouterr().out)
    assert out["trajectories"] == str(path.resolve())
    sep = out["summaries"]["direct"]["separation"]
    assert sep["world"]["keep_out"] > 0 and sep["all"]["episodes"] == 2
    assert set(sep["per_goal"]) <= set(out["summaries"]["direct"]["goal_names"])

    print_summary("vet", [result], as_json=False)
    text = capsys.readouterr().out
    assert "separation from the scene's bodies" in text and "separation per final goal" in text
    assert f"joint trajectories: {path.resolve()}" in text
    page = (workdir / "rep" / "report.html").read_text(encoding="utf-8")
    assert "Separation from the scene" in page and 'alt="scene-paths-direct"' in page
    assert (workdir / "rep" / "scene-paths-direct.png").is_file()
    # the file's joint positions are the run's: step 0 is each episode's start, the plan the suite's generator
    # draws first (the same draw the loop makes)
    suite = suite_from_dict(small, "tiny.yaml")
    start = suite.episodes_plan(suite.generator(), UrdfArm()).q_start.to(torch.float64).numpy()
    df = table.to_pandas()
    first = df[df["step"] == 0].sort_values("episode")[[f"q_{j}" for j in range(7)]].to_numpy()
    np.testing.assert_allclose(first, start, rtol=0, atol=1e-12)
