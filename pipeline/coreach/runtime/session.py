"""The control-rate step on the robot computer: kinematics, goal belief, context, ONNX decoder, safety filter.

Imports only numpy, onnxruntime and the shared array-API modules (coreach.context, coreach.control); the belief
model is rebuilt from the manifest through the host's allow-list (coreach.runtime.belief_manifest), so the same
belief, context and safety-filter code that trained and vetted the decoder runs here without torch.

Safety filter, in order (always on):
1. any non-finite stick, q or timestamp -> zero and a latched fault (cleared only by `reset_fault`);
2. watchdog: a stick sample older than `watchdog_timeout_s` (or from the future) -> zero;
3. stick clipped to the box [-1, 1]^d, then a per-axis deadband rescaled so the stick stays continuous;
   a stick inside the deadband on every axis -> zero (a released stick stops the arm);
4. non-finite decoder output -> zero and a latched fault;
5. joint position look-ahead, joint speed and tool speed caps, workspace box (SafetyLimits.limit).
Steps 1-3 and 5 are coreach.control.safety_filter, the same code vetting runs; the belief follows
coreach.control.belief_tracker's cadence (updates from an anchor pose), as in training replay and vetting.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import onnxruntime as ort

from coreach.context import build_context, goal_features
from coreach.errors import DataError
from coreach.runtime.belief_manifest import belief_from_manifest
from coreach.runtime.bundle import BundleError, Manifest, sha256_bytes, verify_bundle
from coreach.runtime.kinematics import Chain, quat_to_matrix
from coreach.control.belief_tracker import track
from coreach.control.safety_filter import JOINT_LIMIT, SEPARATION, SPEED_CAP, SafetyLimits
from coreach.runtime.arm_world import ArmWorld
from coreach.world.scene_bodies import world_from_json

# keep_inside computes 0 * (limit - q): an infinite (continuous-joint) limit would give nan, so unbounded
# joints get a bound no arm reaches instead.
_UNBOUNDED = 1e6


@dataclass
class StepInfo:
    """What happened in the last `Session.step`: inputs as used, and which filters acted."""

    now_s: float
    stick: np.ndarray  # [d] after box clipping and deadband (zeros when not used)
    qd_decoder: np.ndarray  # [n] decoder output before the filters (zeros when the decoder did not run)
    qd: np.ndarray  # [n] the command returned
    ee_pos: np.ndarray  # [3] tool position at q (nan when q was not usable)
    context: np.ndarray | None = None  # [1, C] float32 raw context the decoder saw (None if it did not run)
    fault: str | None = None  # set when the session is (or just became) faulted
    stale: bool = False  # watchdog: stick sample too old (or from the future)
    stick_clipped: bool = False
    deadband: bool = False  # stick inside the deadband on every axis -> zero command
    position_limited: bool = False  # look-ahead clipped a joint approaching its position limit
    speed_capped: bool = False  # joint speed or tool speed cap scaled the command down
    workspace_scale: float = 1.0  # < 1 when the workspace box scaled the command down
    separation_held: bool = False  # the separation step scaled the command down (bodies near)
    belief_updated: bool = False

    @property
    def workspace_limited(self) -> bool:
        return self.workspace_scale < 1.0

    @property
    def zeroed(self) -> bool:
        """The command was forced to zero (fault, watchdog or deadband)."""
        return self.fault is not None or self.stale or self.deadband

    @property
    def limited(self) -> bool:
        """Any filter changed what the stick and decoder asked for."""
        return (self.zeroed or self.stick_clipped or self.position_limited or self.speed_capped
                or self.workspace_limited or self.separation_held)


@dataclass
class _Layout:
    targets: np.ndarray  # [1, G, 2, 3] approach point, end of fine motion
    goal_rot: np.ndarray  # [1, G, 3, 3]
    features: np.ndarray  # [1, G, 12] coreach.context.goal_features of the layout


class Session:
    """One decoder on one arm. Build with `Session.open(bundle_folder)`; call `step` at the control rate.

    `last` is the StepInfo of the latest step, `belief` the goal belief, `fault` the latched fault.

    Cautions (the full text: `coreach.runtime.cautions.CAUTIONS`; print it with `caution_lines()`): this is
    research software, not a medical device, and has not been certified as one. Before a Session drives an
    arm near a person: an ethics review (and each participant's informed consent where drives are recorded),
    a hardware emergency stop within reach of the user and the supervisor, and speed and force limits set per
    ISO 10218-1/-2 and ISO/TS 15066 (ISO 13482 for personal-care robots); follow your local regulations and
    qualified professionals. The safety filter inside `step` is always on and reduces risk; it does not
    replace those measures, and it keeps the arm only from the bodies the manifest models: it senses no one.
    """

    def __init__(self, manifest: Manifest, chain: Chain, decoder: ort.InferenceSession):
        self.manifest = manifest
        self.chain = chain
        self._ort = decoder
        self.last: StepInfo | None = None
        m = manifest
        self.belief_model = belief_from_manifest(m.belief)
        self.limits = limits_from_manifest(m)
        self._qd_max = m.qd_max.copy()
        self._d, self._n = m.latent_dim, m.action_dim
        self._out_names = [self._ort.get_outputs()[0].name]
        self._fault: str | None = None
        self._stick_in = np.zeros((1, self._d), dtype=np.float32)
        self.arm: ArmWorld | None = arm_world_from_manifest(m, chain)
        self.set_goals(m.goal_pos, m.goal_quat, m.goal_fine)
        self.reset()

    def __repr__(self) -> str:
        return (f"Session(bundle={str(self.manifest.folder)!r}, joints={self._n}, goals={self.manifest.n_goals}, "
                f"fault={self._fault!r})")

    # ------------------------------------------------------------------------------------------ set-up
    @classmethod
    def open(cls, bundle_folder: str | Path) -> Session:
        """Verify the bundle (hashes, schema, listing), then load its robot and decoder."""
        m = verify_bundle(bundle_folder)
        urdf = _read_checked(m, "robot.urdf").decode("utf-8")
        chain = Chain.from_string(urdf, m.tool_link, str(m.path("robot.urdf")))
        _check_robot(m, chain)
        opts = ort.SessionOptions()
        opts.intra_op_num_threads = 1  # one control loop, one core; thread hand-offs cost more than they save
        opts.inter_op_num_threads = 1
        opts.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
        opts.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
        try:
            sess = ort.InferenceSession(_read_checked(m, "decoder.onnx"), opts, providers=["CPUExecutionProvider"])
        except Exception as exc:  # onnxruntime raises its own exception types
            raise BundleError(str(m.path("decoder.onnx")), f"onnxruntime cannot load it: {exc}") from None
        _check_graph(m, sess)
        return cls(m, chain, sess)

    def set_goals(self, goal_pos, goal_quat, goal_fine) -> None:
        """Goal layout from the robot computer's perception: approach points [G, 3] (m, base frame),
        approach orientations [G, 4] (w, x, y, z), fine-motion displacements [G, 3] (m). G and the goal
        order are the bundle's (manifest goal_names); the belief is kept."""
        g = self.manifest.n_goals
        pos = _array(goal_pos, (g, 3), "session.set_goals goal_pos")
        quat = _array(goal_quat, (g, 4), "session.set_goals goal_quat")
        fine = _array(goal_fine, (g, 3), "session.set_goals goal_fine")
        if np.any(np.linalg.norm(quat, axis=-1) < 1e-9):
            raise DataError("session.set_goals goal_quat", "expected non-zero quaternions (w, x, y, z)")
        targets, goal_rot = np.stack([pos, pos + fine], axis=1)[None], quat_to_matrix(quat)[None]
        self._layout = _Layout(targets, goal_rot, goal_features(targets, goal_rot))

    def set_obstacles(self, poses: dict) -> None:
        """Move bodies of the bundle's scene (furniture or the person's) from the robot computer's perception:
        {name: (xyz [3] m, rpy [3] rad)} in the world frame; shapes and sizes stay the bundle's. An unknown name
        or a non-finite pose raises DataError and changes nothing."""
        if self.arm is None:
            raise DataError("session.set_obstacles", "the bundle has no scene bodies (manifest safety.world is {})")
        names = set(self.arm.world.body_names)
        checked = {}
        for name, pose in dict(poses).items():
            if name not in names:
                raise DataError("session.set_obstacles", f"unknown body {name!r}; expected one of {sorted(names)}")
            try:
                xyz, rpy = pose
            except (TypeError, ValueError):
                raise DataError(f"session.set_obstacles {name}", "expected (xyz [3], rpy [3])") from None
            checked[name] = (_array(xyz, (3,), f"session.set_obstacles {name} xyz"),
                             _array(rpy, (3,), f"session.set_obstacles {name} rpy"))
        self.arm.world.set_poses(checked)

    def reset(self) -> None:
        """Start a new task: belief back to the uniform prior; the next step's tool position is the
        reference for goal inference. A latched fault stays latched (see `reset_fault`)."""
        self._belief = self.belief_model.initial(1, self.manifest.n_goals, np.zeros(1))  # [1, G]
        self._anchor: np.ndarray | None = None

    def reset_fault(self) -> None:
        """Clear a latched fault, after the operator has checked why it happened."""
        self._fault = None

    @property
    def fault(self) -> str | None:
        """Why the session is faulted (zero output until `reset_fault`), or None."""
        return self._fault

    @property
    def belief(self) -> np.ndarray:
        """Current belief over the goals [G] (manifest goal_names order)."""
        return self._belief[0].copy()

    # ------------------------------------------------------------------------------------------ control
    def step(self, stick, q, now_s: float, stick_time_s: float | None = None) -> np.ndarray:
        """Joint velocity command qd [n] (rad/s) for stick [d] and measured joint positions q [n] (rad).

        now_s: the control loop's clock (s). stick_time_s: when the stick sample was read, on the same
        clock; None means "read now" (= now_s). The watchdog zeroes the command when
        now_s - stick_time_s > watchdog_timeout_s, or when the sample claims to come from the future.
        """
        n = self._n
        # the stick has 2-3 axes: plain floats are cheaper than numpy calls for it
        stick = self._vector(stick, self._d, "stick").tolist()
        q = self._vector(q, n, "q")
        t_stick = now_s if stick_time_s is None else stick_time_s
        zero = np.zeros(n)
        info = StepInfo(now_s=now_s, stick=np.zeros(self._d), qd_decoder=np.zeros(n), qd=zero,
                        ee_pos=np.full(3, np.nan))
        self.last = info
        if self._fault is None:
            bad = self.limits.non_finite(stick=stick, q=q, now_s=now_s, stick_time_s=t_stick)
            if bad:
                self._fault = f"non-finite {', '.join(bad)} at now_s={now_s!r}"
        if self._fault is not None:
            info.fault = self._fault
            return zero

        frames = [] if self.arm is not None else None
        pos, rot, jac = self.chain.fk_jacobian(q, frames)
        info.ee_pos = pos
        info.belief_updated = self._track_belief(pos)

        limits = self.limits
        if limits.stale(now_s, t_stick):
            info.stale = True
            return zero

        s, clipped, released = limits.condition_stick(np.asarray(stick))
        info.stick_clipped = bool(clipped)
        if released:
            info.deadband = True
            return zero
        info.stick = s

        layout = self._layout
        context = build_context(q[None], pos[None], rot[None], self._belief, layout.targets, layout.goal_rot,
                                layout.features)
        info.context = context = context.astype(np.float32)  # [1, C]
        qd = self._decode(s, context, q, pos, rot, jac)
        info.qd_decoder = qd
        if not np.isfinite(qd).all():
            return self._latch(info, "decoder output is not finite")

        separation = None if self.arm is None else self.arm.separation(q, frames[0])
        qd, flags, scale = limits.limit(q, qd, jac[:3], pos, None, separation)
        info.position_limited = bool(flags & JOINT_LIMIT)
        info.speed_capped = bool(flags & SPEED_CAP)
        info.separation_held = bool(flags & SEPARATION)
        info.workspace_scale = float(scale)
        qd = np.minimum(np.maximum(qd, -self._qd_max), self._qd_max)  # guards the last ulp of the scalings
        if not np.isfinite(qd).all():
            return self._latch(info, "safety filter produced a non-finite command")
        info.qd = qd
        return qd

    def _decode(self, s: np.ndarray, context: np.ndarray, q, pos, rot, jac) -> np.ndarray:
        """The interface's joint velocity [n] for the conditioned stick s [d] at this state: the bundle's
        decoder. A study's baseline conditions (direct control, blending) replace this one method, so they
        drive through the same belief, limits and separation step as the decoder they are compared with."""
        self._stick_in[0] = s
        (out,) = self._ort.run(self._out_names, {"stick": self._stick_in, "context": context})
        return out[0].astype(np.float64)

    def preview(self, sticks, q) -> np.ndarray:
        """What each of the sticks [K, d] would command at q, before the filters (box and deadband applied as
        `step` applies them; a released stick commands zero): joint velocities [M, K, n], M the interface's
        modes (1 for a decoder). For a simulated operator choosing a stick and the page's action map; it
        neither steps the belief nor changes any state."""
        q = np.asarray(q, dtype=np.float64)
        pos, rot, jac = self.chain.fk_jacobian(q)
        shaped, _, released = self.limits.condition_stick(np.asarray(sticks, dtype=np.float64))
        layout = self._layout
        context = build_context(q[None], pos[None], rot[None], self._belief, layout.targets, layout.goal_rot,
                                layout.features).astype(np.float32)  # fmt: skip
        out = self._preview(shaped, context, q, pos, rot, jac)
        out[:, released] = 0.0
        return out

    def _preview(self, shaped, context, q, pos, rot, jac) -> np.ndarray:
        k = len(shaped)
        (out,) = self._ort.run(self._out_names, {"stick": shaped.astype(np.float32),
                                                 "context": np.repeat(context, k, axis=0)})  # fmt: skip
        return out.astype(np.float64)[None]

    # ------------------------------------------------------------------------------------------ helpers
    def _vector(self, value, length: int, name: str) -> np.ndarray:
        try:
            arr = np.asarray(value, dtype=np.float64)
        except (TypeError, ValueError, OverflowError):
            arr = None
        if arr is None or arr.shape != (length,):
            shown = "not numeric" if arr is None else f"shape {list(arr.shape)}"
            self._fault = f"bad {name} input ({shown})"
            raise DataError(f"session.step {name}", f"expected {length} numbers, got {shown}; session faulted")
        return arr

    def _latch(self, info: StepInfo, why: str) -> np.ndarray:
        self._fault = f"{why} at now_s={info.now_s!r}"
        info.fault = self._fault
        info.qd = np.zeros(self._n)
        return info.qd

    def _track_belief(self, pos: np.ndarray) -> bool:
        """coreach.control.belief_tracker's cadence: update once the tool has moved min_motion from the anchor
        (the pose of the last update). The distance test runs first on plain floats: most steps stop there."""
        if self._anchor is None:
            self._anchor = pos[None]
            return False
        if math.dist(pos, self._anchor[0]) < self.belief_model.min_motion:
            return False
        self._belief, self._anchor, _ = track(self.belief_model, self._belief, self._anchor, pos[None],
                                              self._layout.targets)
        return True


def arm_world_from_manifest(m: Manifest, chain: Chain) -> ArmWorld | None:
    """The bundle's scene bodies and sphere model on its arm (None when the manifest has none)."""
    if not m.world:
        return None
    obstacles, person, settings, links = world_from_json(m.world, "safety.world")
    unknown = sorted(set(links["links"]) - set(chain.link_frames))
    if unknown:
        raise BundleError(str(m.path("manifest.json")), f"safety.world.links names links {unknown} that robot.urdf's "
                                                       "root-to-tool path does not have")  # fmt: skip
    return ArmWorld.build(chain, links["links"], links["centres"], links["radii"], links["self_pairs"], obstacles,
                          person, settings)


def limits_from_manifest(m: Manifest) -> SafetyLimits:
    """The bundle's whole safety filter, as the manifest records it (what vetting measured before release)."""
    lower = np.where(np.isfinite(m.q_lower), m.q_lower, -_UNBOUNDED)
    upper = np.where(np.isfinite(m.q_upper), m.q_upper, _UNBOUNDED)
    return SafetyLimits(qd_max=tuple(m.qd_max.tolist()), tcp_speed_max=m.tcp_speed_max,
                        q_lower=tuple(lower.tolist()), q_upper=tuple(upper.tolist()),
                        workspace_min=tuple(m.workspace_min.tolist()), workspace_max=tuple(m.workspace_max.tolist()),
                        lookahead_s=m.lookahead_s, stick_low=m.stick_low, stick_high=m.stick_high, deadband=m.deadband,
                        watchdog_timeout_s=m.watchdog_timeout_s)  # fmt: skip


def _array(value, shape: tuple[int, ...], where: str) -> np.ndarray:
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError, OverflowError):
        raise DataError(where, f"expected numbers of shape {list(shape)}") from None
    if arr.shape != shape or not np.isfinite(arr).all():
        raise DataError(where, f"expected finite numbers of shape {list(shape)}, got shape {list(arr.shape)}")
    return arr.copy()


def _read_checked(m: Manifest, name: str) -> bytes:
    """The bytes actually loaded, hashed again so a file swapped after verification is refused."""
    data = m.path(name).read_bytes()
    if sha256_bytes(data) != m.files[name]:
        raise BundleError(str(m.path(name)), "changed since the bundle was verified; sha256 differs")
    return data


def _check_robot(m: Manifest, chain: Chain) -> None:
    """The manifest's limits may be tighter than the URDF's (a release may reduce speed), never looser."""
    where = str(m.path("manifest.json"))
    if tuple(chain.joint_names) != m.joint_names:
        raise BundleError(where, f"joint_names {list(m.joint_names)} differ from robot.urdf {chain.joint_names}")
    if np.any(m.q_lower < chain.q_lower) or np.any(m.q_upper > chain.q_upper):
        raise BundleError(where, "robot.q_lower/q_upper are wider than the URDF's joint limits")
    if np.any(m.qd_max > chain.qd_max * (1 + 1e-12)):
        raise BundleError(where, "robot.qd_max exceeds the URDF's velocity limits")


def _check_graph(m: Manifest, sess: ort.InferenceSession) -> None:
    where = str(m.path("decoder.onnx"))
    inputs = {i.name: i.shape for i in sess.get_inputs()}
    outputs = {o.name: o.shape for o in sess.get_outputs()}
    want_in = {"stick": m.latent_dim, "context": m.context_dim}
    if set(inputs) != set(want_in) or any(inputs[k][-1] != v for k, v in want_in.items()):
        raise BundleError(where, f"inputs {inputs}; expected stick [batch, {m.latent_dim}] and context "
                                 f"[batch, {m.context_dim}]")
    if list(outputs) != ["qd"] or outputs["qd"][-1] != m.action_dim:
        raise BundleError(where, f"outputs {outputs}; expected qd [batch, {m.action_dim}]")
