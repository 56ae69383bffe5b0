"""Scripted demonstrations: resolved-rate control with damped least squares, all episodes stepped as one batch.

Each episode picks one goal of a jittered layout, moves the tool to the goal's approach pose, performs the
goal's fine motion with the orientation held, and stops at the first step that ends within `arrive_tol` of
the end of the fine motion (hovering there would only feed goal inference the same evidence again).

Velocity law: coreach.control.servo (resolved-rate control with damped least squares, shared with policy
blending), then Gaussian noise, then the shared safety filter coreach.control.safety_filter (joint position
look-ahead, joint and tool speed caps) that vetting and the runtime apply too.
"""

from __future__ import annotations

import inspect
import math
from dataclasses import dataclass

import numpy as np
import torch
from torch import Tensor

from coreach.arrival import DEFAULT_MIN_ARRIVAL, arrival_by_goal, check_arrival
from coreach.episodes import Episode, EpisodeSet
from coreach.errors import ConfigError
from coreach.world.geometry import matrix_to_quat, rotation_error
from coreach.control.safety_filter import SafetyLimits
from coreach.control.servo import dls_step, servo_twist
from coreach.host.protocols import Robot
from coreach.world.scenario import Layout, Scenario, load_scenario
from coreach.world.detour import detour_points, null_space_push
from coreach.world.scene_arm import arm_world, check_episodes_clear

__all__ = ["dls_step", "scale_to_speed_limits", "clamp_to_joint_limits", "Rollout", "rollout", "generate", "completed_mask",
           "expert_twist", "expert_action"]


def scale_to_speed_limits(qd: Tensor, qd_max: Tensor) -> Tensor:
    """Scale each row of qd [B, n] by one factor <= 1 so every |qd_i| <= qd_max_i (direction kept)."""
    no_tool = torch.zeros(*qd.shape[:-1], 3, qd.shape[-1], dtype=qd.dtype)  # joint caps only
    return SafetyLimits(qd_max=tuple(qd_max.tolist()), tcp_speed_max=math.inf).cap(qd, no_tool)[0]


def clamp_to_joint_limits(qd: Tensor, q: Tensor, dt: float, lower: Tensor, upper: Tensor) -> Tensor:
    """Per joint, keep q + qd dt within [lower, upper]; a joint already outside may only move back."""
    limits = SafetyLimits(qd_max=(math.inf,) * qd.shape[-1], q_lower=tuple(lower.tolist()),
                          q_upper=tuple(upper.tolist()))
    return limits.keep_inside(q, qd, dt)[0]


@dataclass
class Rollout:
    """Raw batched result of `rollout` (float64 tensors padded to the longest recorded episode)."""

    q: Tensor  # [E, T, n] joint positions before each recorded step
    qd: Tensor  # [E, T, n] commanded velocities (zero after an episode ends)
    ee_pos: Tensor  # [E, T, 3]
    ee_quat: Tensor  # [E, T, 4]
    lengths: Tensor  # [E] recorded steps per episode
    completed: Tensor  # [E] bool: ended within arrive_tol of the end of the fine motion
    goals: Tensor  # [E] goal index (the goal the episode ends at)
    layout: Layout
    dt: float
    fine_phase: Tensor | None = None  # [E] bool: the approach pose of the goal was reached
    q_end: Tensor | None = None  # [E, n] joint positions where each episode ended
    via_goals: Tensor | None = None  # [E] goal first headed for (-1: none), see `via_share`


def _check(name: str, value: float, lo: float, hi: float = float("inf")) -> float:
    value = float(value)
    if not lo <= value <= hi:
        raise ConfigError(f"option {name}", f"expected a number in [{lo}, {hi}], got {value}")
    return value


def _start_poses(robot: Robot, E: int, gen: torch.Generator, start_jitter: float, spread_share: float,
                 start_spread: float) -> Tensor:  # fmt: skip
    """[E, n] start poses: home plus U(-start_jitter, start_jitter) per joint; a `spread_share` of the
    episodes (the first ones of a seeded permutation) use the wider `start_spread` instead, so the data
    also covers states away from the path home -> goal that closed loop visits. Clipped to the limits."""
    f64 = torch.float64
    n = robot.dof
    home, lower, upper = robot.q_home.to(f64), robot.q_lower.to(f64), robot.q_upper.to(f64)
    width = torch.full((E,), float(start_jitter), dtype=f64)
    spread = torch.randperm(E, generator=gen)[: int(round(spread_share * E))]
    width[spread] = float(start_spread)
    noise = torch.rand(E, n, generator=gen, dtype=f64) * 2 - 1
    return torch.minimum(torch.maximum(home + width[:, None] * noise, lower), upper)


def _via_plan(E: int, G: int, goals: Tensor, gen: torch.Generator, via_share: float,
              via_steps: tuple[int, int]) -> tuple[Tensor, Tensor]:  # fmt: skip
    """([E] goal first headed for or -1, [E] steps spent heading there): a `via_share` of the episodes
    first move toward another goal for a uniform number of steps in via_steps, as an operator who changes
    their mind part-way would leave the arm."""
    pick = torch.randperm(E, generator=gen)[: int(round(via_share * E))]
    other = (goals + torch.randint(1, max(G, 2), (E,), generator=gen)) % G
    lo, hi = int(via_steps[0]), int(via_steps[1])
    steps = torch.randint(lo, hi + 1, (E,), generator=gen)
    via = torch.full((E,), -1, dtype=torch.long)
    left = torch.zeros(E, dtype=torch.long)
    if G > 1:
        via[pick], left[pick] = other[pick], steps[pick]
    return via, left


def expert_twist(pos: Tensor, rot: Tensor, target: Tensor, target_rot: Tensor, k_p: float, k_r: float,
                 v_max: float, w_max: float) -> Tensor:  # fmt: skip
    """The demonstrator's tool twist [B, 6] toward a target pose (coreach.control.servo.servo_twist)."""
    return servo_twist(pos, rot, target, target_rot, k_p, k_r, v_max, w_max)


def expert_action(robot: Robot, q: Tensor, J: Tensor, twist: Tensor, dt: float, damping: float,
                  noise: Tensor | None = None, limits: SafetyLimits | None = None,
                  separation=None, push: Tensor | None = None) -> Tensor:  # fmt: skip
    """Joint velocity [B, n] for a twist: damped least squares, plus `noise` [B, n] (rad/s) when given, then
    the shared safety filter (joint look-ahead over dt, joint and tool speed caps; `limits` defaults to the
    robot's with the default tool speed cap), the filter vetting and the runtime apply. Shared by `rollout`
    and the aggregation labels, which pass no noise."""
    f64 = torch.float64
    J = J.to(f64)
    qd = dls_step(J, twist.to(f64), damping)
    if push is not None:
        qd = qd + push
    if noise is not None:
        qd = qd + noise
    limits = SafetyLimits.for_robot(robot) if limits is None else limits
    return limits.limit(q.to(f64), qd, J[..., :3, :], None, dt, separation)[0]


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
    start_jitter: float = 0.0,
    spread_share: float = 0.0,
    start_spread: float = 0.5,
    via_share: float = 0.0,
    via_steps: tuple[int, int] | list[int] = (5, 30),
    record_via: bool = True,
    label_clean: bool = False,
    goal_weights: list[float] | None = None,
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
    for name, val in (("start_jitter", start_jitter), ("start_spread", start_spread)):
        _check(name, val, 0.0, math.pi)
    for name, val in (("spread_share", spread_share), ("via_share", via_share)):
        _check(name, val, 0.0, 1.0)
    try:
        via_lo, via_hi = (int(v) for v in via_steps)
    except (TypeError, ValueError):
        raise ConfigError("option via_steps", f"expected [min, max] steps, got {via_steps!r}") from None
    if not 0 <= via_lo <= via_hi:
        raise ConfigError("option via_steps", f"expected 0 <= min <= max, got {list(via_steps)}")
    if goal_weights is not None and (len(goal_weights) != len(scenario.goals) or not all(
            isinstance(w, (int, float)) and math.isfinite(w) and w >= 0 for w in goal_weights) or not sum(goal_weights) > 0):  # fmt: skip
        raise ConfigError("option goal_weights", f"expected one weight >= 0 per goal ({scenario.goal_names}), not all "
                                                 f"0; got {goal_weights!r}")  # fmt: skip

    E, dt = int(n_episodes), float(scenario.dt)
    f64 = torch.float64
    gen = torch.Generator().manual_seed(int(seed))
    layout = scenario.sample_layouts(E, gen)
    G = len(scenario.goals)
    if goal_weights is not None:
        goals = weighted_goals(E, goal_weights)
    elif goal_order == "round_robin":
        goals = torch.arange(E) % G
    else:
        goals = torch.randint(G, (E,), generator=gen)
    rows = torch.arange(E)
    p_app = layout.approach_pos[rows, goals]  # [E, 3]
    R_app = layout.approach_rot[rows, goals]  # [E, 3, 3]
    p_end = p_app + layout.fine[rows, goals]
    # Draws for the new start options come after every draw the original demonstrator made, and only when
    # used, so settings without them reproduce earlier datasets exactly.
    uses_starts = start_jitter > 0 or spread_share > 0
    via, via_left = _via_plan(E, G, goals, gen, via_share, (via_lo, via_hi)) if via_share > 0 else (
        torch.full((E,), -1, dtype=torch.long), torch.zeros(E, dtype=torch.long))  # fmt: skip
    has_via = via >= 0
    p_via = layout.approach_pos[rows, via.clamp_min(0)]
    R_via = layout.approach_rot[rows, via.clamp_min(0)]
    T_max = int(max_steps) + int(via_left.max())  # heading elsewhere first must not eat the episode's budget

    n = robot.dof
    qd_max = robot.qd_max.to(f64)
    world = arm_world(robot, scenario)
    if uses_starts:
        q = _start_poses(robot, E, gen, start_jitter, spread_share, start_spread)
        if world is not None:  # a start among the bodies (or too near the person) is replaced by home
            clear = torch.as_tensor(world.clear(world.geometry(q.numpy(), grad=False)))
            q = torch.where(clear[:, None], q, robot.q_home.to(f64))
    else:
        q = robot.q_home.to(f64).expand(E, n).clone()
    # around furniture: a detour point for the tool where the straight way to the approach point is blocked
    detour = detour_points(world, robot.fk(q)[0].to(f64), p_app)  # [E, 2, 3], nan = none
    n_detour = (~torch.isnan(detour[..., 0])).sum(dim=-1)  # [E] detour points to pass
    detour_next = torch.zeros(E, dtype=torch.long)  # [E] the next one
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
            heading_via = via_left[idx] > 0  # [B] still heading for the other goal: no arrival yet
            rot_err = rotation_error(R_app[idx], rot)  # [B, 3]
            at_approach = ((p_app[idx] - pos).norm(dim=-1) < arrive_tol) & (rot_err.norm(dim=-1) < approach_rot_tol)
            phase = (fine_phase[idx] | at_approach) & ~heading_via
            fine_phase[idx] = phase
            arrived = phase & ((p_end[idx] - pos).norm(dim=-1) < arrive_tol)
            completed[idx[arrived]] = True
            active[idx[arrived]] = False
            noise_draw = torch.randn(E, n, generator=gen, dtype=f64)[idx]  # same stream whatever is active
            if t == T_max:
                break
            keep = ~arrived
            idx, qa, pos, rot, phase = idx[keep], qa[keep], pos[keep], rot[keep], phase[keep]
            heading_via = heading_via[keep]
            if idx.numel() == 0:
                break

            target = torch.where(phase.unsqueeze(-1), p_end[idx], p_app[idx])
            target = torch.where(heading_via[:, None], p_via[idx], target)
            # a detour point is passed once the tool is within 3 cm of it (then the next, then the approach point)
            nxt = detour[idx, detour_next[idx].clamp(max=1)]  # [B, 3]
            on_detour = (detour_next[idx] < n_detour[idx]) & ~phase & ~heading_via
            passed = on_detour & ((nxt - pos).norm(dim=-1) < 0.03)
            detour_next[idx[passed]] += 1
            nxt = detour[idx, detour_next[idx].clamp(max=1)]
            on_detour = (detour_next[idx] < n_detour[idx]) & ~phase & ~heading_via
            target = torch.where(on_detour[:, None], nxt, target)
            target_rot = torch.where(heading_via[:, None, None], R_via[idx], R_app[idx])
            twist = expert_twist(pos, rot, target, target_rot, k_p, k_r, v_max, w_max)
            J = robot.jacobian(qa).to(f64)  # [B, 6, n]
            sep = None if world is None else world.separation(qa)
            push = None if world is None else null_space_push(world, qa, J, damping)
            qd = expert_action(robot, qa, J, twist, dt, damping, noise * qd_max * noise_draw[keep], None, sep, push)
            # label_clean: the noise moves the arm off the expert's path, the recorded label is the expert's
            # own correction from there (noise injection, the published DART method)
            label = expert_action(robot, qa, J, twist, dt, damping, None, None, sep, push) if label_clean else qd

            sel = ~heading_via | bool(record_via)  # heading elsewhere first is recorded only with record_via
            record = idx[sel]
            slot = lengths[record]
            rec_q[record, slot], rec_qd[record, slot] = qa[sel], label[sel]
            rec_pos[record, slot], rec_rot[record, slot] = pos[sel], rot[sel]
            lengths[record] += 1
            via_left[idx] = (via_left[idx] - 1).clamp_min(0)
            q[idx] = qa + qd * dt

    T = max(int(lengths.max()), 1)
    quat = matrix_to_quat(rec_rot[:, :T])
    return Rollout(rec_q[:, :T], rec_qd[:, :T], rec_pos[:, :T], quat, lengths, completed, goals, layout, dt,
                   fine_phase=fine_phase, q_end=q, via_goals=torch.where(has_via, via, -1))  # fmt: skip


def weighted_goals(E: int, weights: list[float]) -> Tensor:
    """[E] goal indices in shares proportional to `weights` (largest remainder), interleaved evenly: each goal's
    k-th episode sits at (k + 0.5) / count of the way through. Deterministic (no draws), so a weighted set differs
    from an equal one only in which goal each episode has. Used to under-sample a goal on purpose."""
    w = torch.tensor([float(x) for x in weights], dtype=torch.float64)
    exact = w / w.sum() * E
    counts = exact.floor().long()
    for g in torch.argsort(exact - counts, descending=True)[: E - int(counts.sum())]:
        counts[g] += 1
    keys = torch.cat([(torch.arange(int(c), dtype=torch.float64) + 0.5) / max(int(c), 1) for c in counts])
    goals = torch.cat([torch.full((int(c),), g, dtype=torch.long) for g, c in enumerate(counts)])
    return goals[torch.argsort(keys, stable=True)]


def generate(
    robot: Robot,
    scenario: Scenario | str,
    n_episodes: int,
    seed: int = 0,
    noise: float = 0.02,
    max_steps: int = 80,
    *,
    min_arrival: float = DEFAULT_MIN_ARRIVAL,
    keep_incomplete: bool = False,
    **options,
) -> EpisodeSet:
    """Scripted demonstrations on `robot` in `scenario` (a Scenario or a shipped name), deterministic in `seed`.

    noise: std of Gaussian joint-velocity noise as a fraction of robot.qd_max; max_steps: cut an episode
    that has not finished by then. Options (keyword): goal_order ("round_robin" | "random"), k_p (1/s),
    k_r (1/s), v_max (m/s), w_max (rad/s), damping, arrive_tol (m; also the phase switch at the approach
    point), approach_rot_tol (rad; orientation needed before the fine motion starts); start_jitter (rad,
    uniform per joint around home), spread_share + start_spread (a share of episodes starting from a wider
    spread of poses), via_share + via_steps + record_via (a share of episodes that first head for another
    goal for a number of steps, recorded or not); label_clean (execute the noisy action, record the
    noise-free expert action at the state it led to: the labels correct the drift the noise causes).

    Self-check: every goal must be reached in at least `min_arrival` of its episodes, else DataError names
    the goal, its rate and the likely cause. Episodes that missed are dropped (kept with keep_incomplete),
    so a decoder is never trained on motions that stop short; episodes shorter than 2 steps are dropped.
    The per-goal arrival is in the returned set's `arrival`.
    """
    allowed = [p.name for p in inspect.signature(rollout).parameters.values() if p.kind is p.KEYWORD_ONLY]
    for key in options:
        if key not in allowed:
            raise ConfigError(f"option {key}", f"unknown demonstrator option; expected one of {allowed}")
    min_arrival = _check("min_arrival", min_arrival, 0.0, 1.0)
    if isinstance(scenario, str):
        scenario = load_scenario(scenario)
    r = rollout(robot, scenario, n_episodes, seed, noise, max_steps, **options)
    report = arrival_by_goal(r, robot, scenario.goal_names)
    check_arrival(report, min_arrival, f"demonstrations of scenario {scenario.name} on {robot.name}",
                  float(options.get("arrive_tol", 0.01)), float(options.get("approach_rot_tol", 0.1)))  # fmt: skip
    kept = [i for i in range(int(n_episodes)) if int(r.lengths[i]) >= 2 and (keep_incomplete or bool(r.completed[i]))]
    check_episodes_clear(robot, scenario, [r.q[i, : int(r.lengths[i])].numpy() for i in kept],
                         [scenario.goal_names[int(r.goals[i])] for i in kept],
                         f"demonstrations of scenario {scenario.name} on {robot.name}")  # fmt: skip
    goal_quat = r.layout.approach_quat.numpy()  # [E, G, 4], converted in one batch
    episodes = []
    for i in range(int(n_episodes)):
        T = int(r.lengths[i])
        if T < 2 or not (keep_incomplete or bool(r.completed[i])):
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
    out = EpisodeSet(episodes, scenario.goal_names, list(robot.joint_names), r.dt, source=source)
    out.arrival = {a.goal: a.to_dict() for a in report}
    return out


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
