"""Scripted demonstrations: resolved-rate control with damped least squares, all episodes stepped as one batch.

Each episode picks one goal of a jittered layout, moves the tool to the goal's approach pose, performs the
goal's fine motion with the orientation held, and stops at the first step that ends within `arrive_tol` of
the end of the fine motion (hovering there would only feed goal inference the same evidence again).

Velocity law (resolved-rate control, Whitney 1969; damped least squares, Nakamura & Hanafusa 1986 and
Wampler 1986):  twist v = [k_p (p* - p) capped at v_max, k_r rot_err(R*, R) capped at w_max],
qd = J^T (J J^T + lambda^2 I)^-1 v, then Gaussian noise, a uniform rescale into the joint speed limits and a
per-joint clamp that keeps q + qd dt inside the joint position limits.
"""

from __future__ import annotations

import inspect
from dataclasses import dataclass

import numpy as np
import torch
from torch import Tensor

from coreach.episodes import Episode, EpisodeSet
from coreach.errors import ConfigError
from coreach.geometry import matrix_to_quat, rotation_error
from coreach.protocols import Robot
from coreach.scenario import Layout, Scenario, load_scenario

__all__ = ["dls_step", "scale_to_speed_limits", "clamp_to_joint_limits", "Rollout", "rollout", "generate", "completed_mask"]


def dls_step(J: Tensor, twist: Tensor, damping: float) -> Tensor:
    """Damped least-squares joint velocity J^T (J J^T + damping^2 I)^-1 twist.

    J [B, m, n], twist [B, m] -> qd [B, n]. damping = 0 gives the minimum-norm solution (pseudo-inverse)
    for a full-row-rank J; damping > 0 bounds |qd| near singularities.
    """
    m = J.shape[-2]
    A = J @ J.transpose(-1, -2) + (damping**2) * torch.eye(m, dtype=J.dtype, device=J.device)  # [B, m, m]
    y = torch.linalg.solve(A, twist.unsqueeze(-1))  # [B, m, 1]
    return (J.transpose(-1, -2) @ y).squeeze(-1)


def _cap_norm(v: Tensor, limit: float) -> Tensor:
    """Shrink rows of v [B, k] whose norm exceeds `limit`, keeping their direction."""
    norm = v.norm(dim=-1, keepdim=True)
    return v * torch.clamp(limit / norm.clamp_min(1e-12), max=1.0)


def scale_to_speed_limits(qd: Tensor, qd_max: Tensor) -> Tensor:
    """Scale each row of qd [B, n] by one factor <= 1 so every |qd_i| <= qd_max_i (direction kept)."""
    ratio = (qd.abs() / qd_max).amax(dim=-1, keepdim=True)  # [B, 1]
    return qd / ratio.clamp_min(1.0)


def clamp_to_joint_limits(qd: Tensor, q: Tensor, dt: float, lower: Tensor, upper: Tensor) -> Tensor:
    """Per joint, keep q + qd dt within [lower, upper]; a joint already outside may only move back."""
    lo = torch.clamp((lower - q) / dt, max=0.0)
    hi = torch.clamp((upper - q) / dt, min=0.0)
    return torch.minimum(torch.maximum(qd, lo), hi)


@dataclass
class Rollout:
    """Raw batched result of `rollout` (float64 tensors padded to the longest episode)."""

    q: Tensor  # [E, T, n] joint positions before each step
    qd: Tensor  # [E, T, n] commanded velocities (zero after an episode ends)
    ee_pos: Tensor  # [E, T, 3]
    ee_quat: Tensor  # [E, T, 4]
    lengths: Tensor  # [E] recorded steps per episode
    completed: Tensor  # [E] bool: ended within arrive_tol of the end of the fine motion
    goals: Tensor  # [E] goal index
    layout: Layout
    dt: float


def _check(name: str, value: float, lo: float, hi: float = float("inf")) -> float:
    value = float(value)
    if not lo <= value <= hi:
        raise ConfigError(f"option {name}", f"expected a number in [{lo}, {hi}], got {value}")
    return value


def rollout(
    robot: Robot,
    scenario: Scenario | str,
    n_episodes: int,
    seed: int = 0,
    noise: float = 0.02,
    max_steps: int = 80,
    *,
    goal_order: str = "round_robin",
    k_p: float = 2.0,
    k_r: float = 2.0,
    v_max: float = 0.15,
    w_max: float = 1.0,
    damping: float = 0.05,
    arrive_tol: float = 0.01,
    approach_rot_tol: float = 0.1,
) -> Rollout:
    """Step all episodes together; see `generate` for the options."""
    if isinstance(scenario, str):
        scenario = load_scenario(scenario)
    if int(n_episodes) < 1:
        raise ConfigError("option episodes", f"expected at least 1, got {n_episodes}")
    if int(max_steps) < 1:
        raise ConfigError("option max_steps", f"expected at least 1, got {max_steps}")
    if goal_order not in ("round_robin", "random"):
        raise ConfigError("option goal_order", f"expected 'round_robin' or 'random', got {goal_order!r}")
    noise = _check("noise", noise, 0.0, 10.0)
    for name, val in (("k_p", k_p), ("k_r", k_r), ("v_max", v_max), ("w_max", w_max), ("arrive_tol", arrive_tol)):
        _check(name, val, 1e-9)
    _check("damping", damping, 0.0)

    E, T_max, dt = int(n_episodes), int(max_steps), float(scenario.dt)
    f64 = torch.float64
    gen = torch.Generator().manual_seed(int(seed))
    layout = scenario.sample_layouts(E, gen)
    G = len(scenario.goals)
    if goal_order == "round_robin":
        goals = torch.arange(E) % G
    else:
        goals = torch.randint(G, (E,), generator=gen)
    rows = torch.arange(E)
    p_app = layout.approach_pos[rows, goals]  # [E, 3]
    R_app = layout.approach_rot[rows, goals]  # [E, 3, 3]
    p_end = p_app + layout.fine[rows, goals]

    n = robot.dof
    lower, upper = robot.q_lower.to(f64), robot.q_upper.to(f64)
    qd_max, q_home = robot.qd_max.to(f64), robot.q_home.to(f64)
    q = q_home.expand(E, n).clone()
    rec_q = torch.zeros(E, T_max, n, dtype=f64)
    rec_qd = torch.zeros(E, T_max, n, dtype=f64)
    rec_pos = torch.zeros(E, T_max, 3, dtype=f64)
    rec_rot = torch.eye(3, dtype=f64).repeat(E, T_max, 1, 1)  # quaternions made once at the end
    lengths = torch.zeros(E, dtype=torch.long)
    fine_phase = torch.zeros(E, dtype=torch.bool)
    completed = torch.zeros(E, dtype=torch.bool)
    active = torch.ones(E, dtype=torch.bool)

    with torch.no_grad():
        for t in range(T_max + 1):
            idx = active.nonzero().squeeze(-1)  # episodes still running
            qa = q[idx]
            pos, rot = robot.fk(qa)
            pos, rot = pos.to(f64), rot.to(f64)
            rot_err = rotation_error(R_app[idx], rot)  # [B, 3]
            at_approach = ((p_app[idx] - pos).norm(dim=-1) < arrive_tol) & (rot_err.norm(dim=-1) < approach_rot_tol)
            phase = fine_phase[idx] | at_approach
            fine_phase[idx] = phase
            arrived = phase & ((p_end[idx] - pos).norm(dim=-1) < arrive_tol)
            completed[idx[arrived]] = True
            active[idx[arrived]] = False
            noise_draw = torch.randn(E, n, generator=gen, dtype=f64)[idx]  # same stream whatever is active
            if t == T_max:
                break
            keep = ~arrived
            idx, qa, pos, rot, rot_err, phase = idx[keep], qa[keep], pos[keep], rot[keep], rot_err[keep], phase[keep]
            if idx.numel() == 0:
                break

            target = torch.where(phase.unsqueeze(-1), p_end[idx], p_app[idx])
            twist = torch.cat([_cap_norm(k_p * (target - pos), v_max), _cap_norm(k_r * rot_err, w_max)], dim=-1)
            J = robot.jacobian(qa).to(f64)  # [B, 6, n]
            qd = dls_step(J, twist, damping)
            qd = qd + noise * qd_max * noise_draw[keep]
            qd = scale_to_speed_limits(qd, qd_max)
            qd = clamp_to_joint_limits(qd, qa, dt, lower, upper)

            rec_q[idx, t], rec_qd[idx, t] = qa, qd
            rec_pos[idx, t], rec_rot[idx, t] = pos, rot
            lengths[idx] += 1
            q[idx] = qa + qd * dt

    T = int(lengths.max())
    quat = matrix_to_quat(rec_rot[:, :T])
    return Rollout(rec_q[:, :T], rec_qd[:, :T], rec_pos[:, :T], quat, lengths, completed, goals, layout, dt)


def generate(
    robot: Robot,
    scenario: Scenario | str,
    n_episodes: int,
    seed: int = 0,
    noise: float = 0.02,
    max_steps: int = 80,
    **options,
) -> EpisodeSet:
    """Scripted demonstrations on `robot` in `scenario` (a Scenario or a shipped name), deterministic in `seed`.

    noise: std of Gaussian joint-velocity noise as a fraction of robot.qd_max; max_steps: cut an episode
    that has not finished by then. Options (keyword): goal_order ("round_robin" | "random"), k_p (1/s),
    k_r (1/s), v_max (m/s), w_max (rad/s), damping, arrive_tol (m; also the phase switch at the approach
    point), approach_rot_tol (rad; orientation needed before the fine motion starts).
    Episodes shorter than 2 steps (goal reached at once) are dropped.
    """
    allowed = [p.name for p in inspect.signature(rollout).parameters.values() if p.kind is p.KEYWORD_ONLY]
    for key in options:
        if key not in allowed:
            raise ConfigError(f"option {key}", f"unknown demonstrator option; expected one of {allowed}")
    if isinstance(scenario, str):
        scenario = load_scenario(scenario)
    r = rollout(robot, scenario, n_episodes, seed, noise, max_steps, **options)
    goal_quat = r.layout.approach_quat.numpy()  # [E, G, 4], converted in one batch
    episodes = []
    for i in range(int(n_episodes)):
        T = int(r.lengths[i])
        if T < 2:
            continue
        episodes.append(
            Episode(
                episode_id=i,
                goal=int(r.goals[i]),
                q=r.q[i, :T].numpy(),
                qd=r.qd[i, :T].numpy(),
                ee_pos=r.ee_pos[i, :T].numpy(),
                ee_quat=r.ee_quat[i, :T].numpy(),
                goal_pos=r.layout.approach_pos[i].numpy(),
                goal_quat=goal_quat[i],
                goal_fine=r.layout.fine[i].numpy(),
            )
        )
    source = (
        f"scripted:{scenario.name} robot={robot.name} episodes={n_episodes} seed={seed} noise={noise} "
        f"max_steps={max_steps}" + "".join(f" {k}={v}" for k, v in sorted(options.items()))
    )
    return EpisodeSet(episodes, scenario.goal_names, list(robot.joint_names), r.dt, source=source)


def completed_mask(episode_set: EpisodeSet, robot: Robot, tol: float = 0.01) -> np.ndarray:
    """From the recorded data alone: did each episode's last action bring the tool within `tol` (m) of
    the end of its goal's fine motion? [N] bool."""
    if len(episode_set) == 0:
        return np.zeros(0, dtype=bool)
    q_next = np.stack([e.q[-1] + e.qd[-1] * episode_set.dt for e in episode_set])
    end = np.stack([e.goal_pos[e.goal] + e.goal_fine[e.goal] for e in episode_set])
    with torch.no_grad():
        pos, _ = robot.fk(torch.as_tensor(q_next, dtype=torch.float64))
    return np.linalg.norm(pos.to(torch.float64).numpy() - end, axis=-1) < tol
