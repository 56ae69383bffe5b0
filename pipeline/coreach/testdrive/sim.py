"""The simulated arm the bundle's own runtime Session drives: kinematic integration, goal progress, recording.

Torch-free (numpy, onnxruntime and the runtime modules) so it runs on the robot-side install. The server's
control loop calls `Drive.tick` at the control rate; the page only sends stick samples and commands.
"""

from __future__ import annotations

import math
import threading
import time
import uuid
from collections import deque
from pathlib import Path

import numpy as np
import onnxruntime as ort

from coreach.context import build_context
from coreach.world.geometry import angle_between
from coreach.runtime.bundle import BundleError, sha256_bytes, sha256_file
from coreach.runtime.kinematics import Chain, quat_to_matrix
from coreach.runtime.session import Session
from coreach.world.urdf import parse_path

PATH_POINTS = 400  # tool-path points kept for the page (8 s at 50 Hz)
MAP_GRID = 5  # action map: MAP_GRID x MAP_GRID sticks over the box
MAX_RECORD_STEPS = 60_000  # 20 min at 50 Hz: a forgotten recording stops growing
NEVER = -1e9  # stick time before any input arrived: finite (a non-finite time would latch a fault), and stale
FLAGS = ("stale", "deadband", "stick_clipped", "position_limited", "speed_capped", "separation_held")


def goal_progress(phase: int, pos, rot, targets: np.ndarray, goal_rot: np.ndarray, pos_tol: float,
                  ang_tol: float) -> int:  # fmt: skip
    """Next phase of one goal: 0 seeking the approach pose, 1 seeking the end of the fine motion, 2 arrived.

    The same rule as closed-loop vetting: approach point within pos_tol with the orientation within ang_tol,
    then the end of the fine motion within pos_tol with the orientation still within ang_tol.
    targets [2, 3] (approach point, end of fine motion); goal_rot [3, 3].
    """
    if phase >= 2:
        return 2
    if float(angle_between(rot, goal_rot)) >= ang_tol or math.dist(pos, targets[phase]) >= pos_tol:
        return phase
    return phase + 1


class LinkFrames:
    """Frames of every link on the root-to-tool path at q, from prefix chains of the bundle's URDF (the
    runtime's Chain, so the drawing and the Session's kinematics cannot disagree)."""

    def __init__(self, urdf: str, tool_link: str):
        joints = parse_path(urdf, tool_link)
        self.names, self._chains, self._dofs = [], [], []
        n = 0
        for i, j in enumerate(joints):
            if j.movable:
                n += 1
                self.names.append(j.child)
                self._chains.append(Chain(joints[: i + 1], j.child))
                self._dofs.append(n)

    def at(self, q: np.ndarray) -> list[tuple[np.ndarray, np.ndarray]]:
        return [c.fk(q[:k]) for c, k in zip(self._chains, self._dofs)]


class Drive:
    """One bundle on one simulated arm, stepped by `tick`; all methods are thread-safe."""

    def __init__(self, session: Session, rate_hz: float = 50.0, position_tol: float = 0.02,
                 orientation_tol_deg: float = 15.0, record_dir: str | Path = "drives",
                 clock=time.monotonic):  # fmt: skip
        self.session = session
        m = self.manifest = session.manifest
        self.dt = 1.0 / float(rate_hz)
        self.position_tol, self.orientation_tol = float(position_tol), math.radians(orientation_tol_deg)
        self.record_dir = Path(record_dir)
        self.session_id = uuid.uuid4().hex[:12]
        self.manifest_sha256 = sha256_file(m.path("manifest.json"))
        self._clock, self._t0 = clock, clock()
        self._lock = threading.Lock()
        self.targets = np.stack([m.goal_pos, m.goal_pos + m.goal_fine], axis=1)  # [G, 2, 3]
        self.goal_rot = quat_to_matrix(m.goal_quat)  # [G, 3, 3]
        urdf = m.path("robot.urdf").read_bytes()
        if sha256_bytes(urdf) != m.files["robot.urdf"]:
            raise BundleError(str(m.path("robot.urdf")), "changed since the bundle was verified; sha256 differs")
        self.links = LinkFrames(urdf.decode("utf-8"), m.tool_link)
        self._map_ort = _map_decoder(m)
        self.stick = [0.0] * m.latent_dim
        self.stick_time = NEVER
        self.input_source = "none"
        self.target = 0
        self.saved: list[str] = []
        self.error: str | None = None  # set when the control loop stopped on an unexpected exception
        self._recording: list[dict] | None = None
        self._episode = 0
        self._reset_arm()

    # ------------------------------------------------------------------------------------------ inputs
    def now(self) -> float:
        return self._clock() - self._t0

    def set_stick(self, stick, source: str = "page") -> None:
        """A stick sample from the page; its time is when the server received it (the watchdog's clock)."""
        values = [float(v) for v in list(stick)[: self.manifest.latent_dim]]
        values += [0.0] * (self.manifest.latent_dim - len(values))
        with self._lock:
            self.stick, self.stick_time, self.input_source = values, self.now(), str(source)[:16]

    def reset(self) -> str | None:
        """Arm home, belief uniform, goals un-reached; a running recording is saved and a new one begins."""
        saved = self.stop_recording() if self._recording is not None else None
        with self._lock:
            self._reset_arm()
        if saved is not None:
            self.start_recording()
        return saved

    def pick_target(self, goal: int) -> None:
        with self._lock:
            self.target = int(goal) % self.manifest.n_goals

    def reset_fault(self) -> None:
        with self._lock:
            self.session.reset_fault()

    def start_recording(self) -> None:
        with self._lock:
            if self._recording is None:
                self._recording = []

    def stop_recording(self) -> str | None:
        """End the drive being recorded and save it (None when it was too short to be an episode)."""
        from coreach.testdrive.recording import save_drive  # late: pyarrow only when a drive is saved

        with self._lock:
            rows, self._recording = self._recording, None
            self._episode += 1
            episode, target = self._episode, self.target
        if not rows or len(rows) < 2:
            return None
        arrived = [g for g in range(self.manifest.n_goals) if rows[-1]["phase"][g] == 2]
        goal = target if target in arrived or not arrived else arrived[0]
        name = f"drive-{self.session_id}-{episode:03d}.parquet"
        path = save_drive(self, rows, goal, episode, self.record_dir / name)
        with self._lock:
            self.saved.append(str(path))
        return str(path)

    # ------------------------------------------------------------------------------------------ control
    def tick(self) -> None:
        """One control step: the Session's command at the current state, then q += qd dt."""
        with self._lock:
            now = self.now()
            q = self.q
            qd = self.session.step(self.stick, q, now, self.stick_time)
            info = self.session.last
            pos, rot = self.session.chain.fk(q)
            if self._recording is not None and len(self._recording) < MAX_RECORD_STEPS:
                self._recording.append({
                    "t": now - self.t_reset, "q": q.copy(), "qd": qd.copy(), "pos": pos, "rot": rot,
                    "stick_in": list(self.stick), "stick": np.asarray(info.stick, dtype=np.float64).copy(),
                    "age": now - self.stick_time, "qd_decoder": np.asarray(info.qd_decoder).copy(),
                    "flags": {k: bool(getattr(info, k, False)) for k in FLAGS},
                    "workspace_scale": float(getattr(info, "workspace_scale", 1.0)),
                    "fault": info.fault, "belief": self.session.belief, "target": self.target,
                    "phase": list(self.phase),
                })  # fmt: skip
            for g in range(self.manifest.n_goals):
                self.phase[g] = goal_progress(self.phase[g], pos, rot, self.targets[g], self.goal_rot[g],
                                              self.position_tol, self.orientation_tol)
                if self.phase[g] == 2 and self.arrived_at[g] is None:
                    self.arrived_at[g] = now - self.t_reset
            if getattr(info, "stale", False) and self.stick_time > NEVER:
                self.watchdog_at = now - self.t_reset  # input had been arriving, then stopped
                if self._stopped_for != self.stick_time:  # the first stop after this sample
                    self._stopped_for, self.watchdog_stop_age = self.stick_time, now - self.stick_time
            self.q = q + qd * self.dt
            self.path.append(pos.tolist())
            self.last_qd, self.steps = qd, self.steps + 1

    def run(self, stop: threading.Event) -> None:
        """The control loop at the bundle's rate, paced by the server's own clock; a late tick does not
        make the next ones run faster (the schedule restarts), so q never jumps."""
        due = self._clock()
        while not stop.is_set():
            try:
                self.tick()
            except Exception as exc:  # a bug: the arm must not keep its last velocity, and the page must say so
                self.error = f"control loop stopped: {type(exc).__name__}: {exc}"
                return
            due += self.dt
            wait = due - self._clock()
            if wait < -self.dt:
                due = self._clock()
            elif wait > 0:
                stop.wait(wait)

    # ------------------------------------------------------------------------------------------ views
    def scene(self) -> dict:
        m = self.manifest
        return {
            "bundle": str(m.folder), "manifest_sha256": self.manifest_sha256, "session_id": self.session_id,
            "robot": m.robot_name, "joint_names": list(m.joint_names), "link_names": self.links.names,
            "goal_names": list(m.goal_names), "goal_targets": self.targets.tolist(),
            "goal_rot": self.goal_rot.tolist(), "workspace_min": m.workspace_min.tolist(),
            "workspace_max": m.workspace_max.tolist(), "stick_dim": m.latent_dim,
            "stick_box": [m.stick_low, m.stick_high], "deadband": m.deadband, "rate_hz": 1.0 / self.dt,
            "watchdog_timeout_s": m.watchdog_timeout_s, "position_tol": self.position_tol,
            "orientation_tol_deg": math.degrees(self.orientation_tol), "world": self._bodies(),
        }  # fmt: skip

    def _bodies(self) -> dict | None:
        """The scene's bodies for the page to draw (None without bodies): per body its shape, size as the
        manifest writes it (box full lengths; cylinder/capsule radius and length along the body's z; sphere
        radius), centre xyz (m) and URDF roll-pitch-yaw `rpy` in rad, world frame, taken from the Session's
        own World so the drawing is what the filter keeps clear of. keep_out and reduced_zone are distances
        from the person's surfaces, the quantity `body_d` measures; the zone edge uses the bundle's tool speed
        cap, the speed the separation step compares the allowed approach speed against."""
        arm = self.session.arm
        if arm is None:
            return None
        w = arm.world

        def body(b) -> dict:
            return {"name": b.name, "shape": b.shape, "size": list(b.size), "xyz": list(b.xyz), "rpy": list(b.rpy)}

        s = w.settings
        return {"furniture": [body(b) for b in w.furniture], "person": [body(b) for b in w.person],
                "clearance": s.clearance, "keep_out": s.keep_out,
                "reduced_zone": s.reduced_zone(self.manifest.tcp_speed_max),
                "tcp_speed_max": self.manifest.tcp_speed_max}  # fmt: skip

    def state(self) -> dict:
        """What the page draws: arm, path, belief, filters, faults, progress, the action map and separation."""
        with self._lock:
            now, q, info = self.now(), self.q.copy(), self.session.last
            belief, fault, stick, age = self.session.belief, self.session.fault, list(self.stick), now - self.stick_time
            out = {
                "t": now - self.t_reset, "steps": self.steps, "q": q.tolist(), "qd": self.last_qd.tolist(),
                "path": list(self.path), "belief": belief.tolist(), "target": self.target, "fault": fault,
                "stick_received": stick, "input_age_s": age if self.stick_time > NEVER else None,
                "input_source": self.input_source, "phase": list(self.phase),
                "arrived_at": list(self.arrived_at), "recording": self._recording is not None,
                "recorded_steps": len(self._recording or ()), "saved": list(self.saved), "error": self.error,
                "watchdog_at": self.watchdog_at, "watchdog_stop_age_s": self.watchdog_stop_age,
            }  # fmt: skip
        filters = {k: bool(getattr(info, k, False)) for k in FLAGS} if info is not None else {}
        filters["workspace_limited"] = info is not None and float(getattr(info, "workspace_scale", 1.0)) < 1.0
        filters["separation_held"] = info is not None and bool(getattr(info, "separation_held", False))
        out["filters"] = filters
        out["stick_used"] = np.asarray(info.stick).tolist() if info is not None else [0.0] * len(stick)
        out["stopped_by_watchdog"] = bool(filters.get("stale"))
        frames = self.links.at(q)
        pos, rot = self.session.chain.fk(q)
        out["links"] = [[p.tolist(), r.tolist()] for p, r in frames] + [[pos.tolist(), rot.tolist()]]
        out["action_map"] = self._action_map(q, pos, rot, belief)
        out["separation"] = self._separation(q, filters["separation_held"])
        return out

    def _separation(self, q: np.ndarray, held: bool) -> dict | None:
        """Closest approach at q of the arm's sphere model to the furniture and to the person (None without
        bodies): the smallest sphere-surface-to-body distance (m) and which link and body it is between,
        measured by the Session's own ArmWorld so the page shows what the separation step sees. `person_zone`
        says where that person distance lies: "keep_out", "reduced" (inside the reduced-speed zone) or "clear".
        """
        arm = self.session.arm
        if arm is None:
            return None
        w = arm.world
        body_d = np.asarray(arm.geometry(q, grad=False).body_d)  # [S, O]: furniture columns, then the person's
        n_f = len(w.furniture)
        out: dict = {"held": bool(held)}
        for key, first, last in (("furniture", 0, n_f), ("person", n_f, body_d.shape[1])):
            d = body_d[:, first:last]
            if not d.size:
                out[key] = None
                continue
            i, o = np.unravel_index(int(np.argmin(d)), d.shape)
            out[key] = {"distance": float(d[i, o]), "link": arm.links[i], "body": w.body_names[first + o]}
        s = w.settings
        near = out["person"]["distance"] if out["person"] is not None else math.inf
        zone = s.reduced_zone(self.manifest.tcp_speed_max)
        out["person_zone"] = "keep_out" if near < s.keep_out else "reduced" if near < zone else "clear"
        return out

    def _action_map(self, q, pos, rot, belief) -> dict:
        """Tool velocity (m/s, base frame) of the decoder's raw command at a grid of sticks, at this state
        and belief: what each stick direction would do now, before the safety filter scales it."""
        m = self.manifest
        axis = np.linspace(m.stick_low, m.stick_high, MAP_GRID)
        grid = np.zeros((MAP_GRID * MAP_GRID, m.latent_dim), dtype=np.float32)  # [K, d]; axes past 2 at 0
        grid[:, 0] = np.repeat(axis, MAP_GRID)
        if m.latent_dim > 1:
            grid[:, 1] = np.tile(axis, MAP_GRID)
        context = build_context(q[None], pos[None], rot[None], belief[None], self.targets[None],
                                self.goal_rot[None]).astype(np.float32)  # fmt: skip
        (qd,) = self._map_ort.run(["qd"], {"stick": grid, "context": np.repeat(context, len(grid), axis=0)})
        jac = self.session.chain.jacobian(q)[:3]  # [3, n]
        vel = qd.astype(np.float64) @ jac.T  # [K, 3]
        return {"stick": grid[:, :2].tolist(), "tool_velocity": vel.tolist()}

    def _reset_arm(self) -> None:
        g = self.manifest.n_goals
        self.q = self.manifest.q_home.astype(np.float64).copy()
        self.session.reset()
        self.phase, self.arrived_at = [0] * g, [None] * g
        self.path: deque = deque(maxlen=PATH_POINTS)
        self.t_reset = self.now()
        self.watchdog_at: float | None = None  # elapsed time of the latest watchdog stop after input had arrived
        # how old the last sample was at the step where the watchdog first stopped the arm for it: the
        # reaction time, which a later state poll's input age would overstate by the poll's own delay
        self.watchdog_stop_age: float | None = None
        self._stopped_for = NEVER
        self.last_qd = np.zeros(self.manifest.action_dim)
        self.steps = 0


def _map_decoder(m) -> ort.InferenceSession:
    """A second onnxruntime session on the verified decoder, for the action map only (never for control)."""
    data = m.path("decoder.onnx").read_bytes()
    if sha256_bytes(data) != m.files["decoder.onnx"]:
        raise BundleError(str(m.path("decoder.onnx")), "changed since the bundle was verified; sha256 differs")
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    return ort.InferenceSession(data, opts, providers=["CPUExecutionProvider"])
