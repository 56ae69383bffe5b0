"""The world the arm moves in: scene bodies from YAML and their refusals, the demonstrator around a board, the
dataset refusal, check-reach's corridor, vetting's contact counts and the filter's separation guarantee.

Distances are coreach.control.bodies' (checked against coal in tests/test_bodies_coal.py); the runtime's
guarantee is checked against coal directly in tests/test_separation_runtime.py."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
import yaml
from hypothesis import given, settings
from hypothesis import strategies as st

import coreach.demonstrator as demonstrator
from coreach.config.compose import read_yaml_file
from coreach.errors import ConfigError, DataError
from coreach.world.reach_check import check_reach
from coreach.release.gate import Thresholds, separation_gates
from coreach.control.separation import row_thresholds
from coreach.safety import SEPARATION, SafetyLimits
from coreach.world.scenario import Scenario, load_scenario
from coreach.vetting.loop import rollout
from coreach.vetting.separation_metrics import separation_summary
from coreach.vetting.suite import suite_from_dict
from coreach.world.scene_arm import arm_world, check_episodes_clear
from coreach.control.belief_model import BoltzmannGoalBelief
from coreach_plugins.interface.direct import DirectControl
from coreach.world.urdf_arm import UrdfArm

ROBOT = UrdfArm()
COREACH = str(Path(sys.executable).parent / "coreach")
# the shipped scene's data as a lab's own scene file holds it (read_yaml_file drops the config-group header)
SHELF = read_yaml_file(Path(__file__).resolve().parents[1] / "conf/coreach_conf/scenario/bedside_shelf.yaml", "scenario")
# One goal behind a board that stands across the straight way from the home tool position (0.35, 0, 0.27):
# the straight tool segment passes 2 mm from the board, so the gripper cannot take it.
BOARD = {"name": "board_test", "dt": 0.1, "jitter": 0.0, "clearance": 0.02,
         "goals": [{"name": "cup", "position": [0.62, 0.0, 0.05], "approach_rpy_deg": [0, 180, 0],
                    "fine_motion": [0.0, 0.0, -0.03]}],
         "obstacles": [{"name": "board", "shape": "box", "size": [0.02, 0.40, 0.36], "xyz": [0.47, 0.0, -0.03]}]}


def _scene(d: dict) -> Scenario:
    return Scenario.from_dict(d, "test-scene.yaml")


def _with(**changes) -> dict:
    d = yaml.safe_load(yaml.safe_dump(SHELF))
    d.update(changes)
    return d


def _obstacle(**changes) -> dict:
    return {"name": "crate", "shape": "box", "size": [0.1, 0.1, 0.1], "xyz": [0.3, -0.5, 0.3], **changes}


# ------------------------------------------------------------------------------------------ scene file
@pytest.mark.parametrize("obstacle, where, problem", [
    (_obstacle(size=[0.1, 0.0, 0.1]), "obstacles[9].size", "positive"),
    (_obstacle(size=[0.1, -0.2, 0.1]), "obstacles[9].size", "positive"),
    (_obstacle(shape="cone"), "obstacles[9].shape", "unknown shape 'cone'"),
    (_obstacle(xyz=[0.3, float("nan"), 0.3]), "obstacles[9].xyz", "finite"),
    (_obstacle(rpy_deg=[0.0, float("inf"), 0.0]), "obstacles[9].rpy_deg", "finite"),
    (_obstacle(size=[0.1, 0.1]), "obstacles[9].size", "3 numbers"),
    (_obstacle(colour="red"), "obstacles[9].colour", "unknown option"),
    (_obstacle(name="bottle"), "obstacles[9].name", "duplicate"),
])  # fmt: skip
def test_a_malformed_body_is_refused_naming_the_field(obstacle, where, problem):
    d = _with(obstacles=SHELF["obstacles"] + [obstacle])
    with pytest.raises(ConfigError) as e:
        _scene(d)
    assert where in e.value.where and problem in e.value.problem


def test_a_goal_inside_furniture_or_the_keep_out_zone_is_refused():
    inside = _obstacle(name="crate", xyz=[0.60, -0.22, 0.06], size=[0.2, 0.2, 0.2])  # around the bottle
    with pytest.raises(ConfigError, match="inside obstacle crate") as e:
        _scene(_with(obstacles=SHELF["obstacles"] + [inside]))
    assert "goal bottle" in e.value.where
    person = yaml.safe_load(yaml.safe_dump(SHELF["person"]))
    # the head 10 cm above the lamp switch: inside its 0.18 m keep-out zone, not inside the head itself
    person["bodies"][0]["xyz"] = [0.56, 0.24, 0.40 + 0.11]
    with pytest.raises(ConfigError, match="keep-out zone") as e:
        _scene(_with(person=person))
    assert "goal lamp_switch" in e.value.where


def test_person_bodies_are_capsules_and_spheres_with_checked_terms():
    person = yaml.safe_load(yaml.safe_dump(SHELF["person"]))
    person["bodies"].append({"name": "chair", "shape": "box", "size": [0.4, 0.4, 0.4], "xyz": [-0.6, 0.6, 0.0]})
    with pytest.raises(ConfigError, match="unknown shape 'box'"):
        _scene(_with(person=person))
    with pytest.raises(ConfigError, match=r"person\.speed"):
        _scene(_with(person={**SHELF["person"], "speed": -1.0}))


def test_keep_out_distance_follows_the_iso_ts_15066_terms():
    s = load_scenario("bedside_shelf").separation
    # K = v_h (T_r + T_s) + C + Z_d + Z_r = 0.5 (0.1 + 0.2) + 0 + 0.02 + 0.01 (the formula in
    # coreach.control.separation, ISO/TS 15066 speed and separation monitoring, with v_r = 0)
    assert s.keep_out == pytest.approx(0.18, abs=1e-12)
    # reduced-speed zone: where (S - K) / (T_r + T_s / 2) reaches the 0.25 m/s cap: K + 0.25 * 0.2
    assert s.reduced_zone(0.25) == pytest.approx(0.23, abs=1e-12)


def test_a_person_zone_over_the_arm_base_is_refused():
    person = yaml.safe_load(yaml.safe_dump(SHELF["person"]))
    person["bodies"][1]["xyz"] = [-0.15, 0.15, 0.155]  # the torso 0.21 m from the base: inside the 0.23 m zone
    with pytest.raises(ConfigError, match="reaches the arm's base"):
        arm_world(ROBOT, _scene(_with(person=person)))


def test_bad_scene_on_the_command_line_is_one_line(tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_text(yaml.safe_dump(_with(obstacles=[_obstacle(size=[0.1, 0.0, 0.1])])))
    res = subprocess.run([COREACH, "check-reach", f"scene={bad}"], capture_output=True, text=True, cwd=tmp_path,
                         timeout=120)  # fmt: skip
    assert res.returncode == 2
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and "obstacles[0].size" in lines[0] and "Traceback" not in res.stderr


# ------------------------------------------------------------------------------------------ the demonstrator
def _contacts(world, q: np.ndarray) -> tuple[float, float]:
    geo = world.geometry(q, grad=False)
    return float(np.asarray(geo.body_d).min()), float(np.asarray(geo.self_d).min())


def test_demonstrator_goes_around_a_board_across_the_straight_path(monkeypatch):
    scene = _scene(BOARD)
    world = arm_world(ROBOT, scene)
    r = demonstrator.rollout(ROBOT, scene, 8, seed=0, noise=0.0, max_steps=150)
    assert bool(r.completed.all())
    steps = np.arange(r.q.shape[1])[None] < r.lengths.numpy()[:, None]
    board, links = _contacts(world, r.q.numpy()[steps])
    assert board >= scene.separation.clearance - 1e-9 and links >= scene.separation.clearance - 1e-9
    # without the detour the filter holds the arm at the board's clearance and no episode gets there
    monkeypatch.setattr(demonstrator, "detour_points",
                        lambda w, a, b: torch.full((a.shape[0], 2, 3), float("nan"), dtype=torch.float64))
    stuck = demonstrator.rollout(ROBOT, scene, 4, seed=0, noise=0.0, max_steps=150)
    assert not bool(stuck.completed.any())
    steps = np.arange(stuck.q.shape[1])[None] < stuck.lengths.numpy()[:, None]
    # the rule bounds a linear look-ahead: the arc a link really travels can end a few micrometres closer
    assert _contacts(world, stuck.q.numpy()[steps])[0] >= scene.separation.clearance - 1e-3


def test_a_dataset_with_a_touching_episode_is_refused_naming_goal_share_and_body():
    scene = _scene(BOARD)
    home = ROBOT.q_home.double().numpy()
    # an episode that swings the arm through the board (no filter): the shoulder leans forward, the elbow
    # opens and the wrist bends, and the gripper ends 5 cm inside it (measured with the sphere model)
    through = np.stack([home + t * np.array([0, 0.9, 0, -0.4, 0, 0.3, 0]) for t in np.linspace(0.0, 1.0, 30)])
    clean = np.repeat(home[None], 30, axis=0)
    with pytest.raises(DataError) as e:
        check_episodes_clear(ROBOT, scene, [clean, through, clean, clean], ["cup"] * 4, "demonstrations")
    assert "goal cup" in e.value.where and "25.0%" in e.value.problem and "board" in e.value.problem
    check_episodes_clear(ROBOT, scene, [clean, clean], ["cup"] * 2, "demonstrations")  # clear: no error


# ------------------------------------------------------------------------------------------ check-reach
def test_check_reach_refuses_an_approach_through_furniture():
    d = yaml.safe_load(yaml.safe_dump(BOARD))
    d["obstacles"] = [{"name": "lid", "shape": "box", "size": [0.2, 0.2, 0.02], "xyz": [0.62, 0.0, 0.16]}]
    rows = check_reach(ROBOT, _scene(d))  # the lid 11 cm above the cup, across its downward approach
    assert not rows[0].reachable and not rows[0].open_approach and rows[0].blocked_by == "lid"
    assert rows[0].approach_reachable  # the pose itself is solvable: the corridor is what refuses it
    assert check_reach(ROBOT, _scene(BOARD))[0].reachable


# ------------------------------------------------------------------------------------------ vetting
def _suite(scene_path: Path, **over):
    d = dict(scenario=str(scene_path), operator={"_target_": "coreach_plugins.operator.boltzmann.BoltzmannOperator",
             "greedy": True}, episodes=2, seed=12345, horizon_s=2.0, start_jitter=0.0)  # fmt: skip
    d.update(over)
    return suite_from_dict(d, "test-suite.yaml")


def test_vetting_counts_a_constructed_contact_and_the_gate_refuses_it(tmp_path):
    # a crate around the elbow's home position (0.01, 0, 0.57): every episode starts with links inside it
    d = yaml.safe_load(yaml.safe_dump(BOARD))
    d["obstacles"] = [{"name": "crate", "shape": "box", "size": [0.2, 0.2, 0.2], "xyz": [0.0, 0.0, 0.58]}]
    path = tmp_path / "crate.yaml"
    path.write_text(yaml.safe_dump(d))
    suite = _suite(path)
    limits = SafetyLimits.for_robot(ROBOT, lookahead_s=0.1)
    record = rollout(ROBOT, DirectControl(), suite.build_operator(), suite, BoltzmannGoalBelief(), limits,
                     suite.generator())  # fmt: skip
    sep = separation_summary(record)
    x = record.extras
    assert sep["all"]["contact_episodes"] == record.n_episodes
    assert sep["all"]["contact_steps"] == int((x["sep_furniture"] < 0).sum()) > 0
    assert sep["all"]["min_furniture_m"] < 0
    gates = {g.name: g for g in separation_gates("s", sep, Thresholds(0, 0, 0, 0, 1e-5, 1e9))}
    assert not gates["contacts[s]"].passed and not gates["separation[s]"].passed
    # the same arm in the board scene starts clear and the filter keeps it so
    path2 = tmp_path / "board.yaml"
    path2.write_text(yaml.safe_dump(BOARD))
    suite = _suite(path2)
    record = rollout(ROBOT, DirectControl(), suite.build_operator(), suite, BoltzmannGoalBelief(), limits,
                     suite.generator())  # fmt: skip
    sep = separation_summary(record)
    assert sep["all"]["contact_steps"] == 0 and sep["all"]["keep_out_steps"] == 0
    assert all(g.passed for g in separation_gates("s", sep, Thresholds(0, 0, 0, 0, 1e-5, 1e9)))


def test_vetting_without_bodies_records_no_separation():
    suite = suite_from_dict(dict(scenario="bedside_shelf", episodes=1, horizon_s=1.0, seed=12345), "s.yaml")
    limits = SafetyLimits.for_robot(ROBOT, lookahead_s=0.1)
    record = rollout(ROBOT, DirectControl(), suite.build_operator(), suite, BoltzmannGoalBelief(), limits,
                     suite.generator(), world=False)  # fmt: skip
    assert separation_summary(record) is None


# ------------------------------------------------------------------------------------------ the filter
SCENE = load_scenario("bedside_shelf")
WORLD = arm_world(ROBOT, SCENE)
LIMITS = SafetyLimits.for_robot(ROBOT, lookahead_s=0.1)


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), scale=st.floats(0.1, 20.0), toward=st.sampled_from(["shelf", "person", "any"]))
def test_no_link_enters_a_body_whatever_the_commands(seed, scale, toward):
    """Property: raw joint commands of any size (here up to 20 times the joint speed limits), with a bias
    toward the shelf, toward the person or none, stepped at 100 Hz through the shared filter: the conservative
    sphere model never enters furniture, another link or the person's keep-out zone."""
    rng = np.random.default_rng(seed)
    n, dt = ROBOT.dof, 0.01
    q = ROBOT.q_home.double().numpy() + rng.uniform(-0.05, 0.05, n)
    bias = {"shelf": np.array([0.0, 1.0, 0.0, -1.0, 0.0, 0.5, 0.0]),
            "person": np.array([1.5, -0.5, 0.0, 0.5, 0.0, 0.0, 0.0]), "any": np.zeros(n)}[toward]  # fmt: skip
    qd_max = ROBOT.qd_max.double().numpy()
    keep_out = SCENE.separation.keep_out
    for _ in range(150):
        raw = (bias + rng.normal(0.0, 1.0, n)) * qd_max * scale
        pos, _, jac = (a[0].numpy() for a in ROBOT.fk_and_jacobian(torch.as_tensor(q[None])))
        qd, flags, _ = LIMITS.limit(q, raw, jac[:3], pos, dt, WORLD.separation(q))
        q = q + qd * dt
        geo = WORLD.geometry(q, grad=False)
        body = np.asarray(geo.body_d)
        assert body[:, ~WORLD.world.is_person].min() >= 0.0
        assert body[:, WORLD.world.is_person].min() >= keep_out - 1e-3
        assert np.asarray(geo.self_d).min() >= 0.0


def test_filter_flags_the_separation_step_and_only_scales():
    board = arm_world(ROBOT, _scene(BOARD))  # the gripper starts 11 cm in front of the board
    q = ROBOT.q_home.double().numpy()
    pos, _, jac = (a[0].numpy() for a in ROBOT.fk_and_jacobian(torch.as_tensor(q[None])))
    # the tool straight at the board, fast: the step must scale the command, keep its direction, and flag it
    raw = np.linalg.pinv(jac[:3]) @ np.array([2.0, 0.0, 0.0])
    limits = SafetyLimits(qd_max=(100.0,) * 7, tcp_speed_max=100.0, lookahead_s=0.1)  # only the separation acts
    qd, flags, _ = limits.limit(q, raw, jac[:3], pos, 0.01, board.separation(q))
    assert flags == SEPARATION
    ratio = qd / raw
    assert np.allclose(ratio, ratio[0]) and 0.0 <= ratio[0] < 1.0
    # after the step the look-ahead of the closing pair is exactly at the clearance (the rule's equality)
    geo = board.geometry(q)
    rate = -(np.asarray(geo.g) @ qd)
    d_p, tau = row_thresholds(board.world, geo, 0.1, np, q)
    assert np.min(np.asarray(geo.d) - d_p - rate * tau) == pytest.approx(0.0, abs=1e-12)


def test_no_rows_to_check_leaves_the_command_alone():
    """An arm far from every body with no self pairs (e.g. three moving links): nothing to check, no crash."""
    from coreach.control.separation import World

    lone = World([], [], ROBOT.link_model(0.02).radii, SCENE.separation)  # no bodies, no self pairs
    q = ROBOT.q_home.double().numpy()
    centres, jac = WORLD.spheres(q)
    qd = np.full(7, 0.3)
    for like in (np.asarray, lambda a: torch.as_tensor(a)):
        out, held = SafetyLimits.keep_apart(like(qd), lone, like(centres), like(jac), 0.1)
        assert np.allclose(np.asarray(out), qd) and not bool(held)


def test_a_bundle_ships_the_world_every_gate_suite_vetted_in(tmp_path):
    from coreach.release.metadata import world_of_suites

    d = yaml.safe_load(yaml.safe_dump(SHELF))
    d["obstacles"] = d["obstacles"][:-1]  # the same shelf without the mount
    (tmp_path / "other.yaml").write_text(yaml.safe_dump(d))
    same = [suite_from_dict(dict(scenario="bedside_shelf", episodes=1, seed=12345), f"s{i}.yaml") for i in range(2)]
    assert world_of_suites(ROBOT, same)["obstacles"][-1]["name"] == "arm_mount"
    other = suite_from_dict(dict(scenario=str(tmp_path / "other.yaml"), episodes=1, seed=12345), "o.yaml")
    with pytest.raises(ConfigError, match="other bodies"):
        world_of_suites(ROBOT, [same[0], other])
