"""Closed-loop vetting on the seven_joint_arm with small damped-least-squares test interfaces: success and recovery,
belief at the switch against a numpy Bayes' rule replay, safety limits in the recorded motion, the batched
loop against the one-episode-at-a-time reference, and operator imperfections changing the outcome."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import torch

from coreach.world.geometry import rotation_error
from coreach.control.belief_model import BoltzmannGoalBelief
from coreach_plugins.operator.boltzmann import BoltzmannOperator
from coreach.world.urdf_arm import UrdfArm
from coreach.host.protocols import Interface, Operator
from coreach.safety import SafetyLimits
from coreach.vetting.loop import rollout, rollout_per_episode
from coreach.vetting.suite import suite_from_dict


def _dls_matrix(jac, damping):
    """J^T (J J^T + damping^2 I)^-1 [E, n, 6]: damped least squares (Nakamura & Hanafusa 1986)."""
    eye = torch.eye(6, dtype=jac.dtype)
    return jac.transpose(-1, -2) @ torch.linalg.inv(jac @ jac.transpose(-1, -2) + damping**2 * eye)


def _cap_rows(v, limit):
    return v * torch.clamp(limit / v.norm(dim=-1, keepdim=True).clamp_min(1e-12), max=1.0)


def _sticks(stick, E):
    """Candidate sticks as [E, K, 2] whether given shared [K, 2] or per episode [E, K, 2]."""
    return stick.expand(E, *stick.shape) if stick.ndim == 2 else stick


class GoalStickDLS:
    """Test interface, one mode: stick direction selects a goal (goal g at angle 2 pi g / G), deflection the
    speed; the tool servoes to that goal's approach pose and, once it has been there (within the same
    tolerances the suite uses), along the goal's fine motion, via DLS."""

    name = "test_goal_dls"
    n_modes = 1

    def __init__(self, v_max=0.15, w_max=0.8, gain=2.0, damping=0.05, tol=0.02, rot_tol=math.radians(15.0)):
        self.v_max, self.w_max, self.gain, self.damping = v_max, w_max, gain, damping
        self.tol, self.rot_tol = tol, rot_tol

    def reset(self, n_episodes, state):
        self.visited = torch.zeros(n_episodes, state.goal_targets.shape[1], dtype=torch.bool)  # [E, G]

    def _goal_twists(self, s):
        """Tool twist [E, G, 6] that would serve each goal from the current pose."""
        rot_err = rotation_error(s.goal_rot, s.ee_rot[:, None])  # [E, G, 3]
        there = ((s.goal_targets[:, :, 0] - s.ee_pos[:, None]).norm(dim=-1) < self.tol) & (
            rot_err.norm(dim=-1) < self.rot_tol
        )
        self.visited |= there  # depends on the state only, so calling act twice per step is harmless
        target = torch.where(self.visited[..., None], s.goal_targets[:, :, 1], s.goal_targets[:, :, 0])
        v = _cap_rows(self.gain * (target - s.ee_pos[:, None]), self.v_max)
        w = _cap_rows(self.gain * rot_err, self.w_max)
        return torch.cat([v, w], dim=-1)

    def _directions(self, G, dtype):
        a = 2 * math.pi * torch.arange(G, dtype=dtype) / G
        return torch.stack([torch.cos(a), torch.sin(a)], dim=-1)  # [G, 2]

    def act(self, stick, s):
        E, G = s.q.shape[0], s.goal_targets.shape[1]
        weights = torch.relu(_sticks(stick, E) @ self._directions(G, s.q.dtype).T)  # [E, K, G]
        twist = weights @ self._goal_twists(s)  # [E, K, 6]
        qd = twist @ _dls_matrix(s.jac, self.damping).transpose(-1, -2)  # [E, K, n]
        return qd[:, None]

    def stick_gain(self, s):
        G = s.goal_targets.shape[1]
        A = _dls_matrix(s.jac, self.damping) @ self._goal_twists(s).transpose(-1, -2) @ self._directions(G, s.q.dtype)
        return torch.linalg.svdvals(A)[:, -1]  # [E]


def _mean_rotation(R):
    """Chordal mean of rotations [E, G, 3, 3] (SVD projection of the average matrix) -> [E, 3, 3]."""
    U, _, Vh = torch.linalg.svd(R.mean(dim=1))
    d = torch.sign(torch.linalg.det(U @ Vh))
    return U @ torch.diag_embed(torch.stack([torch.ones_like(d), torch.ones_like(d), d], -1)) @ Vh


class DirectDLS:
    """Test interface, two modes of direct tool control: mode 0 moves the tool in x-y, mode 1 in z (stick x);
    an orientation servo toward the goals' mean approach orientation runs in both. Switching costs steps."""

    name = "test_direct_dls"
    n_modes = 2
    switch_cost_steps = 3

    def __init__(self, v_max=0.15, w_max=0.8, gain=2.0, damping=0.05):
        self.v_max, self.w_max, self.gain, self.damping = v_max, w_max, gain, damping

    def reset(self, n_episodes, state):
        self.n = n_episodes

    def _parts(self, s):
        w = _cap_rows(self.gain * rotation_error(_mean_rotation(s.goal_rot), s.ee_rot), self.w_max)  # [E, 3]
        return _dls_matrix(s.jac, self.damping), w

    def act(self, stick, s):
        E = s.q.shape[0]
        st = _sticks(stick, E) * self.v_max  # [E, K, 2]
        zero = torch.zeros_like(st[..., :1])
        v = torch.stack([torch.cat([st, zero], -1), torch.cat([zero, zero, st[..., :1]], -1)], dim=1)  # [E, 2, K, 3]
        P, w = self._parts(s)
        twist = torch.cat([v, w[:, None, None, :].expand(*v.shape)], dim=-1)  # [E, 2, K, 6]
        return twist @ P[:, None].transpose(-1, -2)

    def stick_gain(self, s):
        P, _ = self._parts(s)
        xy, z = [[1.0, 0.0], [0.0, 1.0], [0.0, 0.0]], [[0.0, 0.0], [0.0, 0.0], [1.0, 0.0]]
        cols = torch.tensor([xy, z], dtype=s.q.dtype)  # [M, 3, 2] tool axes driven by the stick per mode
        B = cols[s.mode] * self.v_max  # [E, 3, 2] tool velocity per unit stick in the current mode
        return torch.linalg.svdvals(P[:, :, :3] @ B)[:, -1]


ROBOT = UrdfArm()
BELIEF = BoltzmannGoalBelief(beta=40.0)
LIMITS = SafetyLimits.for_robot(ROBOT)


def _suite(**over):
    d = dict(scenario="bedside_shelf", operator={"_target_": "coreach_plugins.operator.boltzmann.BoltzmannOperator",
             "greedy": True}, episodes=4, seed=12345, horizon_s=20.0, start_jitter=0.05)  # fmt: skip
    d.update(over)
    return suite_from_dict(d, "test-suite.yaml")


def _run(suite, interface=None, operator=None, batched=True, **kw):
    interface = interface or GoalStickDLS()
    operator = operator or suite.build_operator()
    fn = rollout if batched else rollout_per_episode
    return fn(ROBOT, interface, operator, suite, BELIEF, LIMITS, suite.generator(), **kw)


def test_test_interfaces_follow_the_protocols():
    assert isinstance(GoalStickDLS(), Interface) and isinstance(DirectDLS(), Interface)
    assert isinstance(BoltzmannOperator(), Operator)


def test_greedy_operator_succeeds_on_nominal_and_records_shapes():
    suite = _suite(episodes=8)
    calls = []
    rec = _run(suite, progress=lambda t, total: calls.append((t, total)))
    E, T, G = 8, suite.steps, 4
    assert rec.success.all(), rec.success  # a goal-aware DLS servo with an ideal operator: every episode
    assert calls[-1] == (T, T) and len(calls) == T
    assert rec.ee_path.shape == (E, T + 1, 3) and rec.belief.shape == (E, T + 1, G)
    assert rec.limit_scaled.shape == rec.reachable.shape == rec.stick_gain.shape == (E, T)
    assert torch.isnan(rec.belief_at_switch).all() and (rec.switch_step == -1).all()
    # success_step is the first state within the tolerances of the end of the fine motion
    rows = torch.arange(E)
    end = rec.extras["goal_targets"][rows, rec.goal_final, 1]
    at = rec.ee_path[rows, rec.success_step]
    assert ((at - end).norm(dim=-1) < suite.position_tol).all()
    # the arm holds still once it succeeded
    after = torch.arange(T)[None, :] >= rec.success_step[:, None]
    assert (rec.extras["qd"][after] == 0).all()
    # stick_gain every 10 steps only, and finite there
    assert torch.isfinite(rec.stick_gain[:, ::10]).all() and torch.isnan(rec.stick_gain[:, 1::10]).all()
    # at the start every goal is reachable with this interface
    assert rec.reachable[:, 0].all()
    # the belief ends on the goal the episode completed
    assert (rec.belief[rows, -1].argmax(-1) == rec.goal_final).all()


def test_success_needs_the_approach_orientation():
    # With an orientation tolerance the servo cannot meet (its rotation is capped near zero), nothing succeeds
    # although the position is reached (the last assertion): a position-only test would have counted these.
    iface = GoalStickDLS(w_max=1e-6)
    rec = _run(_suite(episodes=4, tolerances={"orientation_deg": 2.0}), iface)
    assert not rec.success.any()
    assert (rec.error[:, -1] < 0.02).any()  # it did get to the approach point


def test_goal_switches_are_recovered_and_belief_at_switch_is_bayes():
    suite = _suite(episodes=4, switch_fractions=[0.5, 0.8], horizon_s=30.0)
    rec = _run(suite)
    assert rec.switch_step.tolist() == [150] * 4 + [240] * 4
    assert (rec.goal_final != rec.goal_initial).all()
    assert rec.success.all() and (rec.success_step > rec.switch_step).all()
    assert (rec.extras["phase1_step"] > rec.switch_step).all()  # the final goal's approach, after the switch
    # the arm had completed the initial goal and waited there before the switch
    assert (rec.extras["initial_done_step"] >= 0).all()
    # Bayes' rule with a Boltzmann likelihood, replayed in numpy from the recorded path (independent code):
    # log b_g += beta * (d_g(before) - d_g(after)) for every step that moved at least min_motion.
    path = rec.ee_path.numpy()
    targets = rec.extras["goal_targets"].numpy()
    for e in range(8):
        s = int(rec.switch_step[e])
        logb = np.zeros(4)
        for t in range(s):
            a, b = path[e, t], path[e, t + 1]
            if np.linalg.norm(b - a) < BELIEF.min_motion:
                continue
            before = np.array([_seg_dist(a, *targets[e, g]) for g in range(4)])
            after = np.array([_seg_dist(b, *targets[e, g]) for g in range(4)])
            logb += BELIEF.beta * (before - after)
        post = np.exp(logb - logb.max())
        post /= post.sum()
        assert rec.belief_at_switch[e].item() == pytest.approx(post[int(rec.goal_initial[e])], abs=1e-9)
        assert rec.belief_at_switch[e] > 0.9  # it had completed that goal


def _seg_dist(p, a, b):
    """Distance from p to the segment ab (closed form of the projection clipped to the segment)."""
    ab = b - a
    t = np.clip(np.dot(p - a, ab) / max(np.dot(ab, ab), 1e-12), 0.0, 1.0)
    return float(np.linalg.norm(p - (a + t * ab)))


@pytest.mark.parametrize("interface", [GoalStickDLS(v_max=0.6, w_max=3.0), DirectDLS(v_max=0.6)], ids=lambda i: i.name)
def test_recorded_motion_obeys_the_limits(interface):
    # Fast interfaces, so the caps actually bind; tcp cap lowered to make the check bite.
    limits = SafetyLimits.for_robot(ROBOT, tcp_speed_max=0.1)
    suite = _suite(episodes=4, horizon_s=6.0, start_jitter=0.3)
    op = BoltzmannOperator(beta=150.0)
    rec = rollout(ROBOT, interface, op, suite, BELIEF, limits, suite.generator())
    q, qd = rec.extras["q"][:, :-1].reshape(-1, 7), rec.extras["qd"].reshape(-1, 7)
    assert rec.limit_scaled.any()  # the caps were needed
    qd_max = torch.tensor(limits.qd_max, dtype=torch.float64)
    assert (qd.abs() <= qd_max + 1e-12).all()
    tool = (ROBOT.jacobian(q)[:, :3] @ qd[:, :, None]).squeeze(-1).norm(dim=-1)
    assert tool.max() <= 0.1 + 1e-9
    q_all = rec.extras["q"].reshape(-1, 7)
    assert (q_all >= ROBOT.q_lower.double() - 1e-12).all() and (q_all <= ROBOT.q_upper.double() + 1e-12).all()
    if interface.n_modes > 1:
        assert rec.mode_switches.sum() > 0


def test_a_mode_switch_holds_the_arm_for_the_switch_cost():
    iface = DirectDLS()
    rec = _run(_suite(episodes=4, horizon_s=10.0), iface)
    mode, qd = rec.extras["mode"], rec.extras["qd"]
    starts = torch.cat([mode[:, :1] != 0, mode[:, 1:] != mode[:, :-1]], dim=1)  # [E, T] switch at step t
    assert starts.sum() == rec.mode_switches.sum() > 0
    for e, t in starts.nonzero().tolist():
        assert (qd[e, t : t + iface.switch_cost_steps] == 0).all()
        assert t + iface.switch_cost_steps >= qd.shape[1] or qd[e, t + iface.switch_cost_steps].abs().sum() > 0


@pytest.mark.parametrize("interface", [GoalStickDLS(), DirectDLS()], ids=lambda i: i.name)
def test_batched_equals_per_episode_reference(interface):
    suite = _suite(episodes=1, switch_fractions=[None, 0.5], horizon_s=12.0)
    a = _run(suite, interface)
    assert a.success.any() and a.switch_step[1] > 0
    b = _run(suite, interface, batched=False)
    assert torch.equal(a.success, b.success) and torch.equal(a.success_step, b.success_step)
    assert torch.equal(a.mode_switches, b.mode_switches)
    torch.testing.assert_close(a.ee_path, b.ee_path, rtol=0, atol=1e-9)
    torch.testing.assert_close(a.belief_at_switch, b.belief_at_switch, rtol=0, atol=1e-9, equal_nan=True)


def _mean_steps(rec):
    return rec.success_step[rec.success].double().mean().item()


def test_operator_imperfections_change_the_outcome():
    suite = _suite(episodes=4, horizon_s=12.0)
    ideal = _run(suite, operator=BoltzmannOperator(greedy=True))
    # delay: nothing moves before the first delayed choice lands, and arrival comes later on average
    delayed = _run(suite, operator=BoltzmannOperator(greedy=True, delay_steps=3))
    assert (delayed.extras["qd"][:, :3] == 0).all() and (delayed.extras["qd"][:, 3].abs().sum(-1) > 0).all()
    assert _mean_steps(delayed) > _mean_steps(ideal) + 2
    # bias: the sent stick is off the chosen one, so the path leaves the ideal one by more than a centimetre
    biased = _run(suite, operator=BoltzmannOperator(greedy=True, bias=[0.2, -0.1]))
    assert (biased.ee_path - ideal.ee_path).norm(dim=-1).amax() > 0.01
    # tremor: the tool path gets rougher (mean squared second difference of the tool position)
    shaky = _run(suite, operator=BoltzmannOperator(greedy=True, tremor_std=0.3))

    def roughness(rec):
        acc = rec.ee_path[:, 2:] - 2 * rec.ee_path[:, 1:-1] + rec.ee_path[:, :-2]
        return acc.pow(2).sum(-1).mean().item()

    assert roughness(shaky) > 1.5 * roughness(ideal)


def test_workspace_box_is_applied_in_the_loop_and_recorded():
    """The loop runs the filter that ships: the safety config's workspace box (conf safety/default.yaml) does
    not bite on the bedside-shelf scene's paths, while a box the shelf lies outside of does, and its WORKSPACE
    bit is recorded."""
    import yaml

    from coreach.vetting.loop import WORKSPACE

    rt = yaml.safe_load((Path(__file__).parents[1] / "conf" / "coreach_conf" / "safety" / "default.yaml").read_text())
    suite = _suite(episodes=3)
    plain = rollout(ROBOT, GoalStickDLS(), suite.build_operator(), suite, BELIEF, LIMITS, suite.generator())
    shipped = LIMITS.with_workspace(rt["workspace_min"], rt["workspace_max"], rt["lookahead_s"])
    boxed = rollout(ROBOT, GoalStickDLS(), suite.build_operator(), suite, BELIEF, shipped, suite.generator())
    assert not ((boxed.extras["limits"] & WORKSPACE) > 0).any()
    assert boxed.success.tolist() == plain.success.tolist()
    tight = LIMITS.with_workspace([0.0, -0.1, 0.0], [0.3, 0.1, 0.3], 0.1)
    cut = rollout(ROBOT, GoalStickDLS(), suite.build_operator(), suite, BELIEF, tight, suite.generator())
    assert ((cut.extras["limits"] & WORKSPACE) > 0).any()
