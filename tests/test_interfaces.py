"""Interface plugins: direct control and policy blending against numpy's SVD and the arm's kinematics, and
the decoder interface from memory, a folder, an MLflow run and the model registry."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import torch
from omegaconf import OmegaConf

from coreach import tracking
from coreach.context import ContextSpec, build_context
from coreach.errors import ConfigError
from coreach.host.registry import build_plugin
from coreach_plugins.interface.blend import PolicyBlending
from coreach.decoder.reference import label, load
from coreach.decoder.torch_interface import DecoderInterface
from coreach_plugins.interface.direct import DirectControl
from coreach.world.urdf_arm import UrdfArm
from coreach.decoder.policy import DecoderPolicy
from coreach.host.protocols import Interface
from coreach.world.scenario import load_scenario
from coreach.vetting.records import LoopState

CONF = Path(__file__).resolve().parents[1] / "conf" / "coreach_conf" / "interface"
CVAE = {"_target_": "coreach_plugins.model.cvae.BeliefCVAE", "latent_dim": 2, "hidden": [32, 32]}
E, G = 4, 4


@pytest.fixture(scope="module")
def robot():
    return UrdfArm()


def loop_state(robot, belief=None, seed: int = 0, dt: float = 0.1) -> LoopState:
    """E episodes near the arm's home pose on the shipped shelf scene (4 goals), float64."""
    g = torch.Generator().manual_seed(seed)
    layout = load_scenario("bedside_shelf").sample_layouts(E, g)
    q = robot.q_home.to(torch.float64) + 0.1 * torch.randn(E, robot.dof, generator=g, dtype=torch.float64)
    pos, rot = robot.fk(q)
    belief = torch.full((E, G), 1.0 / G, dtype=torch.float64) if belief is None else belief
    targets, goal_rot = layout.targets, layout.approach_rot
    ctx = build_context(q, pos, rot, belief, targets, goal_rot)
    return LoopState(0, q, pos, rot, robot.jacobian(q), belief, targets, goal_rot, ctx,
                     torch.zeros(E, dtype=torch.long), dt)  # fmt: skip


def small_policy(seed: int = 0, dtype=torch.float64) -> DecoderPolicy:
    torch.manual_seed(seed)
    return DecoderPolicy.build(CVAE, ContextSpec(dof=7, n_goals=G), 7).to(dtype).eval()


def numpy_mode_map(J: np.ndarray, damping: float, rows: tuple[int, int], scales: tuple[float, float]) -> np.ndarray:
    """Independent construction: J^T (J J^T + d^2 I)^-1 applied to the mode's two scaled twist axes [n, 2]."""
    J_dls = J.T @ np.linalg.inv(J @ J.T + damping**2 * np.eye(6))
    S = np.zeros((6, 2))
    S[rows[0], 0], S[rows[1], 1] = scales
    return J_dls @ S


# ---- direct control ----


@pytest.mark.parametrize("mode,rows,kind", [(0, (0, 1), "lin"), (1, (2, 5), "mix"), (2, (3, 4), "ang")])
def test_direct_stick_gain_matches_numpy_svd(robot, mode, rows, kind):
    iface = DirectControl(speed=0.2, angular_speed=0.7, damping=0.05)
    st = loop_state(robot)
    st.mode = torch.full((E,), mode, dtype=torch.long)
    scales = tuple(0.2 if r < 3 else 0.7 for r in rows)
    got = iface.stick_gain(st).numpy()
    for e in range(E):
        A = numpy_mode_map(st.jac[e].numpy(), 0.05, rows, scales)
        # numpy.linalg.svd is the reference; singular values come sorted in descending order
        assert got[e] == pytest.approx(np.linalg.svd(A, compute_uv=False)[-1], rel=1e-9)
    qd = iface.act(torch.tensor([[0.3, -0.8]], dtype=torch.float64), st)  # [E, 3, 1, n]
    expected = numpy_mode_map(st.jac[0].numpy(), 0.05, rows, scales) @ np.array([0.3, -0.8])
    np.testing.assert_allclose(qd[0, mode, 0].numpy(), expected, rtol=1e-9, atol=1e-12)


def test_direct_moves_the_tool_along_the_mode_axes(robot):
    # With negligible damping, DLS is the pseudo-inverse and J @ qd reproduces the requested twist exactly.
    iface = DirectControl(speed=0.15, angular_speed=0.6, damping=1e-6)
    st = loop_state(robot)
    qd = iface.act(torch.tensor([[1.0, 0.0], [0.0, -1.0]], dtype=torch.float64), st)  # [E, 3, 2, n]
    twist = torch.einsum("eij,emkj->emki", st.jac, qd)  # [E, 3, 2, 6]
    expect = torch.zeros(3, 2, 6, dtype=torch.float64)
    expect[0, 0, 0], expect[0, 1, 1] = 0.15, -0.15  # x, y
    expect[1, 0, 2], expect[1, 1, 5] = 0.15, -0.6  # z, yaw
    expect[2, 0, 3], expect[2, 1, 4] = 0.6, -0.6  # roll, pitch
    torch.testing.assert_close(twist, expect.expand_as(twist), atol=1e-6, rtol=0)


def test_direct_switch_cost_follows_the_loop_step(robot):
    iface = DirectControl(switch_cost_s=1.0)
    iface.reset(E, loop_state(robot, dt=0.25))
    assert iface.switch_cost_steps == 4
    iface.reset(E, loop_state(robot, dt=0.1))
    assert iface.switch_cost_steps == 10
    with pytest.raises(ConfigError, match="interface.speed"):
        DirectControl(speed=-1.0)


# ---- policy blending ----


def test_blend_at_uniform_belief_is_direct_control(robot):
    st = loop_state(robot)
    blend, direct = PolicyBlending(damping=0.05), DirectControl(damping=0.05)
    blend.reset(E, st)
    stick = torch.randn(6, 2, generator=torch.Generator().manual_seed(3), dtype=torch.float64)
    torch.testing.assert_close(blend.act(stick, st), direct.act(stick, st), rtol=0, atol=1e-12)
    torch.testing.assert_close(blend.stick_gain(st), direct.stick_gain(st), rtol=0, atol=1e-12)


def test_blend_at_certain_belief_moves_toward_the_most_likely_goal(robot):
    goal = 2
    belief = torch.zeros(E, G, dtype=torch.float64)
    belief[:, goal] = 1.0
    st = loop_state(robot, belief)
    blend = PolicyBlending(alpha_max=0.7)
    blend.reset(E, st)
    assert torch.allclose(blend.alpha(st.belief), torch.full((E,), 0.7, dtype=torch.float64))
    qd = blend.act(torch.zeros(1, 2, dtype=torch.float64), st)[:, 0, 0]  # [E, n], no stick: robot's part only
    # Behaviour, checked with the arm's own kinematics: a short step along qd brings the tool closer to the
    # goal's approach point in every episode.
    target = st.goal_targets[:, goal, 0]
    pos_after, _ = robot.fk(st.q + 0.05 * qd)
    assert ((pos_after - target).norm(dim=-1) < (st.ee_pos - target).norm(dim=-1) - 1e-3).all()
    # The stick keeps (1 - alpha) of its stick_gain, checked against numpy's SVD.
    A = numpy_mode_map(st.jac[0].numpy(), 0.05, (0, 1), (0.15, 0.15))
    assert float(blend.stick_gain(st)[0]) == pytest.approx(0.3 * np.linalg.svd(A, compute_uv=False)[-1], rel=1e-9)


def test_blend_heads_for_the_fine_motion_near_the_approach_point(robot):
    goal = 1
    belief = torch.zeros(E, G, dtype=torch.float64)
    belief[:, goal] = 1.0
    st = loop_state(robot, belief)
    up = torch.tensor([0.0, 0.0, 0.06], dtype=torch.float64)
    st.goal_targets = st.goal_targets.clone()
    st.goal_targets[:, goal, 0] = st.ee_pos + torch.tensor([0.01, 0.0, 0.0], dtype=torch.float64)  # 1 cm away
    st.goal_targets[:, goal, 1] = st.goal_targets[:, goal, 0] + up
    st.goal_rot = st.ee_rot[:, None].expand(E, G, 3, 3).clone()  # orientation already right: pure translation
    blend = PolicyBlending(damping=1e-4)
    blend.reset(E, st)
    v = torch.einsum("eij,ej->ei", st.jac[:, :3], blend.robot_action(st))  # [E, 3] tool velocity
    to_end = st.goal_targets[:, goal, 1] - st.ee_pos
    cos = (v * to_end).sum(-1) / (v.norm(dim=-1) * to_end.norm(dim=-1))
    assert (cos > 0.99).all()
    # Once in the fine motion, the servo keeps heading for its end while the tool stays on the segment,
    # although it is now more than fine_radius from the approach point.
    st.ee_pos = st.goal_targets[:, goal, 0] + 0.5 * up
    v = torch.einsum("eij,ej->ei", st.jac[:, :3], blend.robot_action(st))
    assert (v[:, 2] > 0).all()


# ---- decoder interface ----


def test_decoder_act_is_the_policy_on_every_episode_and_candidate(robot):
    policy = small_policy()
    iface = DecoderInterface(policy, "cvae")
    st = loop_state(robot)
    stick = torch.tensor([[0.0, 0.0], [1.0, -0.5], [-0.3, 0.9]], dtype=torch.float64)
    qd = iface.act(stick, st)
    assert qd.shape == (E, 1, 3, 7) and iface.n_modes == 1
    with torch.no_grad():
        for e in range(E):
            for k in range(3):
                torch.testing.assert_close(qd[e, 0, k], policy(stick[k], st.context[e]))


def test_decoder_stick_gain_matches_finite_difference_svd(robot):
    policy = small_policy(seed=1)
    policy.stick_scale.fill_(1.7)  # a non-trivial stick scale must enter the Jacobian too
    iface = DecoderInterface(policy, "cvae")
    st = loop_state(robot)
    got = iface.stick_gain(st).numpy()
    h = 1e-6
    with torch.no_grad():
        for e in range(E):
            cols = []
            for j in range(2):
                dz = torch.zeros(2, dtype=torch.float64)
                dz[j] = h
                cols.append((policy(dz, st.context[e]) - policy(-dz, st.context[e])).numpy() / (2 * h))
            J = np.stack(cols, axis=-1)  # [n, 2] central differences
            assert got[e] == pytest.approx(np.linalg.svd(J, compute_uv=False)[-1], rel=1e-6)


def test_decoder_from_a_folder(robot, tmp_path):
    policy = small_policy(seed=2, dtype=torch.float32)
    policy.save(tmp_path / "dec")
    st = loop_state(robot)
    stick = torch.tensor([[0.4, -0.2]], dtype=torch.float64)
    reference = DecoderInterface(policy, "ref").act(stick, st)
    loaded, source = load(str(tmp_path / "dec"), store="sqlite:///unused.db")
    iface = DecoderInterface(loaded, label(str(tmp_path / "dec")), source)
    assert isinstance(iface, Interface) and iface.name == "dec" and iface.source_ == str(tmp_path / "dec")
    torch.testing.assert_close(iface.act(stick, st), reference)
    (tmp_path / "empty").mkdir()
    with pytest.raises(ConfigError, match="decoder.json"):
        load(str(tmp_path / "empty"), "sqlite:///unused.db")
    with pytest.raises(ConfigError, match="expected an MLflow run id"):
        load("???", "sqlite:///unused.db")
    with pytest.raises(ConfigError, match="no such folder"):
        load(str(tmp_path / "not_there"), "sqlite:///unused.db")


def test_decoder_refuses_a_context_of_another_layout(robot):
    policy = DecoderPolicy.build(CVAE, ContextSpec(dof=7, n_goals=3), 7)
    iface = DecoderInterface(policy, "three_goals")
    with pytest.raises(ConfigError, match="3 goals"):
        iface.reset(E, loop_state(robot))


@pytest.fixture(scope="module")
def mlflow_store(tmp_path_factory):
    """A throwaway sqlite store with one run holding a decoder, one without, and a registered version."""
    from mlflow.tracking import MlflowClient

    root = tmp_path_factory.mktemp("mlflow")
    uri = f"sqlite:///{root / 'mlflow.db'}"
    client = MlflowClient(tracking_uri=uri)
    exp = client.create_experiment("t", artifact_location=(root / "artifacts").as_uri())
    policy = small_policy(seed=4, dtype=torch.float32)
    run_id = client.create_run(exp).info.run_id
    tracking.log_folder(client, run_id, policy.save, "decoder")  # the way coreach.training.run logs it
    client.set_terminated(run_id)
    bare = client.create_run(exp).info.run_id
    client.set_terminated(bare)
    client.create_registered_model("shelf-decoder")
    mv = client.create_model_version("shelf-decoder", f"runs:/{run_id}/decoder", run_id=run_id)
    client.set_registered_model_alias("shelf-decoder", "candidate", mv.version)
    return {"uri": uri, "run": run_id, "bare": bare, "version": mv.version, "policy": policy}


def test_decoder_from_mlflow_run_and_registry(robot, mlflow_store, monkeypatch):
    # the store is an argument: a variable naming another store must not matter
    monkeypatch.setenv("MLFLOW_TRACKING_URI", "sqlite:///elsewhere.db")
    st = loop_state(robot)
    stick = torch.tensor([[0.1, 0.7], [-1.0, 0.0]], dtype=torch.float64)
    reference = DecoderInterface(mlflow_store["policy"], "ref").act(stick, st)
    version = f"models:/shelf-decoder/{mlflow_store['version']}"
    for ref in (mlflow_store["run"], version, "models:/shelf-decoder@candidate"):
        policy, source = load(ref, mlflow_store["uri"])
        iface = DecoderInterface(policy, label(ref), source)
        assert iface.source_ == mlflow_store["run"]
        torch.testing.assert_close(iface.act(stick, st), reference)


def test_decoder_missing_run_or_artifact_names_the_run(mlflow_store):
    missing = "0123456789abcdef0123456789abcdef"
    with pytest.raises(ConfigError, match=missing):
        load(missing, mlflow_store["uri"])
    with pytest.raises(ConfigError, match=mlflow_store["bare"]):
        load(mlflow_store["bare"], mlflow_store["uri"])
    with pytest.raises(ConfigError, match="no-such-model"):
        load("models:/no-such-model/1", mlflow_store["uri"])


@pytest.mark.parametrize("name", ["direct", "blend"])
def test_yaml_matches_its_dataclass(name):
    import dataclasses
    import importlib

    cfg = OmegaConf.load(CONF / f"{name}.yaml")
    module, cls = cfg._target_.rsplit(".", 1)
    config_cls = getattr(importlib.import_module(module), cls + "Config")
    assert set(OmegaConf.to_container(cfg)) == {f.name for f in dataclasses.fields(config_cls)}
    merged = OmegaConf.merge(OmegaConf.structured(config_cls), cfg)
    assert OmegaConf.to_container(merged) == OmegaConf.to_container(cfg)
    iface = build_plugin(cfg, "interface")
    assert isinstance(iface, Interface) and iface.n_modes == 3 and iface.name == name


def test_per_episode_sticks_match_shared_candidates(robot):
    # The loop sends each episode's own (perturbed) stick as [E, 1, 2]; it must equal picking that stick
    # out of a shared candidate set.
    st = loop_state(robot)
    shared = torch.tensor([[0.5, -0.5], [0.2, 0.9], [-1.0, 0.3], [0.0, 0.0]], dtype=torch.float64)  # [K=E, 2]
    for iface in (DirectControl(), PolicyBlending(), DecoderInterface(small_policy(), "cvae")):
        iface.reset(E, st)
        all_k = iface.act(shared, st)  # [E, M, K, n]
        own = iface.act(shared[:, None, :], st)  # [E, M, 1, n]: episode e gets stick e
        torch.testing.assert_close(own[:, :, 0], all_k[torch.arange(E), :, torch.arange(E)])
        with pytest.raises(ConfigError, match="sticks of shape"):
            iface.act(torch.zeros(E + 1, 1, 2, dtype=torch.float64), st)
