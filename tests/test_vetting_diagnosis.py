"""Failure diagnosis: one cause per failed episode on constructed episodes (a stuck arm, an oscillating one, one
held by a joint limit, ...), per goal x switch cell success against scipy's Wilson interval, and causes read
from real closed-loop rollouts of interfaces built to fail in a known way."""

from __future__ import annotations

import math
import re

import pytest
import torch
from scipy.stats import binomtest

from coreach.control.belief_model import BoltzmannGoalBelief
from coreach.world.urdf_arm import UrdfArm
from coreach.safety import SafetyLimits
from coreach.vetting.diagnosis import CAUSES, DiagnosisRules, diagnose, flat_diagnosis
from coreach.vetting.loop import JOINT_LIMIT, SEPARATION, SPEED_CAP, rollout
from coreach.vetting.metrics import summarise
from coreach.vetting.records import RolloutRecord
from coreach.vetting.suite import suite_from_dict

DT, T = 0.1, 100
APPROACH = torch.tensor([1.0, 0.0, 0.0], dtype=torch.float64)
FINE_END = torch.tensor([1.1, 0.0, 0.0], dtype=torch.float64)
TOL = 0.02


def _line(start, step, n=T + 1):
    """Positions [n, 3] from `start`, moving by `step` (m) per control step."""
    return torch.as_tensor(start, dtype=torch.float64) + torch.arange(n, dtype=torch.float64)[:, None] * torch.as_tensor(
        step, dtype=torch.float64
    )


def _record(paths, *, success=None, phase1=None, limits=None, reach=None, switch=None, goal_final=None):
    """A RolloutRecord of one-goal-layout episodes (two goals named a, b at the same place) from tool paths."""
    E = len(paths)
    path = torch.stack(paths)  # [E, T+1, 3]
    success = torch.zeros(E, dtype=torch.bool) if success is None else torch.tensor(success)
    switch_step = torch.full((E,), -1) if switch is None else torch.tensor(switch)
    frac = torch.where(switch_step >= 0, switch_step.double() / T, torch.tensor(float("nan"), dtype=torch.float64))
    goal_final = torch.zeros(E, dtype=torch.long) if goal_final is None else torch.tensor(goal_final)
    phase1 = torch.full((E,), -1) if phase1 is None else torch.tensor(phase1)
    # the operator's waypoint: the approach point before the approach pose, the fine end after
    t = torch.arange(T + 1)[None, :]
    after = (phase1[:, None] >= 0) & (t >= phase1[:, None])
    waypoint = torch.where(after[..., None], FINE_END, APPROACH)
    targets = torch.stack([APPROACH, FINE_END])[None, None].expand(E, 2, 2, 3).clone()
    extras = {
        "goal_targets": targets,
        "phase1_step": phase1,
        "orientation_error": torch.zeros(E, T + 1, dtype=torch.float64),
        "position_tol": TOL,
        "orientation_tol": math.radians(15.0),
        "limits": torch.zeros(E, T, dtype=torch.uint8) if limits is None else limits,
        "reach_goal": torch.ones(E, T, 2, dtype=torch.bool) if reach is None else reach,
    }
    return RolloutRecord(
        interface="constructed", suite="unit", goal_names=["a", "b"], dt=DT, goal_initial=torch.zeros(E, dtype=torch.long),
        goal_final=goal_final, switch_step=switch_step, switch_fraction=frac, success=success,
        success_step=torch.where(success, T // 2, -1), ee_path=path, belief=torch.full((E, T + 1, 2), 0.5, dtype=torch.float64),
        belief_at_switch=torch.full((E,), float("nan"), dtype=torch.float64),
        error=(path - waypoint).norm(dim=-1), limit_scaled=extras["limits"] > 0,
        reachable=extras["reach_goal"].all(-1), stick_gain=torch.full((E, T), 0.5, dtype=torch.float64),
        mode_switches=torch.zeros(E, dtype=torch.long), extras=extras,
    )  # fmt: skip


def _constructed():
    """Nine episodes, each built to show one cause (episode 0 succeeds)."""
    zig = torch.zeros(T + 1, 3, dtype=torch.float64)
    zig[:, 0] = 0.5 + 0.01 * (torch.arange(T + 1) % 2)  # 1 cm back and forth every step,
    zig[:, 1] = 0.002 * torch.arange(T + 1)  # drifting sideways 2 mm per step: path / net about 5
    paths = [
        _line([0.0, 0.0, 0.0], [0.01, 0.0, 0.0]),  # 0 success
        _line([0.3, 0.0, 0.0], [0.0, 0.0, 0.0]),  # 1 stuck: never moves
        zig,  # 2 oscillating
        _line([0.3, 0.0, 0.0], [0.0, 0.001, 0.0]),  # 3 pressed against a joint limit (slow sideways creep)
        _line([0.0, 0.0, 0.0], [0.005, 0.0, 0.0]),  # 4 progressing: 5 cm/s toward the goal, 0.5 m at the end
        _line([0.3, 0.0, 0.0], [-0.003, 0.0, 0.0]),  # 5 no way: drifts back, no stick toward the goal
        _line([0.99, 0.0, 0.0], [0.0, 0.0, 0.003]),  # 6 orientation: at the approach point, never the pose
        _line([1.0, 0.0, 0.0], [0.0, 0.003, 0.0]),  # 7 fine motion: had the approach pose, wanders off
        _line([0.3, 0.0, 0.0], [0.0, 0.003, 0.0]),  # 8 approach: moves, never near the approach point
    ]
    limits = torch.zeros(9, T, dtype=torch.uint8)
    limits[3, :] = JOINT_LIMIT
    limits[4, :] = SPEED_CAP  # capped all the way, still progressing: a speed cap alone is no cause
    reach = torch.ones(9, T, 2, dtype=torch.bool)
    reach[5, :, 0] = False
    phase1 = [-1] * 9
    phase1[0], phase1[7] = 40, 5
    success = [True] + [False] * 8
    return _record(paths, success=success, phase1=phase1, limits=limits, reach=reach)


EXPECTED = ["", "stuck", "oscillating", "limited", "progressing", "no_way", "orientation", "fine_motion", "approach"]


def test_each_constructed_failure_gets_its_cause():
    d = diagnose(_constructed())
    got = {r["episode"]: r["cause"] for r in d["episodes"]}
    assert got == {e: c for e, c in enumerate(EXPECTED) if c}
    assert d["failures"] == 8 and sum(d["causes"].values()) == 8
    assert d["cause_share"]["stuck"] == pytest.approx(1 / 8)
    stages = {r["episode"]: r["stage"] for r in d["episodes"]}
    assert (stages[6], stages[7], stages[8]) == ("position", "approach_pose", "none")
    # the episode pressed against a joint limit crept 1 mm per step: slow, but the limit is what held it
    row3 = next(r for r in d["episodes"] if r["episode"] == 3)
    assert row3["limited_share"] == 1.0 and row3["window_speed_m_s"] == pytest.approx(0.01)
    row4 = next(r for r in d["episodes"] if r["episode"] == 4)
    assert row4["capped_share"] == 1.0


def test_rules_are_thresholds_a_lab_can_move():
    rec = _constructed()
    # a looser oscillation ratio stops calling the zig-zag oscillating: it is then an arm that moves but
    # never nears the approach point; a stricter stuck speed does not outrank the joint limit (rule order)
    d = diagnose(rec, rules={"oscillation_ratio": 10.0, "stuck_speed": 0.05})
    assert next(r for r in d["episodes"] if r["episode"] == 3)["cause"] == "limited"
    assert next(r for r in d["episodes"] if r["episode"] == 2)["cause"] == "approach"
    with pytest.raises(Exception, match="diagnosis.window_s"):
        DiagnosisRules.coerce({"window_s": -1})


def test_window_starts_at_the_goal_switch():
    # stuck for the first 90 steps, then the operator switches to goal b and the arm heads there fast:
    # the window (last 3 s) is clipped to the 10 steps after the switch, so the episode counts as progressing
    path = torch.cat([torch.zeros(91, 3, dtype=torch.float64), _line([0.0, 0.0, 0.0], [0.02, 0.0, 0.0], 11)[1:]])
    path[:, 1] = 0.0
    rec = _record([path], switch=[90], goal_final=[1])
    d = diagnose(rec)
    assert d["episodes"][0]["cause"] == "progressing" and d["episodes"][0]["switch"] == "0.9"


def test_success_per_goal_and_switch_cell_matches_scipy_wilson():
    E = 40
    paths = [_line([0.0, 0.0, 0.0], [0.01, 0.0, 0.0])] * E
    goal_final = [e % 2 for e in range(E)]
    switch = [-1 if e < 20 else 50 for e in range(E)]
    success = [(e % 4 != 3) if e < 20 else (e % 5 == 0) for e in range(E)]
    d = diagnose(_record(paths, success=success, switch=switch, goal_final=goal_final))
    for goal, g in (("a", 0), ("b", 1)):
        for cell, keep in (("none", lambda e: e < 20), ("0.5", lambda e: e >= 20)):
            idx = [e for e in range(E) if keep(e) and goal_final[e] == g]
            k = sum(success[e] for e in idx)
            ref = binomtest(k, len(idx)).proportion_ci(method="wilson")  # scipy as the reference interval
            r = d["by_goal_cell"][goal][cell]
            assert (r["n"], r["value"]) == (len(idx), pytest.approx(k / len(idx)))
            assert (r["lo"], r["hi"]) == (pytest.approx(ref.low), pytest.approx(ref.high))


def test_flat_metrics_advice_and_summary():
    rec = _constructed()
    s = summarise(rec)
    d = s["diagnosis"]
    assert d is not None and d["reach_by_goal"]["a"] == pytest.approx(1 - 100 / (8 * 100 + 50))
    flat = flat_diagnosis(d)
    # MLflow metric names: alphanumerics, underscores, dashes, periods, spaces and slashes (mlflow docs).
    assert all(re.fullmatch(r"[\w\-. /]+", k) and math.isfinite(v) for k, v in flat.items())
    assert flat["diagnosis/cause/stuck"] == pytest.approx(1 / 8) and flat["diagnosis/success/a/none"] == pytest.approx(1 / 9)
    # advice names only causes with at least 15% of the failures: here every cause has 1 of 8 (12.5%)
    assert d["advice"] == []
    many = _record([_line([0.3, 0.0, 0.0], [0.0, 0.0, 0.0])] * 4)
    lines = diagnose(many)["advice"]
    assert len(lines) == 1 and lines[0].startswith(CAUSES["stuck"])


# ---- the separation filter's causes, on constructed episodes ----

CLEARANCE = 0.02


def _separation_record(held_share, sep_furniture, sep_self=None, *, paths=None, reach=None):
    """A constructed record of still arms (the stuck episode above) with the separation extras: per episode the
    share of the last steps on which the SEPARATION bit is set, and constant link distances (m) to furniture
    and between links (inf: none)."""
    E = len(held_share)
    paths = paths or [_line([0.3, 0.0, 0.0], [0.0, 0.0, 0.0])] * E
    limits = torch.zeros(E, T, dtype=torch.uint8)
    for e, share in enumerate(held_share):
        limits[e, T - int(round(share * 30)):] = SEPARATION  # of the last 30 steps: the 3 s window
    rec = _record(paths, limits=limits, reach=reach)
    sep_self = [math.inf] * E if sep_self is None else sep_self
    rec.extras.update({
        "sep_furniture": torch.tensor(sep_furniture, dtype=torch.float64)[:, None].expand(E, T + 1).clone(),
        "sep_self": torch.tensor(sep_self, dtype=torch.float64)[:, None].expand(E, T + 1).clone(),
        "sep_person": torch.full((E, T + 1), 0.5, dtype=torch.float64),
        "person_excess": torch.zeros(E, T, dtype=torch.bool),
        "world": {"furniture": ["shelf"], "person": ["head"], "clearance": CLEARANCE, "keep_out": 0.18,
                  "reduced_zone": 0.23, "excess_tol": 0.01},
    })  # fmt: skip
    return rec


def test_an_arm_held_by_the_separation_filter():
    pressed = CLEARANCE + 0.003  # within clearance + 5 mm
    no_way = torch.ones(6, T, 2, dtype=torch.bool)
    no_way[[0, 4], :, 0] = False  # no candidate toward the goal: the held arm would otherwise read as no_way
    rec = _separation_record(
        held_share=[1.0, 1.0, 0.8, 1.0, 1.0, 0.3],
        sep_furniture=[pressed, math.inf, 0.30, 0.30, 0.30, pressed],
        sep_self=[math.inf, pressed, math.inf, math.inf, math.inf, math.inf],
        reach=no_way,
    )
    d = diagnose(rec)
    got = [r["cause"] for r in d["episodes"]]
    # 0 against a shelf, 1 one link against another, 2-4 held away from furniture (near the person, say),
    # 5 held on only 30% of the window: a still arm, as before
    assert got == ["pressed", "pressed", "separation_held", "separation_held", "separation_held", "stuck"]
    row0, row2 = d["episodes"][0], d["episodes"][2]
    assert row0["separation_held_share"] == pytest.approx(1.0) and row0["pressed_share"] == pytest.approx(1.0)
    assert row0["closest_body_m"] == pytest.approx(pressed)
    assert row2["separation_held_share"] == pytest.approx(0.8) and row2["pressed_share"] == 0.0
    assert d["causes"]["pressed"] == 2 and d["cause_share"]["separation_held"] == pytest.approx(0.5)
    assert flat_diagnosis(d)["diagnosis/cause/pressed"] == pytest.approx(2 / 6)
    # a tighter margin (1 mm) no longer counts 3 mm above the clearance as pressed
    tight = diagnose(rec, rules={"pressed_margin_m": 0.001})
    assert [r["cause"] for r in tight["episodes"]][:2] == ["separation_held", "separation_held"]


def test_a_held_arm_still_on_its_way_is_progressing():
    # 5 cm/s toward the goal while the filter scales every command: the horizon ran out, the hold did not stop it
    rec = _separation_record([1.0], [CLEARANCE], paths=[_line([0.0, 0.0, 0.0], [0.005, 0.0, 0.0])])
    assert diagnose(rec)["episodes"][0]["cause"] == "progressing"


def test_records_without_the_separation_extras_diagnose_as_before():
    rec = _separation_record([1.0, 1.0], [CLEARANCE, 0.3], reach=torch.zeros(2, T, 2, dtype=torch.bool))
    assert [r["cause"] for r in diagnose(rec)["episodes"]] == ["pressed", "separation_held"]
    rec.extras["world"] = None  # a scene without bodies
    assert [r["cause"] for r in diagnose(rec)["episodes"]] == ["no_way", "no_way"]
    for key in ("world", "sep_furniture", "sep_self", "sep_person", "person_excess"):
        del rec.extras[key]  # older records
    d = diagnose(rec)
    assert [r["cause"] for r in d["episodes"]] == ["no_way", "no_way"]
    assert d["episodes"][0]["closest_body_m"] is None and d["episodes"][0]["separation_held_share"] == 0.0


# ---- causes read from real rollouts (seven_joint_arm, bedside shelf) ----

ROBOT = UrdfArm()
BELIEF = BoltzmannGoalBelief(beta=40.0)
LIMITS = SafetyLimits.for_robot(ROBOT)


class _Constant:
    """Test interface: the same joint velocity whatever the stick (zero: an arm that never moves)."""

    n_modes = 1

    def __init__(self, qd):
        self.qd = torch.as_tensor(qd, dtype=torch.float64)
        self.name = "constant"

    def reset(self, n_episodes, state):
        pass

    def act(self, stick, s):
        E, K = s.q.shape[0], stick.shape[-2]
        return self.qd.to(s.q.dtype).expand(E, 1, K, -1).clone()

    def stick_gain(self, s):
        return torch.zeros(s.q.shape[0], dtype=s.q.dtype)


def _rollout(interface, episodes=2, **over):
    suite = suite_from_dict(dict(scenario="bedside_shelf", episodes=episodes, seed=12345, horizon_s=10.0, **over,
                                 operator={"_target_": "coreach_plugins.operator.boltzmann.BoltzmannOperator",
                                           "greedy": True}), "test-suite.yaml")  # fmt: skip
    return rollout(ROBOT, interface, suite.build_operator(), suite, BELIEF, LIMITS, suite.generator())


def test_an_arm_that_cannot_move_has_no_way_to_its_goal():
    rec = _rollout(_Constant([0.0] * ROBOT.dof))
    d = diagnose(rec)
    assert d["failures"] == rec.n_episodes and {r["cause"] for r in d["episodes"]} == {"no_way"}
    assert all(v == 0.0 for v in d["reach_by_goal"].values())


def test_an_arm_driven_into_a_joint_limit_is_held_by_it():
    qd = [0.0] * ROBOT.dof
    # the shoulder backwards, past its limit within a few seconds (forwards, the arm meets the shelf first:
    # see the next test)
    qd[1] = -1.0
    # no centred stick on a 4 x 4 grid: a released stick stops the arm (the shipped filter), so the greedy
    # operator could otherwise keep the arm still
    rec = _rollout(_Constant(qd), candidates_per_axis=4)
    assert ((rec.extras["limits"] & JOINT_LIMIT) > 0).any()
    d = diagnose(rec)
    assert {r["cause"] for r in d["episodes"]} == {"limited"}


def _drive_joint(joint: int, speed: float):
    qd = [0.0] * ROBOT.dof
    qd[joint] = speed
    return _rollout(_Constant(qd), candidates_per_axis=4)  # no centred stick: see the joint-limit test


def test_an_arm_driven_into_the_shelf_is_pressed_against_it():
    rec = _drive_joint(1, 1.0)  # the shoulder forwards, into the shelf in front of the arm
    d = diagnose(rec)
    assert {r["cause"] for r in d["episodes"]} == {"pressed"}
    clearance = rec.extras["world"]["clearance"]
    # the filter holds the closest link at the clearance (within the margin), on every step of the window
    for r in d["episodes"]:
        assert r["separation_held_share"] == 1.0 and r["pressed_share"] == 1.0
        assert clearance - 1e-3 <= r["closest_body_m"] <= clearance + DiagnosisRules().pressed_margin_m


def test_an_arm_turned_toward_the_person_is_held_by_the_separation_filter():
    rec = _drive_joint(0, 1.0)  # the base joint, turning the arm toward the person beside the bed
    d = diagnose(rec)
    assert {r["cause"] for r in d["episodes"]} == {"separation_held"}
    # held at the person's keep-out distance, well away from furniture
    assert float(rec.extras["sep_person"][:, -1].min()) == pytest.approx(rec.extras["world"]["keep_out"], abs=2e-3)
    assert all(r["pressed_share"] == 0.0 for r in d["episodes"])
