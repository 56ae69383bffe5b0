"""The torch-free runtime session: its imports, its goal inference wiring and its always-on safety filter."""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
from hypothesis import event, given, settings
from hypothesis import strategies as st

from coreach.context import ContextSpec
from coreach.errors import DataError
from coreach.world.urdf_arm import SEVEN_JOINT_ARM_HOME, shipped_urdf
from coreach.decoder.policy import DecoderPolicy
from coreach.release.bundle_writer import write_bundle
from coreach.runtime.bundle import BundleError
from coreach.runtime.session import Session

pin = pytest.importorskip("pinocchio")

SPEC = ContextSpec(dof=7, n_goals=4)
# A box of +-0.25 m around the home tool position (0.35, 0, 0.27): random configurations often put the
# tool outside it, so both branches of the workspace filter are exercised.
WS_MIN, WS_MAX = [0.10, -0.25, 0.02], [0.60, 0.25, 0.52]


@pytest.fixture(scope="module")
def bundle(tmp_path_factory) -> Path:
    torch.manual_seed(0)
    policy = DecoderPolicy.build({"_target_": "coreach_plugins.model.cvae.BeliefCVAE", "latent_dim": 2,
                                  "hidden": [32, 32]}, SPEC, 7)
    # actions of ~1 rad/s so the decoder asks for more than the caps allow and the filters have work to do
    policy.set_normalisation(torch.randn(400, SPEC.width) * 0.5, torch.randn(400, 7) * 1.0 + 0.2)
    meta = {
        "goal_names": ["cup", "switch", "drawer", "bottle"],
        "nominal_layout": {
            "goal_pos": [[0.55, 0.20, 0.35], [0.50, -0.20, 0.45], [0.55, 0.0, 0.15], [0.45, 0.10, 0.50]],
            "goal_quat": [[0.7071068, 0.0, 0.7071068, 0.0]] * 4,
            "goal_fine": [[0.03, 0.0, 0.0], [0.0, 0.0, 0.05], [-0.05, 0.0, 0.0], [0.0, 0.0, 0.04]],
        },
        "dataset_fingerprint": "sha256:feed", "training_run_id": "run-session", "git_commit": "0" * 40,
        "q_home": list(SEVEN_JOINT_ARM_HOME),
        "safety": {"workspace_min": WS_MIN, "workspace_max": WS_MAX},
        "parity_n": 2000,
    }
    return write_bundle(tmp_path_factory.mktemp("rt") / "bundle", policy, shipped_urdf(), meta, {}, {"passed": True})


@pytest.fixture(scope="module")
def session(bundle) -> Session:
    return Session.open(bundle)


@pytest.fixture(scope="module")
def reference():
    """pinocchio model of the shipped arm: an independent check of tool position and speed."""
    model = pin.buildModelFromUrdf(shipped_urdf())
    return model, model.createData(), model.getFrameId("tool")


def _pin_pos_jac(reference, q):
    model, data, frame = reference
    pin.forwardKinematics(model, data, q)
    pin.updateFramePlacements(model, data)
    jac = pin.computeFrameJacobian(model, data, q, frame, pin.LOCAL_WORLD_ALIGNED)
    return data.oMf[frame].translation.copy(), jac[:3]


def _fresh(session: Session) -> Session:
    session.reset()
    session.reset_fault()
    m = session.manifest
    session.set_goals(m.goal_pos, m.goal_quat, m.goal_fine)
    return session


# --------------------------------------------------------------------------------------------- imports
def test_runtime_never_imports_torch_lightning_or_mlflow(bundle):
    script = f"""
import json, sys
import numpy as np
import coreach.runtime.session as rs
s = rs.Session.open({str(bundle)!r})
q = np.array(s.manifest.q_home)
for i in range(100):
    qd = s.step([0.6 * np.cos(i / 10), 0.6 * np.sin(i / 10)], q, i * 0.01)
    q = q + qd * 0.01
print(json.dumps({{"heavy": [m for m in ("torch", "lightning", "mlflow", "coreach.decoder.policy", "coreach.release.export")
                             if m in sys.modules], "moved": float(np.abs(q - s.manifest.q_home).max())}}))
"""
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    result = json.loads(out.stdout.strip().splitlines()[-1])
    assert result["heavy"] == []
    assert result["moved"] > 1e-3  # the 100 steps really drove the arm


def test_open_refuses_a_tampered_bundle(bundle, tmp_path):
    import shutil

    copy = Path(shutil.copytree(bundle, tmp_path / "b"))
    data = bytearray((copy / "decoder.onnx").read_bytes())
    data[-10] ^= 0xFF
    (copy / "decoder.onnx").write_bytes(bytes(data))
    with pytest.raises(BundleError, match="sha256"):
        Session.open(copy)


# ------------------------------------------------------------------------------------------ stick input
def test_deadband_zeroes_small_sticks(session):
    s = _fresh(session)
    q = s.manifest.q_home
    for i, stick in enumerate([(0.0, 0.0), (0.08, -0.08), (-0.05, 0.03), (0.079, 0.0)]):
        qd = s.step(stick, q, i * 0.01)
        assert np.all(qd == 0) and s.last.deadband, stick
    assert np.any(s.step((0.2, 0.0), q, 1.0) != 0) and not s.last.deadband


def test_deadband_rescales_continuously(session):
    # common practice: out = sign(s) (|s| - w) / (1 - w) per axis, so the output starts at 0 at the edge
    # and reaches 1 at full deflection; w = 0.08 here
    s = _fresh(session)
    q = s.manifest.q_home
    s.step((0.54, -1.0), q, 0.0)
    np.testing.assert_allclose(s.last.stick, [(0.54 - 0.08) / 0.92, -1.0], atol=1e-15)
    s.step((0.0800001, 0.5), q, 0.01)
    assert 0 < s.last.stick[0] < 1e-6


def test_stick_outside_the_box_is_clipped(session):
    s = _fresh(session)
    q = s.manifest.q_home
    a = s.step((7.0, -0.5), q, 0.0)
    assert s.last.stick_clipped
    b = s.step((1.0, -0.5), q, 0.01)
    np.testing.assert_array_equal(a, b)


# -------------------------------------------------------------------------------------- fault and watchdog
def test_nan_latches_a_fault_until_reset(session):
    s = _fresh(session)
    q = s.manifest.q_home
    assert np.any(s.step((0.5, 0.5), q, 0.0) != 0)
    assert np.all(s.step((math.nan, 0.5), q, 0.01) == 0) and "stick" in s.fault
    for i in range(5):  # good input does not clear it
        assert np.all(s.step((0.5, 0.5), q, 0.02 + i * 0.01) == 0) and s.last.fault is not None
    s.reset_fault()
    assert s.fault is None and np.any(s.step((0.5, 0.5), q, 0.1) != 0)
    q_bad = q.copy()
    q_bad[3] = math.inf
    assert np.all(s.step((0.5, 0.5), q_bad, 0.11) == 0) and "q" in s.fault
    s.reset_fault()
    assert np.all(s.step((0.5, 0.5), q, math.nan) == 0) and "now_s" in s.fault


def test_non_finite_decoder_output_latches_a_fault(bundle):
    s = Session.open(bundle)

    class NanDecoder:  # stands in for onnxruntime returning a broken value
        def run(self, names, feeds):
            return [np.full((1, 7), np.nan, dtype=np.float32)]

    s._ort = NanDecoder()
    assert np.all(s.step((0.5, 0.5), s.manifest.q_home, 0.0) == 0)
    assert "decoder output" in s.fault


def test_wrong_shapes_raise_and_fault(session):
    s = _fresh(session)
    with pytest.raises(DataError, match="stick"):
        s.step((0.5, 0.5, 0.5), s.manifest.q_home, 0.0)
    assert s.fault is not None
    s.reset_fault()
    with pytest.raises(DataError, match="goal_pos"):
        s.set_goals(np.zeros((3, 3)), np.ones((3, 4)), np.zeros((3, 3)))


def test_watchdog_zeroes_stale_and_future_sticks(session):
    s = _fresh(session)
    q = s.manifest.q_home
    assert s.manifest.watchdog_timeout_s == 0.2
    assert np.any(s.step((0.5, 0.5), q, 10.0, stick_time_s=10.0 - 0.15) != 0) and not s.last.stale
    assert np.all(s.step((0.5, 0.5), q, 10.0, stick_time_s=10.0 - 0.25) == 0) and s.last.stale
    assert np.all(s.step((0.5, 0.5), q, 10.0, stick_time_s=10.5) == 0) and s.last.stale
    assert s.fault is None  # stale input is not a fault: fresh input resumes at once
    assert np.any(s.step((0.5, 0.5), q, 10.3, stick_time_s=10.29) != 0)


# ----------------------------------------------------------------------------------------------- belief
def test_belief_follows_bayes_rule_from_the_anchor(session, reference):
    # Reference: Bayes' rule with a Boltzmann likelihood, P(g | motion) ~ P(g) exp(beta * progress_g),
    # progress_g = |p0 - g| - |p1 - g| for point goals (zero fine motion), computed here by hand.
    s = _fresh(session)
    q0 = np.array(SEVEN_JOINT_ARM_HOME)
    q1 = q0 + np.array([0.0, 0.05, 0.0, -0.08, 0.0, 0.0, 0.0])
    p0, _ = _pin_pos_jac(reference, q0)
    p1, _ = _pin_pos_jac(reference, q1)
    goals = np.array([p1 + 3 * (p1 - p0), p0 - 0.2 * np.array([0, 1.0, 0]), [0.6, 0.3, 0.6], [0.2, -0.3, 0.1]])
    s.set_goals(goals, np.tile([1.0, 0, 0, 0], (4, 1)), np.zeros((4, 3)))
    # many small steps, each shorter than min_motion (1 mm): the anchor makes them add up
    n = 100
    for i in range(n + 1):
        q = q0 + (q1 - q0) * i / n
        s.step((0.0, 0.0), q, i * 0.01)
    assert np.linalg.norm(p1 - p0) / n < s.manifest.belief["min_motion"]
    progress = np.linalg.norm(p0 - goals, axis=1) - np.linalg.norm(p1 - goals, axis=1)
    post = np.exp(s.manifest.belief["beta"] * progress)
    post /= post.sum()
    # the last update happened at the last anchor, within min_motion of p1
    np.testing.assert_allclose(s.belief, post, atol=0.05)
    assert np.argmax(s.belief) == 0 and s.belief[0] > 0.4  # prior 0.25: moving toward goal 0 raised it


# --------------------------------------------------------------------------------------- safety filter
def _check_limits(session, reference, q, qd):
    m = session.manifest
    dt = m.lookahead_s
    assert qd.shape == (7,) and np.isfinite(qd).all()
    assert np.all(np.abs(qd) <= m.qd_max)
    pos, jac = _pin_pos_jac(reference, q)
    assert np.linalg.norm(jac @ qd) <= m.tcp_speed_max + 1e-9
    nxt = q + qd * dt
    inside = (q >= m.q_lower) & (q <= m.q_upper)
    assert np.all(nxt[inside] >= m.q_lower[inside] - 1e-9) and np.all(nxt[inside] <= m.q_upper[inside] + 1e-9)
    assert np.all(qd[q > m.q_upper] <= 0) and np.all(qd[q < m.q_lower] >= 0)  # outside: only back in
    ahead = pos + jac @ qd * dt
    lo, hi = m.workspace_min, m.workspace_max
    assert np.all((ahead <= hi + 1e-9) | (ahead <= pos + 1e-12))
    assert np.all((ahead >= lo - 1e-9) | (ahead >= pos - 1e-12))


def test_filters_act_and_hold_on_random_states(session, reference):
    s = _fresh(session)
    m = s.manifest
    rng = np.random.default_rng(0)
    hits = {"speed": 0, "position": 0, "workspace": 0}
    for i in range(300):
        q = rng.uniform(m.q_lower, m.q_upper)
        if i % 3 == 0:  # near a position limit
            j = rng.integers(7)
            q[j] = m.q_upper[j] - rng.uniform(0, 0.02) if rng.random() < 0.5 else m.q_lower[j] + rng.uniform(0, 0.02)
        stick = rng.uniform(-1, 1, size=2)
        qd = s.step(stick, q, i * 0.01)
        _check_limits(s, reference, q, qd)
        info = s.last
        hits["speed"] += info.speed_capped
        hits["position"] += info.position_limited
        hits["workspace"] += info.workspace_limited
    assert all(v > 5 for v in hits.values()), hits  # the property above is not vacuous


def test_tool_speed_cap_scales_to_exactly_the_cap(session, reference):
    s = _fresh(session)
    q = s.manifest.q_home
    qd = s.step((1.0, 1.0), q, 0.0)
    assert s.last.speed_capped
    _, jac = _pin_pos_jac(reference, q)
    # uniform scaling keeps the direction of what the decoder asked for
    raw = s.last.qd_decoder
    cos = raw @ qd / (np.linalg.norm(raw) * np.linalg.norm(qd))
    assert not (s.last.position_limited or s.last.workspace_limited)  # home is far from limits and walls
    assert cos == pytest.approx(1.0, abs=1e-12)
    ratio = max(np.max(np.abs(qd) / s.manifest.qd_max), np.linalg.norm(jac @ qd) / s.manifest.tcp_speed_max)
    assert ratio == pytest.approx(1.0, abs=1e-9)


finite = st.floats(-4.0, 4.0)
wild = st.one_of(st.just(math.nan), st.just(math.inf), st.just(-math.inf), st.floats(-1e300, 1e300),
                 st.floats(allow_nan=True, allow_infinity=True))
# Mostly plausible values with some wild ones, so a stream both faults and spends steps un-faulted.
stick_st = st.lists(st.one_of(st.floats(-1.5, 1.5), st.floats(-1.5, 1.5), st.floats(-0.1, 0.1), wild),
                    min_size=2, max_size=2)
event_st = st.tuples(
    stick_st,
    st.sampled_from(["inside", "inside", "inside", "edge", "wild"]),  # how q is drawn
    st.lists(st.floats(0.0, 1.0), min_size=7, max_size=7),  # position within the limits
    st.one_of(st.none(), st.floats(0.0, 0.15), st.floats(-0.1, 0.5), wild),  # stick age (s); None = read now
    st.floats(0.0, 0.05),  # time step (s)
    st.booleans(),  # operator resets a latched fault before this step
)


@settings(max_examples=80, deadline=None)
@given(events=st.lists(event_st, min_size=1, max_size=25), q_wild=st.lists(wild, min_size=7, max_size=7))
def test_no_limit_is_ever_exceeded_on_arbitrary_streams(session, reference, events, q_wild):
    s = _fresh(session)
    m = s.manifest
    timeout = m.watchdog_timeout_s
    now, faulted = 100.0, False
    for stick, q_kind, u, age, dt, reset in events:
        if reset:
            s.reset_fault()
            faulted = False
        now += dt
        u = np.array(u)
        if q_kind == "inside":
            q = m.q_lower + u * (m.q_upper - m.q_lower)
        elif q_kind == "edge":  # up to 0.05 rad outside the limits
            q = np.where(u < 0.5, m.q_lower, m.q_upper) + (u - 0.5) * 0.1
        else:
            q = np.array(q_wild)
        t_stick = None if age is None else now - age
        qd = s.step(stick, q, now, stick_time_s=t_stick)
        assert qd.shape == (7,) and np.isfinite(qd).all()
        bad_input = not (np.isfinite(stick).all() and np.isfinite(q).all() and (age is None or math.isfinite(t_stick)))
        if bad_input:
            faulted = True
            assert s.fault is not None
        if faulted or s.fault is not None:  # latched: zero until reset_fault
            faulted = True
            assert np.all(qd == 0) and s.last.fault is not None
            event("latched fault")
            continue
        stale = age is not None and not 0.0 <= now - t_stick <= timeout
        if stale:
            assert np.all(qd == 0) and s.last.stale
            event("stale")
            continue
        _check_limits(s, reference, q, qd)
        event("limits checked, filter acted" if s.last.limited else "limits checked")


# ---------------------------------------------------------------------------------------------- bench
def test_runtime_bench_reports_both_sides(bundle):
    from coreach.runtime.latency import run_runtime_bench

    out = run_runtime_bench(bundle, steps=200)
    for key in ("session_p50_us", "session_p99_us", "bare_p50_us", "bare_p99_us", "ratio_p99"):
        assert out[key] > 0, key
    assert out["session_p99_us"] >= out["session_p50_us"]
    assert out["decoder_runs"] == 200  # every timed step really ran the decoder
