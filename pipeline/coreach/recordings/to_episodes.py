"""A checked recording on the uniform grid, cut into one episode per goal label, with layout and tool poses."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from coreach.episodes import Episode
from coreach.errors import DataError
from coreach.recordings import resample
from coreach.recordings.recording import Recording, Stream
from coreach.recordings.timing import TimingLimits, check_stream
from coreach.world.geometry import matrix_to_quat


@dataclass
class ArmLimits:
    """The robot's joints and URDF limits as float64 numpy [n]."""

    joint_names: list[str]
    q_lower: np.ndarray
    q_upper: np.ndarray
    qd_max: np.ndarray

    @classmethod
    def of(cls, robot) -> ArmLimits:
        def arr(x):
            return np.asarray(x.detach().cpu().numpy() if hasattr(x, "detach") else x, dtype=np.float64)

        return cls(list(robot.joint_names), arr(robot.q_lower), arr(robot.q_upper), arr(robot.qd_max))


@dataclass
class Checks:
    """Limits a recording must keep; past them it is refused with one line (never clipped)."""

    timing: TimingLimits
    velocity_factor: float = 1.5  # recorded, commanded or position-derived speeds up to this x the URDF limit
    position_margin: float = 0.05  # rad beyond the URDF position limits still accepted (encoder offsets)


@dataclass
class Piece:
    """One episode's arrays before tool poses and layout are added."""

    goal: str
    q: np.ndarray  # [T, n]
    qd: np.ndarray  # [T, n]
    stick: np.ndarray | None  # [T, k]


def check_speeds(values: np.ndarray, t: np.ndarray, arm: ArmLimits, factor: float, where: str, what: str) -> None:
    """Refuse speeds above factor x the URDF limit, naming joint, value, time and ratio."""
    ratio = np.abs(values) / arm.qd_max
    if ratio.size and ratio.max() > factor:
        k, j = np.unravel_index(int(np.argmax(ratio)), ratio.shape)
        raise DataError(where, f"{what} of joint {arm.joint_names[j]} reaches {values[k, j]:.3g} rad/s at "
                               f"{t[k] - t[0]:.3f} s, {ratio[k, j]:.1f} times its URDF limit {arm.qd_max[j]:.3g} "
                               f"rad/s; allowed up to {factor} times (checks.velocity_factor)")  # fmt: skip


def check_positions(joints: Stream, arm: ArmLimits, margin: float, where: str) -> None:
    """Refuse positions further than `margin` outside the URDF limits, naming joint, value and time."""
    below = arm.q_lower - margin - joints.values
    above = joints.values - arm.q_upper - margin
    excess = np.maximum(below, above)
    if excess.max() > 0:
        k, j = np.unravel_index(int(np.argmax(excess)), excess.shape)
        at = joints.t[k] - joints.t[0]
        raise DataError(where, f"joint {arm.joint_names[j]} at {joints.values[k, j]:.4g} rad ({at:.3f} s) is outside"
                               f" its URDF limits [{arm.q_lower[j]:.4g}, {arm.q_upper[j]:.4g}] by more "
                               f"than {margin} rad (checks.position_margin)")  # fmt: skip


def recording_pieces(rec: Recording, arm: ArmLimits, dt: float, checks: Checks,
                     min_steps: int) -> tuple[list[Piece], dict]:  # fmt: skip
    """Check, resample and cut one recording. Returns the pieces and a report of what was found and done.

    Grid: t0 = first joint sample, every dt up to the last one. Positions are interpolated linearly; the
    action at step k is the command in force at t_k when the recording has commands, else the forward
    difference (q[k+1] - q[k]) / dt, so the last grid point only closes the last step. Steps are labelled
    with the goal in force at their time; a label change starts a new episode, and pieces shorter than
    min_steps are dropped (and counted)."""
    found = []
    joints, rep = check_stream(rec.joints, rec.source, checks.timing)
    found.append(rep)
    where_q = f"{rec.source}: topic {rec.joints.topic}"
    check_positions(joints, arm, checks.position_margin, where_q)
    if rec.velocities is not None:
        check_speeds(rec.velocities.values, rec.velocities.t, arm, checks.velocity_factor, where_q,
                     "recorded velocity")  # fmt: skip
    grid = resample.uniform_grid(joints.t[0], joints.t[-1], dt)
    if grid.size < 2:
        raise DataError(where_q, f"spans {joints.t[-1] - joints.t[0]:.3f} s, less than one step of {dt} s")
    q = resample.interpolate(joints.t, joints.values, grid)
    steps = grid[:-1]
    if rec.command is not None:
        command, rep = check_stream(rec.command, rec.source, checks.timing)
        if rec.command.t is not rec.joints.t:  # a CSV file's columns share one clock: count its findings once
            found.append(rep)
        check_speeds(command.values, command.t, arm, checks.velocity_factor, f"{rec.source}: topic {command.topic}",
                     "commanded velocity")  # fmt: skip
        qd, action = resample.hold(command.t, command.values, steps), f"commands ({command.topic})"
    else:
        qd, action = resample.forward_velocity(q, dt), "finite differences of positions"
        check_speeds(qd, steps, arm, checks.velocity_factor, where_q, "velocity from positions")
    stick = None
    if rec.stick is not None:
        sticks, rep = check_stream(rec.stick, rec.source, checks.timing)
        if rec.stick.t is not rec.joints.t:
            found.append(rep)
        stick = resample.hold(sticks.t, sticks.values, steps)
    changes = sorted(rec.goals, key=lambda c: c[0])
    labels = resample.labels_at(changes, steps)
    cuts = np.flatnonzero(labels[1:] != labels[:-1]) + 1
    pieces, dropped = [], 0
    for idx in np.split(np.arange(steps.size), cuts):
        if idx.size < min_steps:
            dropped += 1
            continue
        pieces.append(Piece(str(labels[idx[0]]), q[idx], qd[idx], None if stick is None else stick[idx]))
    report = {
        "source": rec.source, "episodes": len(pieces), "steps": int(sum(len(p.q) for p in pieces)),
        "seconds": float(joints.t[-1] - joints.t[0]), "action": action, "goals_from": rec.goal_origin,
        "dropped_short": dropped, "streams": [r.as_dict() for r in found],
    }  # fmt: skip
    return pieces, report


def build_episodes(pieces: list[Piece], robot, goal_names: list[str], layout, first_id: int = 0) -> list[Episode]:
    """Episodes with tool poses from the robot's forward kinematics and the scenario's nominal layout."""
    index = {g: i for i, g in enumerate(goal_names)}
    q_all = np.concatenate([p.q for p in pieces])
    with torch.no_grad():
        pos, rot = robot.fk(torch.as_tensor(q_all, dtype=torch.float64))
        quat = matrix_to_quat(rot.to(torch.float64))
    pos, quat = pos.to(torch.float64).numpy(), quat.numpy()
    bounds = np.cumsum([0] + [len(p.q) for p in pieces])
    out = []
    for k, p in enumerate(pieces):
        sl = slice(bounds[k], bounds[k + 1])
        out.append(Episode(
            episode_id=first_id + k, goal=index[p.goal], q=p.q, qd=p.qd, ee_pos=pos[sl].copy(),
            ee_quat=quat[sl].copy(), goal_pos=layout.goal_pos, goal_quat=layout.goal_quat, goal_fine=layout.goal_fine,
        ))  # fmt: skip
    return out
