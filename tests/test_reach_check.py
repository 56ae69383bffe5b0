"""The arm against a scene before data is made (coreach.world.reach_check, `coreach check-reach`).

Outside reference: the geometry of the shipped arm as its URDF writes it (shoulder centre 0.18 m above the
base, 0.92 m from the shoulder centre to the tool point when stretched): a point farther than that from the
shoulder is out of reach for any orientation (triangle inequality), one well inside is within reach."""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from coreach.world.reach_check import ReachOptions, check_reach, suggest_base_shift
from coreach.world.scenario import Goal, Scenario, load_scenario
from coreach.world.urdf_arm import UrdfArm
from test_cli import run

SHOULDER = np.array([0.0, 0.0, 0.18])
REACH = 0.92
ROBOT = UrdfArm()
FAST = ReachOptions(starts=6, iterations=120, shift_range=0.3, shift_step=0.15)


def _scene(*positions) -> Scenario:
    goals = [Goal(f"g{i}", list(p), [0.0, 90.0, 0.0], [0.03, 0.0, 0.0]) for i, p in enumerate(positions)]
    return Scenario(name="test", goals=goals, jitter=0.0, dt=0.1)


def test_shipped_scene_is_reachable_with_margin():
    rows = check_reach(ROBOT, load_scenario("bedside_shelf"), FAST)
    assert [r.goal for r in rows] == load_scenario("bedside_shelf").goal_names
    for r in rows:
        assert r.reachable and r.approach_error_m < 0.002
        assert r.limit_margin_rad > 0.1 and r.manipulability > 0.05


def test_beyond_the_stretched_arm_is_out_of_reach():
    far = SHOULDER + np.array([1.0, 0.0, 0.0]) * (REACH + 0.15)
    near = SHOULDER + np.array([0.55, 0.1, 0.1])
    rows = check_reach(ROBOT, _scene(far, near), FAST)
    assert not rows[0].approach_reachable and math.isnan(rows[0].limit_margin_rad)
    assert rows[0].approach_error_m >= 0.15 - 0.02  # no solution gets closer than the geometry allows
    assert rows[1].reachable


def test_suggested_shift_brings_the_goal_inside_the_arm_sphere():
    far = SHOULDER + np.array([REACH + 0.15, 0.0, 0.0])
    shift, margin = suggest_base_shift(ROBOT, _scene(far), FAST)
    moved = far - np.array(shift)
    assert np.linalg.norm(moved - SHOULDER) < REACH  # the goal as the moved base sees it
    assert margin > 0.0
    placed = dataclasses.replace(_scene(moved))
    assert all(r.reachable for r in check_reach(ROBOT, placed, FAST))


def test_command_verdicts(tmp_path):
    scene = tmp_path / "far.yaml"
    scene.write_text("name: far\njitter: 0.0\ngoals:\n  - name: far_bottle\n    position: [1.05, 0.0, 0.3]\n"
                     "    approach_rpy_deg: [0, 90, 0]\n    fine_motion: [0.03, 0, 0]\n")  # fmt: skip
    out = run(["check-reach", f"scene={scene}", "reach.starts=4", "reach.shift_step=0.15"], cwd=tmp_path)
    assert out.returncode == 3, out.stderr
    assert "out of reach: far_bottle" in out.stdout and "suggested placement: move the base by" in out.stdout
    bad = run(["check-reach", "reach.starts=many"], cwd=tmp_path)
    assert bad.returncode == 2 and bad.stderr.count("\n") == 1
