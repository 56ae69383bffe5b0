"""Scripted demonstrator and scenarios: the damped-least-squares step against closed forms and numpy,
and demonstrations on a planar test arm that reach their goals deterministically."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch

from coreach.demonstrator import (
    clamp_to_joint_limits,
    completed_mask,
    dls_step,
    generate,
    rollout,
    scale_to_speed_limits,
)
from coreach.errors import ConfigError, DataError
from coreach.world.geometry import angle_between, quat_to_matrix
from coreach.host.protocols import Robot
from coreach.world.scenario import Scenario, load_scenario


class PlanarArm:
    """Test robot: revolute joints about the base z-axis, links along their local x-axis (all in z = 0)."""

    def __init__(self, lengths=(0.35, 0.30, 0.15), q_home=(0.3, 1.2, -0.8), limits=2.8, name="test_planar"):
        self.lengths = torch.tensor(lengths, dtype=torch.float64)
        self._home = torch.tensor(q_home, dtype=torch.float64)
        self._limits = limits
        self.name = name
        self.joint_names = [f"j{i}" for i in range(len(lengths))]

    @property
    def dof(self) -> int:
        return len(self.lengths)

    @property
    def q_lower(self):
        return -torch.as_tensor(self._limits, dtype=torch.float64).expand(self.dof)

    @property
    def q_upper(self):
        return torch.as_tensor(self._limits, dtype=torch.float64).expand(self.dof)

    @property
    def qd_max(self):
        return torch.full((self.dof,), 1.5, dtype=torch.float64)

    @property
    def q_home(self):
        return self._home

    def fk(self, q):
        L, cum = self.lengths.to(q.dtype), torch.cumsum(q, -1)  # cum: absolute link angles [B, n]
        x, y = (L * torch.cos(cum)).sum(-1), (L * torch.sin(cum)).sum(-1)
        a = cum[..., -1]
        c, s, z, o = torch.cos(a), torch.sin(a), torch.zeros_like(a), torch.ones_like(a)
        R = torch.stack([c, -s, z, s, c, z, z, z, o], -1).reshape(*a.shape, 3, 3)
        return torch.stack([x, y, z], -1), R

    def jacobian(self, q):
        # Textbook planar Jacobian (from memory): column j sums the links from j outward.
        L, cum = self.lengths.to(q.dtype), torch.cumsum(q, -1)
        lx, ly = L * torch.cos(cum), L * torch.sin(cum)
        jx = -torch.flip(torch.cumsum(torch.flip(ly, [-1]), -1), [-1])
        jy = torch.flip(torch.cumsum(torch.flip(lx, [-1]), -1), [-1])
        z, o = torch.zeros_like(jx), torch.ones_like(jx)
        return torch.stack([jx, jy, z, z, z, o], -2)  # [B, 6, n]


def flat_scenario(jitter: float = 0.005) -> Scenario:
    """Three goals in the arm's plane, orientations about z only, so the planar arm can reach them.

    The jitter is small because it also moves goals out of the plane (z), which this arm cannot follow."""
    return Scenario.from_dict(
        {
            "name": "flat",
            "jitter": jitter,
            "dt": 0.1,
            "goals": [
                {"name": "press", "position": [0.50, 0.20, 0.0], "approach_rpy_deg": [0, 0, 20], "fine_motion": [0.04, 0, 0]},
                {"name": "slide", "position": [0.45, -0.20, 0.0], "approach_rpy_deg": [0, 0, -30], "fine_motion": [0, -0.05, 0]},
                {"name": "pull", "position": [0.30, 0.40, 0.0], "approach_rpy_deg": [0, 0, 60], "fine_motion": [-0.05, 0, 0]},
            ],
        },
        "test",
    )


# ------------------------------------------------------------------------------------ damped least squares


def test_test_robot_satisfies_protocol_and_jacobian_matches_finite_differences():
    arm = PlanarArm()
    assert isinstance(arm, Robot)
    q = torch.tensor([[0.4, -0.7, 1.1]], dtype=torch.float64)
    J = arm.jacobian(q)[0, :2]
    eps = 1e-6
    fd = torch.stack(
        [(arm.fk(q + eps * torch.eye(3)[i])[0] - arm.fk(q - eps * torch.eye(3)[i])[0])[0, :2] / (2 * eps) for i in range(3)], -1
    )
    np.testing.assert_allclose(J.numpy(), fd.numpy(), atol=1e-8)


def test_dls_matches_closed_form_2x2():
    # Planar 2-link arm, l1 = l2 = 1 (textbook worked example, from memory):
    # J = [[-l1 s1 - l2 s12, -l2 s12], [l1 c1 + l2 c12, l2 c12]].
    l1 = l2 = 1.0
    q1, q2, lam = 0.3, 1.1, 0.2
    s1, c1, s12, c12 = math.sin(q1), math.cos(q1), math.sin(q1 + q2), math.cos(q1 + q2)
    a, b, c, d = -l1 * s1 - l2 * s12, -l2 * s12, l1 * c1 + l2 * c12, l2 * c12
    v = np.array([0.05, -0.02])
    # (J J^T + lam^2 I) = [[a^2+b^2+lam^2, ac+bd], [ac+bd, c^2+d^2+lam^2]]; 2x2 inverse by cofactors (algebra).
    p, r, s = a * a + b * b + lam**2, a * c + b * d, c * c + d * d + lam**2
    inv = np.array([[s, -r], [-r, p]]) / (p * s - r * r)
    expected = np.array([[a, c], [b, d]]) @ inv @ v  # J^T (...)^-1 v
    J = torch.tensor([[[a, b], [c, d]]], dtype=torch.float64)
    got = dls_step(J, torch.tensor(v)[None], lam)[0].numpy()
    np.testing.assert_allclose(got, expected, rtol=1e-12)
    # Also the textbook planar arm's own Jacobian rows agree with the hand-written entries.
    arm = PlanarArm(lengths=(l1, l2), q_home=(0.0, 0.0))
    np.testing.assert_allclose(arm.jacobian(torch.tensor([[q1, q2]], dtype=torch.float64))[0, :2].numpy(), J[0].numpy(), atol=1e-14)


def test_dls_push_through_identity_against_numpy():
    # J^T (J J^T + l^2 I)^-1 = (J^T J + l^2 I)^-1 J^T (push-through identity), evaluated with numpy.linalg.solve.
    rng = np.random.default_rng(1)
    J, v, lam = rng.normal(size=(5, 6, 7)), rng.normal(size=(5, 6)), 0.07
    ref = np.linalg.solve(np.swapaxes(J, 1, 2) @ J + lam**2 * np.eye(7), np.swapaxes(J, 1, 2) @ v[..., None])[..., 0]
    np.testing.assert_allclose(dls_step(torch.tensor(J), torch.tensor(v), lam).numpy(), ref, atol=1e-10)


@pytest.mark.parametrize("shape", [(2, 3), (6, 7), (2, 2)])
def test_dls_without_damping_is_the_pseudo_inverse(shape):
    rng = np.random.default_rng(2)
    J, v = rng.normal(size=shape), rng.normal(size=shape[0])
    ref = np.linalg.pinv(J) @ v  # numpy.linalg.pinv as the reference
    for lam in (0.0, 1e-7):
        got = dls_step(torch.tensor(J)[None], torch.tensor(v)[None], lam)[0].numpy()
        np.testing.assert_allclose(got, ref, rtol=1e-6, atol=1e-9)


def test_dls_bounded_at_singularity():
    # Stretched planar arm (q2 = 0) is singular; DLS gain sigma/(sigma^2 + l^2) <= 1/(2 l) (from memory).
    arm, lam = PlanarArm(lengths=(0.5, 0.4), q_home=(0.0, 0.0)), 0.05
    J = arm.jacobian(torch.tensor([[0.2, 0.0]], dtype=torch.float64))[:, :2]
    v = torch.tensor([[math.cos(0.2), math.sin(0.2)]], dtype=torch.float64)  # along the arm: unreachable direction
    qd = dls_step(J, v, lam)
    assert qd.norm() <= 1 / (2 * lam) + 1e-12
    assert torch.isfinite(qd).all()


def test_speed_scaling_keeps_direction_and_limits():
    qd = torch.tensor([[3.0, -0.5, 1.0], [0.1, 0.2, -0.1]], dtype=torch.float64)
    qd_max = torch.tensor([1.5, 1.0, 2.0], dtype=torch.float64)
    out = scale_to_speed_limits(qd, qd_max)
    assert (out.abs() <= qd_max + 1e-12).all()
    np.testing.assert_allclose(out[0].numpy(), qd[0].numpy() / 2.0)  # joint 0 at 3.0 vs 1.5: halve everything
    np.testing.assert_allclose(out[1].numpy(), qd[1].numpy())  # already inside: untouched


def test_joint_limit_clamp():
    q = torch.tensor([[0.95, -0.5, 1.2]], dtype=torch.float64)
    lower, upper = -torch.ones(3, dtype=torch.float64), torch.ones(3, dtype=torch.float64)
    out = clamp_to_joint_limits(torch.tensor([[1.0, -1.0, 1.0]], dtype=torch.float64), q, 0.1, lower, upper)
    np.testing.assert_allclose(out.numpy(), [[0.5, -1.0, 0.0]], atol=1e-12)  # joint 2 already outside: may not go further
    back = clamp_to_joint_limits(torch.tensor([[0.0, 0.0, -1.0]], dtype=torch.float64), q, 0.1, lower, upper)
    assert back[0, 2] == -1.0


# ------------------------------------------------------------------------------------ demonstrations


def test_demonstrations_reach_their_goals():
    arm, sc = PlanarArm(), flat_scenario()
    r = rollout(arm, sc, 60, seed=0, noise=0.02)
    assert r.completed.float().mean() >= 0.95
    demos = generate(arm, sc, 60, seed=0, noise=0.02)
    done = completed_mask(demos, arm)  # recomputed from the recorded q, qd only
    np.testing.assert_array_equal(done, r.completed.numpy())
    for e in demos:
        if not done[e.episode_id]:
            continue
        end = e.goal_pos[e.goal] + e.goal_fine[e.goal]
        # Cut at the first arrival: the last recorded state is not yet within 1 cm of the end point.
        assert np.linalg.norm(e.ee_pos[-1] - end) >= 0.01
        # Orientation held through the fine motion (within the approach tolerance + a step of noise).
        angle = angle_between(quat_to_matrix(torch.tensor(e.ee_quat[-1])), quat_to_matrix(torch.tensor(e.goal_quat[e.goal])))
        assert angle < 0.15


def test_recording_is_consistent_and_within_limits():
    arm = PlanarArm(limits=1.4)  # tight limits so the clamp is exercised
    demos = generate(arm, flat_scenario(), 30, seed=3, noise=0.5, min_arrival=0.0, keep_incomplete=True)
    for e in demos:
        assert (np.abs(e.qd) <= 1.5 + 1e-12).all()
        assert (np.abs(e.q) <= 1.4 + 1e-12).all() and (np.abs(e.q[-1] + e.qd[-1] * demos.dt) <= 1.4 + 1e-12).all()
        np.testing.assert_allclose(e.q[1:], e.q[:-1] + e.qd[:-1] * demos.dt, atol=1e-12)  # q integrates qd
        pos, R = arm.fk(torch.tensor(e.q))
        np.testing.assert_allclose(e.ee_pos, pos.numpy(), atol=1e-12)
        np.testing.assert_allclose(quat_to_matrix(torch.tensor(e.ee_quat)).numpy(), R.numpy(), atol=1e-12)
    np.testing.assert_allclose(demos[0].q[0], arm.q_home.numpy())


def test_seeded_determinism():
    arm, sc = PlanarArm(), flat_scenario()
    a = generate(arm, sc, 20, seed=5, noise=0.05)
    b = generate(arm, sc, 20, seed=5, noise=0.05)
    c = generate(arm, sc, 20, seed=6, noise=0.05)
    assert a.fingerprint() == b.fingerprint()
    assert a.fingerprint() != c.fingerprint()


def test_goal_order():
    arm, sc = PlanarArm(), flat_scenario()
    rr = rollout(arm, sc, 9, max_steps=2)
    assert rr.goals.tolist() == [0, 1, 2] * 3
    rand = rollout(arm, sc, 300, max_steps=2, goal_order="random", seed=1)
    counts = np.bincount(rand.goals.numpy(), minlength=3)
    assert counts.min() > 60  # 100 expected each; binomial sd ~8
    assert torch.equal(rand.goals, rollout(arm, sc, 300, max_steps=2, goal_order="random", seed=1).goals)
    with pytest.raises(ConfigError, match="goal_order"):
        rollout(arm, sc, 3, goal_order="sorted")
    with pytest.raises(ConfigError, match="option gain"):
        generate(arm, sc, 3, gain=2.0)


def test_max_steps_cuts_unfinished_episodes():
    demos = generate(PlanarArm(), flat_scenario(), 6, seed=0, max_steps=5, min_arrival=0.0, keep_incomplete=True)
    assert all(len(e) == 5 for e in demos)
    assert not completed_mask(demos, PlanarArm()).any()


def test_generate_on_urdf_arm_if_available():
    mod = pytest.importorskip("coreach.world.urdf_arm")
    arm = mod.UrdfArm()
    demos = generate(arm, "bedside_shelf", 40, seed=0)
    assert len(demos) == 40 and demos.joint_names == list(arm.joint_names)
    assert completed_mask(demos, arm).mean() >= 0.9


# ------------------------------------------------------------------------------------ scenarios


def test_bedside_shelf_matches_its_description():
    sc = load_scenario("bedside_shelf")
    assert sc.goal_names == ["lamp_switch", "bottle", "book", "drawer_knob"]
    assert sc.dt == 0.1 and sc.jitter == 0.02
    P = np.array([g.position for g in sc.goals])
    dist = np.linalg.norm(P, axis=1)
    assert ((dist >= 0.55) & (dist <= 0.70)).all() and (P[:, 0] > 0).all()
    assert ((P[:, 2] >= -0.2) & (P[:, 2] <= 0.35)).all()
    gaps = np.linalg.norm(P[:, None] - P[None], axis=-1) + np.eye(len(P))
    assert gaps.min() >= 0.2
    layout = sc.sample_layouts(1, torch.Generator().manual_seed(0))
    tool_z = layout.approach_rot[0, :, :, 2]  # [G, 3] third column = tool z-axis in the base frame
    assert (tool_z[:, 0] > 0.9).all()


def test_layout_jitter_and_targets():
    sc = flat_scenario(jitter=0.02)
    lay = sc.sample_layouts(500, torch.Generator().manual_seed(0))
    nominal = torch.tensor([g.position for g in sc.goals], dtype=torch.float64)
    dev = lay.approach_pos - nominal
    assert lay.approach_pos.shape == (500, 3, 3) and lay.approach_rot.shape == (500, 3, 3, 3)
    assert dev.abs().max() <= 0.02 and dev.abs().max() > 0.019  # uniform on [-0.02, 0.02]
    assert abs(dev.mean()) < 2e-3
    assert lay.targets.shape == (500, 3, 2, 3)
    torch.testing.assert_close(lay.targets[:, :, 1] - lay.targets[:, :, 0], lay.fine)
    pos, quat, fine = lay.to_episode(4)
    assert pos.shape == (3, 3) and quat.shape == (3, 4) and fine.shape == (3, 3)
    np.testing.assert_array_equal(pos, lay.approach_pos[4].numpy())
    again = sc.sample_layouts(500, torch.Generator().manual_seed(0))
    assert torch.equal(again.approach_pos, lay.approach_pos)


def _goal(**over):
    g = {"name": "a", "position": [0.5, 0, 0], "approach_rpy_deg": [0, 90, 0], "fine_motion": [0.03, 0, 0]}
    g.update(over)
    return g


@pytest.mark.parametrize(
    ("data", "option"),
    [
        ({"name": "s", "goals": [_goal(), _goal()]}, "goals[1].name"),
        ({"name": "s", "goals": [_goal(position=[0.5, 0])]}, "goals[0].position"),
        ({"name": "s", "goals": [_goal(fine_motion=[0, float("nan"), 0])]}, "goals[0].fine_motion"),
        ({"name": "s", "goals": [_goal(approach_rpy_deg="forward")]}, "goals[0].approach_rpy_deg"),
        ({"name": "s", "goals": [_goal(colour="red")]}, "goals[0].colour"),
        ({"name": "s", "goals": []}, "goals"),
        ({"name": "s", "goals": [_goal()], "jitter": -1}, "jitter"),
        ({"name": "s", "goals": [_goal()], "dt": 0}, "dt"),
        ({"goals": [_goal()]}, "name"),
    ],
)
def test_scenario_validation_names_the_option(data, option):
    with pytest.raises(ConfigError) as err:
        Scenario.from_dict(data, "my.yaml")
    assert "my.yaml" in err.value.where and option in err.value.where


def test_goal_index_and_loading(tmp_path):
    sc = load_scenario("bedside_shelf")
    assert sc.goal_index("bottle") == 1
    with pytest.raises(ConfigError, match="unknown goal 'vase'"):
        sc.goal_index("vase")
    with pytest.raises(ConfigError, match="bedside_shelf"):  # lists the shipped names
        load_scenario("kitchen_counter")
    path = tmp_path / "mine.yaml"
    path.write_text("name: mine\ngoals:\n  - {name: cup, position: [0.5, 0.1, 0.2], fine_motion: [0, 0, 0.05]}\n")
    mine = load_scenario(path)
    assert mine.goal_names == ["cup"] and mine.goals[0].approach_rpy_deg == [0.0, 90.0, 0.0]
    path.write_text("name: [unclosed\n")
    with pytest.raises(ConfigError, match="YAML"):
        load_scenario(str(path))
    with pytest.raises(ConfigError, match="not found"):
        load_scenario(str(tmp_path / "absent.yaml"))


# ------------------------------------------------------------------------------------ dataset plugin


def test_scripted_shelf_plugin_caches_through_the_parquet_loader(tmp_path, monkeypatch):
    import coreach_plugins.dataset.scripted_shelf as mod

    scen = tmp_path / "flat.yaml"
    scen.write_text(
        "name: flat\njitter: 0.005\ngoals:\n"
        "  - {name: press, position: [0.5, 0.2, 0], approach_rpy_deg: [0, 0, 20], fine_motion: [0.04, 0, 0]}\n"
        "  - {name: pull, position: [0.3, 0.4, 0], approach_rpy_deg: [0, 0, 60], fine_motion: [-0.05, 0, 0]}\n"
    )
    Shelf = mod.ScriptedShelf
    ds = Shelf(scenario=str(scen), episodes=12, seed=1, noise=0.01, max_steps=60, cache_dir=str(tmp_path / "cache"))
    robot = PlanarArm()
    first = ds.load(robot)
    assert ds.cache_path(robot).is_file() and len(first) == 12
    assert first.fingerprint() == generate(robot, load_scenario(scen), 12, 1, 0.01, 60).fingerprint()
    monkeypatch.setattr(mod, "generate", lambda *a, **k: pytest.fail("cache not used"))
    assert ds.load(robot).fingerprint() == first.fingerprint()
    other = Shelf(scenario=str(scen), episodes=12, seed=2, cache_dir=str(tmp_path / "cache"))
    assert other.cache_path(robot) != ds.cache_path(robot)
    assert Shelf(scenario=str(scen), cache_dir=str(tmp_path / "cache")).cache_path(PlanarArm(name="other")) != Shelf(
        scenario=str(scen), cache_dir=str(tmp_path / "cache")
    ).cache_path(robot)
    with pytest.raises(ConfigError, match="episodes"):
        Shelf(episodes=0)


def test_refuses_a_dataset_whose_goal_is_missed_naming_goal_rate_and_cause():
    # The planar arm reaches at most 0.80 m; a goal at 1.2 m cannot be reached from any pose.
    sc = Scenario.from_dict({"name": "far", "jitter": 0.0, "dt": 0.1, "goals": [
        {"name": "near", "position": [0.45, 0.25, 0.0], "approach_rpy_deg": [0, 0, 40]},
        {"name": "far_shelf", "position": [1.2, 0.0, 0.0], "approach_rpy_deg": [0, 0, 0]},
    ]})
    with pytest.raises(DataError) as err:
        generate(PlanarArm(), sc, 8, seed=0, noise=0.0)
    msg = str(err.value)
    assert "goal far_shelf" in msg and "reached in 0 of 4" in msg and "expected at least 95%" in msg
    assert "out of reach" in msg or "joint limits" in msg
    # asked to keep going, the misses are dropped (never trained on) and the rates are reported
    demos = generate(PlanarArm(), sc, 8, seed=0, noise=0.0, min_arrival=0.0)
    assert {demos.goal_names[e.goal] for e in demos} == {"near"}
    assert demos.arrival["far_shelf"]["rate"] == 0.0 and demos.arrival["near"]["rate"] == 1.0


def test_arrival_cause_fine_motion_when_the_budget_ends_after_the_approach():
    from coreach.arrival import GoalArrival

    a = GoalArrival("g", 10, 2, 0.004, 3.0, 0.0, "", 1.0)
    assert a.rate == 0.2 and a.cause(0.01, 0.1).startswith("fine motion")
    b = GoalArrival("g", 10, 2, 0.004, 30.0, 0.0, "", 0.0)
    assert b.cause(0.01, 0.1).startswith("orientation not reachable")
    c = GoalArrival("g", 10, 2, 0.2, 3.0, 0.9, "j1", 0.0)
    assert c.cause(0.01, 0.1).startswith("joint limits: j1")


def test_spread_and_via_starts_cover_more_states_and_still_arrive():
    arm, sc = PlanarArm(), flat_scenario()
    plain = rollout(arm, sc, 60, seed=2, noise=0.0)
    wide = rollout(arm, sc, 60, seed=2, noise=0.0, start_jitter=0.05, spread_share=0.5, start_spread=0.4,
                   via_share=0.5, via_steps=(5, 10))
    starts = wide.q[:, 0]
    assert float(plain.q[:, 0].std(0).max()) == 0.0  # every plain episode starts at home
    assert float(starts.std(0).min()) > 0.05
    assert int((wide.via_goals >= 0).sum()) == 30 and bool((wide.via_goals != wide.goals).all())
    assert bool(wide.completed.all())
    # a recorded via part heads for the other goal first: the first steps bring the tool closer to it
    e = int((wide.via_goals >= 0).nonzero()[0])
    other = wide.layout.approach_pos[e, wide.via_goals[e]]
    pos, _ = arm.fk(wide.q[e, :6])
    d = (pos - other).norm(dim=-1)
    assert float(d[-1]) < float(d[0])


def test_label_clean_records_the_noise_free_correction_at_the_state_the_noise_led_to():
    from coreach.demonstrator import expert_action, expert_twist

    arm, sc = PlanarArm(), flat_scenario()
    noisy = rollout(arm, sc, 12, seed=4, noise=0.3)
    clean = rollout(arm, sc, 12, seed=4, noise=0.3, label_clean=True)
    # the same noisy motion is executed (same states), only the recorded labels differ
    torch.testing.assert_close(clean.q, noisy.q, rtol=0, atol=0)
    assert float((clean.qd - noisy.qd).abs().max()) > 0.01
    # each clean label is the damped-least-squares expert at that state, with no noise: recompute it for
    # the first step of every episode from the demonstrator's own velocity law
    q0 = clean.q[:, 0]
    pos, rot = arm.fk(q0)
    rows = torch.arange(12)
    target = clean.layout.approach_pos[rows, clean.goals]
    target_rot = clean.layout.approach_rot[rows, clean.goals]
    twist = expert_twist(pos, rot, target, target_rot, 2.0, 2.0, 0.15, 1.0)
    want = expert_action(arm, q0, arm.jacobian(q0), twist, sc.dt, 0.05)
    torch.testing.assert_close(clean.qd[:, 0], want, rtol=1e-10, atol=1e-12)
    # without noise the option changes nothing
    torch.testing.assert_close(rollout(arm, sc, 12, seed=4, noise=0.0, label_clean=True).qd,
                               rollout(arm, sc, 12, seed=4, noise=0.0).qd, rtol=0, atol=0)
