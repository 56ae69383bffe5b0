"""The shared control step: safety filter and belief cadence checked on hand-worked values, and the seam
between the batched vetting machinery (torch) and the runtime Session (numpy + onnxruntime)."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from coreach.context import ContextSpec, build_context
from coreach.control.belief_tracker import track
from coreach.control.safety_filter import JOINT_LIMIT, SPEED_CAP, WORKSPACE, SafetyLimits
from coreach.decoder.policy import DecoderPolicy
from coreach.release.bundle_writer import write_bundle
from coreach.runtime.session import Session
from coreach.vetting.loop import _kinematics, _limit
from coreach.control.belief_model import BoltzmannGoalBelief
from coreach.world.urdf_arm import SEVEN_JOINT_ARM_HOME, UrdfArm, shipped_urdf

BOX = SafetyLimits(qd_max=(1.0, 1.0), tcp_speed_max=10.0, q_lower=(-1.0, -1.0), q_upper=(1.0, 1.0),
                   workspace_min=(-1.0, -1.0, -1.0), workspace_max=(1.0, 1.0, 1.0), lookahead_s=0.1, deadband=0.2)


def test_stick_box_and_deadband_by_hand():
    # hand-worked: deadband 0.2, s = 0.6 -> (0.6 - 0.2) / 0.8 = 0.5; s = 1.5 -> clipped to 1 -> 1; |s| <= 0.2 -> 0
    for xp_array in (np.asarray, lambda v: torch.as_tensor(v, dtype=torch.float64)):
        s, clipped, released = BOX.condition_stick(xp_array([[0.6, -1.5], [0.1, -0.2]]))
        np.testing.assert_allclose(np.asarray(s), [[0.5, -1.0], [0.0, 0.0]])
        assert list(np.asarray(clipped)) == [True, False] and list(np.asarray(released)) == [False, True]


def test_workspace_scale_by_hand():
    # tool at x = 0.9, J_lin = identity on (x, y), qd = (2, 0) -> predicted move 0.2 m in 0.1 s; room 0.1 m,
    # so the command is halved (scale = room / move = 0.5). Caps are off (qd_max large) to isolate the box.
    limits = SafetyLimits(qd_max=(10.0, 10.0), tcp_speed_max=10.0, workspace_min=(-1.0, -1.0, -1.0),
                          workspace_max=(1.0, 1.0, 1.0), lookahead_s=0.1)
    jac = np.array([[1.0, 0.0], [0.0, 1.0], [0.0, 0.0]])
    qd, flags, scale = limits.limit(np.zeros(2), np.array([2.0, 0.0]), jac, np.array([0.9, 0.0, 0.0]))
    np.testing.assert_allclose(qd, [1.0, 0.0])
    assert float(scale) == pytest.approx(0.5) and int(flags) == WORKSPACE
    # already outside (x = 1.2): moving further out is stopped, moving back passes untouched
    out, _, s_out = limits.limit(np.zeros(2), np.array([1.0, 0.0]), jac, np.array([1.2, 0.0, 0.0]))
    back, f_back, _ = limits.limit(np.zeros(2), np.array([-1.0, 0.0]), jac, np.array([1.2, 0.0, 0.0]))
    np.testing.assert_allclose(out, [0.0, 0.0])
    np.testing.assert_allclose(back, [-1.0, 0.0])
    assert float(s_out) == 0.0 and int(f_back) == 0


def test_flags_name_each_part_and_torch_matches_numpy():
    # joint 0 at 0.95 asked for 1 rad/s with look-ahead 0.1 s: clipped to (1 - 0.95) / 0.1 = 0.5 (JOINT_LIMIT);
    # joint 1 asked for 3 rad/s > qd_max 1: uniform scale 1/3 (SPEED_CAP).
    q, qd = np.array([[0.95, 0.0]]), np.array([[1.0, 3.0]])
    jac = np.zeros((1, 3, 2))
    a, fa, _ = BOX.limit(q, qd, jac, np.zeros((1, 3)))
    np.testing.assert_allclose(a, [[0.5 / 3.0, 1.0]])
    assert int(fa[0]) == JOINT_LIMIT | SPEED_CAP
    b, fb, _ = BOX.limit(torch.as_tensor(q), torch.as_tensor(qd), torch.as_tensor(jac), torch.zeros(1, 3))
    np.testing.assert_allclose(b.numpy(), a, rtol=1e-12)
    assert int(fb[0]) == int(fa[0])


def test_belief_from_the_anchor_telescopes():
    # Bayes' rule with a Boltzmann likelihood exp(beta * progress) and floor 0: the posterior after many small
    # moves equals one update from start to end, since the progress terms sum (telescope). Steps of 0.4 mm
    # are below min_motion 1 mm: tracked from the anchor they still count.
    model = BoltzmannGoalBelief(beta=40.0, floor=0.0, min_motion=1e-3)
    targets = torch.tensor([[[[0.5, 0.2, 0.3]] * 2, [[0.5, -0.2, 0.3]] * 2]], dtype=torch.float64)  # [1, 2, 2, 3]
    start = torch.tensor([[0.3, 0.0, 0.3]], dtype=torch.float64)
    belief0 = model.initial(1, 2, start[:, 0])
    belief, anchor, updates = belief0, start, 0
    for k in range(1, 51):
        belief, anchor, moved = track(model, belief, anchor, start + torch.tensor([[0.0, 4e-4 * k, 0.0]]), targets)
        updates += int(moved[0])
    end = anchor
    once = model.update(belief0, start, end, targets)
    np.testing.assert_allclose(belief.numpy(), once.numpy(), rtol=1e-12)
    assert updates == 16 and belief[0, 0] > 0.6  # 50 * 0.4 mm in steps of 3 (1.2 mm), moving toward goal 0


# ------------------------------------------------------------------------------------------------- the seam
SPEC = ContextSpec(dof=7, n_goals=4)


@pytest.fixture(scope="module")
def bundle_and_policy(tmp_path_factory):
    torch.manual_seed(3)
    policy = DecoderPolicy.build({"_target_": "coreach_plugins.model.cvae.BeliefCVAE", "latent_dim": 2,
                                  "hidden": [32, 32]}, SPEC, 7)
    policy.set_normalisation(torch.randn(400, SPEC.width) * 0.5, torch.randn(400, 7) * 1.0 + 0.2)
    meta = {
        "goal_names": ["cup", "switch", "drawer", "bottle"],
        "nominal_layout": {
            "goal_pos": [[0.55, 0.20, 0.35], [0.50, -0.20, 0.45], [0.55, 0.0, 0.15], [0.45, 0.10, 0.50]],
            "goal_quat": [[0.7071068, 0.0, 0.7071068, 0.0]] * 4,
            "goal_fine": [[0.03, 0.0, 0.0], [0.0, 0.0, 0.05], [-0.05, 0.0, 0.0], [0.0, 0.0, 0.04]],
        },
        "dataset_fingerprint": "sha256:feed", "training_run_id": "run-seam", "git_commit": "0" * 40,
        "q_home": list(SEVEN_JOINT_ARM_HOME),
        "safety": {"workspace_min": [0.10, -0.25, 0.02], "workspace_max": [0.60, 0.25, 0.52]},
        "parity_n": 2000,
    }
    folder = write_bundle(tmp_path_factory.mktemp("seam") / "bundle", policy, shipped_urdf(), meta, {},
                          {"passed": True})
    return folder, policy


def test_vetting_machinery_and_runtime_session_give_the_same_commands(bundle_and_policy):
    """One episode (E = 2 identical rows, so the batched path is used) stepped by the vetting loop's pieces
    in torch float64 (kinematics, belief_tracker, build_context, the torch decoder, the loop's `_limit`) and by
    the runtime Session (numpy, float32 ONNX decoder): same commands within float32 tolerance."""
    folder, policy = bundle_and_policy
    session = Session.open(folder)
    limits, m = session.limits, session.manifest
    robot = UrdfArm()
    model = session.belief_model
    dt, E = 0.05, 2
    targets = torch.as_tensor(session._layout.targets, dtype=torch.float64).expand(E, -1, -1, -1)
    goal_rot = torch.as_tensor(session._layout.goal_rot, dtype=torch.float64).expand(E, -1, -1, -1)
    q_rt = m.q_home.copy()
    q = torch.as_tensor(m.q_home, dtype=torch.float64)[None].repeat(E, 1)
    belief = model.initial(E, m.n_goals, q[:, 0])
    anchor = None
    acted = 0
    for t in range(60):
        stick = np.array([0.9 * np.cos(0.2 * t), 0.9 * np.sin(0.2 * t)])
        qd_rt = session.step(stick, q_rt, now_s=t * dt)
        acted += session.last.position_limited or session.last.speed_capped or session.last.workspace_limited

        pos, rot, jac = _kinematics(robot, q, jacobian=True)
        if anchor is None:
            anchor = pos
        else:
            belief, anchor, _ = track(model, belief, anchor, pos, targets)
        s, _, _ = limits.condition_stick(torch.as_tensor(stick)[None].expand(E, -1))
        context = build_context(q, pos, rot, belief, targets, goal_rot)
        with torch.no_grad():
            raw = policy(s.float(), context.float()).double()
        qd, _ = _limit(limits, q, raw, jac[:, :3], pos, dt)

        np.testing.assert_allclose(qd[0].numpy(), qd_rt, atol=2e-4, rtol=2e-3)
        np.testing.assert_allclose(belief[0].numpy(), session.belief, atol=1e-9)
        q_rt = q_rt + qd_rt * dt
        q = q + qd * dt
    assert acted > 0  # the filter had work to do on this path, so the comparison covers it


def test_servo_dls_matches_the_textbook_formula_on_numpy_and_torch():
    # damped least squares (Wampler 1986): qd = J^T (J J^T + lambda^2 I)^-1 v; with lambda = 0 and a
    # full-row-rank J it is the minimum-norm solution, numpy.linalg.pinv(J) @ v.
    from coreach.control.servo import cap_norm, dls_step

    rng = np.random.default_rng(4)
    J, v = rng.normal(size=(3, 6, 7)), rng.normal(size=(3, 6))
    np.testing.assert_allclose(dls_step(J, v, 0.0), np.einsum("bij,bj->bi", np.linalg.pinv(J), v), atol=1e-9)
    lam = 0.1
    want = np.stack([J[b].T @ np.linalg.solve(J[b] @ J[b].T + lam**2 * np.eye(6), v[b]) for b in range(3)])
    np.testing.assert_allclose(dls_step(torch.as_tensor(J), torch.as_tensor(v), lam).numpy(), want, rtol=1e-10)
    # cap_norm by hand: (3, 4) has norm 5; capped at 1 -> (0.6, 0.8); (0.3, 0.4) is inside and passes
    np.testing.assert_allclose(cap_norm(np.array([[3.0, 4.0], [0.3, 0.4]]), 1.0), [[0.6, 0.8], [0.3, 0.4]])


def test_non_finite_names_every_bad_input():
    bad = BOX.non_finite(stick=[0.1, float("nan")], q=np.array([0.0, np.inf]), now_s=1.0, t=None,
                         ok=torch.zeros(2), worse=torch.tensor([0.0, float("-inf")]))
    assert bad == ["stick", "q", "t", "worse"]


def test_batched_loop_and_runtime_session_give_the_same_commands(bundle_and_policy):
    """The seam itself: the batched vetting loop (`rollout`) drives the bundle's decoder (the onnx_bundle
    interface) with the bundle's own filter for 3 episodes of a suite; then the runtime Session is fed, step by
    step, the same joint positions and the sticks the operator sent. Every command the loop applied must be
    the one the Session returns (same float32 ONNX graph, same filter code), and the beliefs must agree."""
    from coreach.decoder.onnx_interface import OnnxBundleInterface
    from coreach.runtime.session import limits_from_manifest
    from coreach.vetting.loop import rollout
    from coreach.vetting.suite import suite_from_dict

    folder, _ = bundle_and_policy
    session = Session.open(folder)
    m = session.manifest
    robot = UrdfArm(home=m.q_home.tolist())
    interface = OnnxBundleInterface(str(folder))
    # a tremor operator: its perturbed sticks take the loop's second path through the filter
    suite = suite_from_dict({"scenario": "bedside_shelf", "episodes": 3, "horizon_s": 4.0, "start_jitter": 0.05,
                             "operator": {"_target_": "coreach_plugins.operator.boltzmann.BoltzmannOperator",
                                          "beta": 300.0, "tremor_std": 0.15}}, "seam suite")  # fmt: skip
    record = rollout(robot, interface, suite.build_operator(), suite, session.belief_model,
                     limits_from_manifest(m), suite.generator(), stick_gain_every=0)  # fmt: skip
    q_all, qd_all, sticks = record.extras["q"], record.extras["qd"], record.extras["stick"]
    targets = record.extras["goal_targets"]  # [E, G, 2, 3]
    plan_rot = suite.episodes_plan(suite.generator(), robot).layout.approach_quat  # same plan as the rollout's
    compared = acted = 0
    for e in range(q_all.shape[0]):
        session.reset()
        session.set_goals(targets[e, :, 0].numpy(), plan_rot[e].numpy(), (targets[e, :, 1] - targets[e, :, 0]).numpy())
        for t in range(sticks.shape[1]):
            stick = sticks[e, t].numpy()
            qd_rt = session.step(np.nan_to_num(stick), q_all[e, t].numpy(), now_s=t * suite.step_dt)
            np.testing.assert_allclose(session.belief, record.belief[e, t].numpy(), atol=1e-9)
            if np.isfinite(stick).all():  # the loop drove this step (not holding after arrival)
                np.testing.assert_allclose(qd_all[e, t].numpy(), qd_rt, atol=1e-5, rtol=1e-4)
                compared += 1
                acted += session.last.limited
    assert compared > 50 and acted > 0  # many steps compared, some of them with a filter acting
