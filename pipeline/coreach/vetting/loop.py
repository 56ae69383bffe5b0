"""Closed-loop vetting: a simulated operator drives an interface through a suite, all episodes stepped together.

One control step, for E episodes at once (no Python loop over episodes):
1. forward kinematics and Jacobian at q (once per episode; candidates use the linearisation);
2. the belief update (coreach.control.belief_tracker: from the pose of the last update, as at runtime), then
   the context from `coreach.context.build_context`, the function training uses;
3. every candidate stick through the filter's stick box and deadband (a released stick commands zero), then the
   interface's command for it in every mode, [E, M, K, n], through the rest of the shared safety filter
   `coreach.control.safety_filter.SafetyLimits.limit` (joint look-ahead, speed caps, workspace box): the
   filter the runtime ships, with the settings the release writes into the bundle;
4. each candidate's value for the operator's current goal: predicted one-step progress toward its current
   waypoint (dx = J_lin qd dt) plus ORIENTATION_WEIGHT times progress toward the approach orientation
   (dtheta = J_ang qd dt); candidates in another interface mode pay a switching penalty;
5. the operator picks one, perturbs its stick (bias, tremor); a perturbed stick goes through the whole filter
   and the interface again (one stick per episode); q += qd dt.

Bookkeeping: the operator first seeks the approach pose (position and orientation within the suite's
tolerances), then the end of the goal's fine motion; completing it with the orientation still within
tolerance is an arrival. Arriving at the final goal is success; an episode that arrives holds still (zero
velocity) for the rest of the horizon, including an arm that completed its initial goal and waits for a
pending goal switch. At the switch step the operator's goal becomes the final goal, its phase restarts, and
the belief on the original goal at that moment is recorded: it depends on how long the arm waited at its first
goal, so it says what a "late switch" was in each run.
"""

from __future__ import annotations

import math
from typing import Callable

import torch
from torch import Tensor

from coreach.context import build_context
from coreach.control.belief_tracker import track
from coreach.control.safety_filter import JOINT_LIMIT, SEPARATION, SPEED_CAP, WORKSPACE
from coreach.control.separation import Geometry, measure
from coreach.errors import ConfigError
from coreach.host.protocols import takes_dt
from coreach.world.geometry import rotation_error
from coreach.vetting.records import LoopState, RolloutRecord
from coreach.vetting.suite import EpisodePlan, Suite
from coreach.world.scene_arm import arm_world

__all__ = ["rollout", "rollout_per_episode", "ORIENTATION_WEIGHT", "REACH_PROGRESS", "JOINT_LIMIT", "SPEED_CAP",
           "WORKSPACE", "SEPARATION", "EXCESS_TOL"]

ORIENTATION_WEIGHT = 0.05  # m per rad: 1 rad of orientation progress is worth 5 cm of position progress
REACH_PROGRESS = 1e-3  # m per step a candidate must gain toward a goal for that goal to count as reachable
Progress = Callable[[int, int], None]
# m/s: a sphere's measured approach to the person (finite difference over one step) may exceed the allowed
# speed by this much before it counts as an excess; the filter bounds the linear prediction, and the arc a
# link really travels in 0.1 s departs from it by well under 1 mm at these speeds (common practice: a
# tolerance an order above the rounding of the measurement)
EXCESS_TOL = 0.01



def _kinematics(robot, q: Tensor, jacobian: bool):
    """Tool pose (and Jacobian) at q; uses a robot's single-pass `fk_and_jacobian` when it has one."""
    both = getattr(robot, "fk_and_jacobian", None) if jacobian else None
    if both is not None:
        pos, rot, jac = both(q)
    else:
        pos, rot = robot.fk(q)
        jac = robot.jacobian(q) if jacobian else None
    return pos.to(q.dtype), rot.to(q.dtype), None if jac is None else jac.to(q.dtype)


def _limit(limits, q: Tensor, qd: Tensor, jac_lin: Tensor, pos: Tensor, dt: float,
           separation=None) -> tuple[Tensor, Tensor]:  # fmt: skip
    """The shared safety filter on commands qd [..., n] at q, jac_lin [..., 3, n], pos [..., 3] (broadcastable),
    and the link spheres of the E states (`separation`, ArmWorld.separation) -> (limited qd, which parts acted
    [...]: JOINT_LIMIT | SPEED_CAP | WORKSPACE | SEPARATION bits, 0 = none)."""
    qd, flags, _ = limits.limit(q, qd, jac_lin, pos, dt, separation)
    return qd, flags.to(torch.uint8)


def _separations(world, centres: Tensor):
    """Per episode: (min distance of a link sphere to furniture [E], to the person [E], between non-adjacent
    links [E], per sphere to the person [E, S]; inf where there is nothing to measure), and the distances
    themselves (the filter's separation step reuses them for this state)."""
    w = world.world
    # every pair, in float32: the pass over E x S x O pairs costs less than half of float64's on CPU, and its
    # rounding (about 1e-7 m at arm's length) is five orders below the 2 cm clearance; the filter's gradients
    # and the kinematics stay float64
    low = measure(w, centres.to(torch.float32))
    geo = Geometry(low.body_d.to(centres.dtype), low.self_d.to(centres.dtype),
                   self_u=None if low.self_u is None else low.self_u.to(centres.dtype))  # fmt: skip
    inf = torch.tensor(math.inf, dtype=centres.dtype)
    is_person = torch.as_tensor(w.is_person)
    furniture = torch.where(is_person, inf, geo.body_d).amin(dim=(-2, -1)) if (~is_person).any() else inf.expand(
        centres.shape[0])
    per_sphere = torch.where(is_person, geo.body_d, inf).amin(dim=-1)  # [E, S]
    self_min = geo.self_d.amin(dim=-1) if geo.self_d.shape[-1] else inf.expand(centres.shape[0])
    return furniture, per_sphere.amin(dim=-1), self_min, per_sphere, geo


def _reset_operator(operator, n: int, generator: torch.Generator, dt: float) -> None:
    """Operators that take the control period (e.g. for band-limited tremor) get it as `dt`."""
    if takes_dt(operator):
        operator.reset(n, generator, dt=dt)
    else:
        operator.reset(n, generator)


def candidate_values(twist: Tensor, to_wp: Tensor, rot_err: Tensor, mode: Tensor, switch_cost: int, margin: float) -> Tensor:
    """Each candidate's value [E, M, K] (m): one-step progress toward the waypoint (to_wp [E, 3] away) plus
    ORIENTATION_WEIGHT times progress toward the approach orientation (rot_err [E, 3], axis-angle)."""
    dx, dth = twist[..., :3], twist[..., 3:]  # [E, M, K, 3]
    now = to_wp.norm(dim=-1)[:, None, None]
    ang = rot_err.norm(dim=-1)[:, None, None]
    value = (now - (to_wp[:, None, None, :] - dx).norm(dim=-1)) + ORIENTATION_WEIGHT * (
        ang - (rot_err[:, None, None, :] - dth).norm(dim=-1)
    )
    E, M = value.shape[:2]
    if M > 1:
        # A switch forfeits `switch_cost` steps of the best progress the current mode offers, plus the
        # operator's own hysteresis margin.
        best_here = value[torch.arange(E), mode].amax(dim=-1).clamp_min(0.0)  # [E]
        penalty = switch_cost * best_here + margin
        other = torch.arange(M)[None, :] != mode[:, None]  # [E, M]
        value = value - other[:, :, None] * penalty[:, None, None]
    return value


def _reachable(dx: Tensor, pos: Tensor, approach: Tensor, tol: float) -> Tensor:
    """[E, G] bool: some candidate (dx [E, M, K, 3], any mode) brings the tool more than REACH_PROGRESS
    closer to goal g's approach point (approach [E, G, 3]), or the tool is already within `tol` of it."""
    E = dx.shape[0]
    d0 = (pos[:, None, :] - approach).norm(dim=-1)  # [E, G]
    moved = pos[:, None, None, :] + dx.reshape(E, -1, 1, 3)  # [E, MK, 1, 3]
    gain = (d0[:, None, :] - (moved - approach[:, None]).norm(dim=-1)).amax(dim=1)  # [E, G]
    return (gain > REACH_PROGRESS) | (d0 < tol)


def _simulate(robot, interface, operator, suite: Suite, belief_model, limits, plan: EpisodePlan,
              generator: torch.Generator, progress: Progress | None, stick_gain_every: int,
              dtype: torch.dtype, world=None) -> dict:  # fmt: skip
    E, T, dt = len(plan), suite.steps, suite.step_dt
    G = len(plan.layout.names)
    rows = torch.arange(E)
    tol_pos, tol_ang = suite.position_tol, suite.orientation_tol
    grid = suite.stick_grid(dtype)  # [K, 2] the operator's candidate sticks
    # what the interface receives: the sticks through the filter's box and deadband, as on the robot
    shaped, _, released = limits.condition_stick(grid)  # [K, 2], [K]
    K = grid.shape[0]
    switch_cost = 0
    margin = float(getattr(operator, "mode_switch_margin", 0.0))

    targets = plan.layout.targets.to(dtype)  # [E, G, 2, 3]
    goal_rot = plan.layout.approach_rot.to(dtype)  # [E, G, 3, 3]
    approach = targets[:, :, 0, :]  # [E, G, 3]
    q = plan.q_start.to(dtype).clone()
    n = q.shape[1]
    goal = plan.goal_initial.clone()
    switch_steps = set(plan.switch_step[plan.switch_step >= 0].tolist())
    pending = plan.switch_step >= 0  # [E] a switch is still to come

    phase1 = torch.zeros(E, dtype=torch.bool)  # approach pose of the current goal reached
    arrived = torch.zeros(E, dtype=torch.bool)  # current goal's fine motion completed (arm holds still)
    success = torch.zeros(E, dtype=torch.bool)
    success_step = torch.full((E,), -1, dtype=torch.long)
    phase1_step = torch.full((E,), -1, dtype=torch.long)
    initial_done_step = torch.full((E,), -1, dtype=torch.long)
    mode = torch.zeros(E, dtype=torch.long)
    hold = torch.zeros(E, dtype=torch.long)
    mode_switches = torch.zeros(E, dtype=torch.long)
    belief_at_switch = torch.full((E,), math.nan, dtype=dtype)

    rec_q = torch.empty(E, T + 1, n, dtype=dtype)
    rec_qd = torch.zeros(E, T, n, dtype=dtype)
    rec_pos = torch.empty(E, T + 1, 3, dtype=dtype)
    rec_belief = torch.empty(E, T + 1, G, dtype=dtype)
    rec_error = torch.empty(E, T + 1, dtype=dtype)
    rec_limits = torch.zeros(E, T, dtype=torch.uint8)
    rec_mode = torch.zeros(E, T, dtype=torch.long)
    rec_reach = torch.zeros(E, T, G, dtype=torch.bool)
    rec_ori = torch.empty(E, T + 1, dtype=dtype)
    rec_stick_gain = torch.full((E, T), math.nan, dtype=dtype)
    rec_stick = torch.full((E, T, grid.shape[1]), math.nan, dtype=dtype)
    rec_sep = torch.full((3, E, T + 1), math.inf, dtype=dtype)  # furniture, person, self (m)
    rec_excess = torch.zeros(E, T, dtype=torch.bool)  # a sphere approached the person faster than allowed
    sep_state, last_person = None, None
    if world is not None and plan.body_shift:
        # the cases move named bodies: each episode is measured against its own (one batch, one filter)
        world = world.shifted({k: v.numpy() for k, v in plan.body_shift.items()})
    if world is not None:
        s = world.world.settings
        keep_out, person_tau = s.keep_out, max(s.person_tau, limits.lookahead_s or dt)

    _reset_operator(operator, E, generator, dt)
    if plan.operator_values:
        if not callable(getattr(operator, "vary", None)):
            raise ConfigError(f"operator {operator.name}", "the suite's cases set operator values per episode "
                                                           "and this operator has no `vary`")  # fmt: skip
        operator.vary(plan.operator_values)
    belief = belief_model.initial(E, G, q[:, 0])
    anchor = None  # [E, 3] tool position at the last belief update
    for t in range(T + 1):
        pos, rot, jac = _kinematics(robot, q, jacobian=t < T)
        if anchor is None:
            anchor = pos
        else:
            belief, anchor, _ = track(belief_model, belief, anchor, pos, targets)

        if t in switch_steps:
            now = plan.switch_step == t  # [E]
            belief_at_switch = torch.where(now, belief[rows, plan.goal_initial], belief_at_switch)
            goal = torch.where(now, plan.goal_final, goal)
            phase1 &= ~now
            phase1_step = torch.where(now, -1, phase1_step)
            arrived &= ~now
            pending &= ~now

        # --- where the operator stands with its current goal ---
        wp = targets[rows, goal]  # [E, 2, 3] approach point, end of fine motion
        rot_err = rotation_error(goal_rot[rows, goal], rot)  # [E, 3]
        ang = rot_err.norm(dim=-1)
        ori_ok = ang < tol_ang
        at_approach = ((wp[:, 0] - pos).norm(dim=-1) < tol_pos) & ori_ok
        phase1_step = torch.where(at_approach & ~phase1 & (phase1_step < 0), t, phase1_step)
        phase1 |= at_approach
        done = phase1 & ((wp[:, 1] - pos).norm(dim=-1) < tol_pos) & ori_ok & ~arrived
        arrived |= done
        initial_done_step = torch.where(done & pending & (initial_done_step < 0), t, initial_done_step)
        won = done & ~pending
        success_step = torch.where(won, t, success_step)
        success |= won
        waypoint = torch.where(phase1[:, None], wp[:, 1], wp[:, 0])  # [E, 3]
        to_wp = waypoint - pos

        rec_q[:, t], rec_pos[:, t], rec_belief[:, t] = q, pos, belief
        if world is not None:
            sep_state = world.separation(q)
            furniture, person, self_min, per_sphere, geo = _separations(world, sep_state[1])
            sep_state = (*sep_state, geo)  # one distance pass per state: the filter reuses it
            rec_sep[0, :, t], rec_sep[1, :, t], rec_sep[2, :, t] = furniture, person, self_min
            if last_person is not None:
                # measured approach over the step just taken against what the rule allowed at its start
                allowed = (last_person - keep_out).clamp_min(0.0) / person_tau
                rec_excess[:, t - 1] = ((last_person - per_sphere) / dt > allowed + EXCESS_TOL).any(dim=-1)
            last_person = per_sphere
        rec_error[:, t] = to_wp.norm(dim=-1)
        rec_ori[:, t] = ang
        if t == T:
            break

        # --- candidates through the interface and the shared limits ---
        context = build_context(q, pos, rot, belief, targets, goal_rot)
        state = LoopState(t, q, pos, rot, jac, belief, targets, goal_rot, context, mode, dt)
        if t == 0:
            interface.reset(E, state)
            # read after reset: an interface may count its switch cost in steps of the loop's dt
            switch_cost = int(getattr(interface, "switch_cost_steps", 0))
        raw = interface.act(shaped, state).to(dtype)  # [E, M, K, n]
        raw = torch.where(released[None, None, :, None], 0.0, raw)  # a released stick stops the arm
        M = raw.shape[1]
        if t == 0 and tuple(raw.shape) != (E, int(interface.n_modes), K, n):
            raise ConfigError(
                f"interface {interface.name}",
                f"act returned shape {list(raw.shape)}; expected [E, n_modes, K, n] = "
                f"[{E}, {interface.n_modes}, {K}, {n}]",
            )
        jac_lin = jac[:, :3, :]
        safe, flags = _limit(limits, q[:, None, None, :], raw, jac_lin[:, None, None], pos[:, None, None], dt,
                             sep_state)
        twist = torch.einsum("eij,emkj->emki", jac, safe) * dt  # [E, M, K, 6] one-step tool motion
        value = candidate_values(twist, to_wp, rot_err, mode, switch_cost, margin)
        rec_reach[:, t] = _reachable(twist[..., :3], pos, approach, tol_pos)
        if stick_gain_every and t % stick_gain_every == 0:
            rec_stick_gain[:, t] = interface.stick_gain(state).to(dtype)

        # --- the operator's choice, perturbed, limited, applied ---
        idx = operator.choose(value, t, generator).long()  # [E], -1 = no input
        no_input = idx < 0
        pick = idx.clamp_min(0)
        m_pick = pick // K
        stick = torch.where(no_input[:, None], torch.zeros_like(grid[:1]), grid[pick % K])  # [E, 2]
        sent = operator.perturb(stick, t, generator)
        if sent is stick or torch.equal(sent, stick):
            qd = safe.reshape(E, M * K, n)[rows, pick]
            hit = flags.reshape(E, M * K)[rows, pick]
        else:
            sent_shaped, _, sent_released = limits.condition_stick(sent.to(dtype))
            again = interface.act(sent_shaped[:, None, :], state).to(dtype)  # [E, M, 1, n]
            again = torch.where(sent_released[:, None, None, None], 0.0, again)
            qd, hit = _limit(limits, q, again[rows, m_pick, 0], jac_lin, pos, dt, sep_state)

        holding = hold > 0
        hold = (hold - 1).clamp_min(0)
        active = ~arrived & ~holding & ~no_input
        switching = active & (m_pick != mode)
        mode = torch.where(switching, m_pick, mode)
        mode_switches += switching
        if switch_cost > 0:
            hold = torch.where(switching, switch_cost - 1, hold)  # this step is the first of the hold
            active &= ~switching
        qd = torch.where(active[:, None], qd, 0.0)
        rec_qd[:, t], rec_mode[:, t] = qd, mode
        rec_stick[:, t] = torch.where(active[:, None], sent.to(dtype), math.nan)
        rec_limits[:, t] = hit * active
        q = q + qd * dt
        if progress is not None:
            progress(t + 1, T)

    return dict(
        success=success, success_step=success_step, ee_path=rec_pos, belief=rec_belief,
        belief_at_switch=belief_at_switch, error=rec_error, limit_scaled=rec_limits > 0, limits=rec_limits,
        reachable=rec_reach.all(dim=-1), reach_goal=rec_reach, orientation_error=rec_ori,
        stick_gain=rec_stick_gain, mode_switches=mode_switches, q=rec_q, qd=rec_qd, stick=rec_stick, mode=rec_mode, phase1_step=phase1_step,
        initial_done_step=initial_done_step, separation=rec_sep, person_excess=rec_excess,
    )  # fmt: skip


def _record(robot, interface, operator, suite: Suite, plan: EpisodePlan, out: dict, world=None,
            speed_cap: float = 0.25) -> RolloutRecord:  # fmt: skip
    sep = out.pop("separation")
    extras = {
        # [E, T+1] m: the closest link sphere to furniture, to the person, and between non-adjacent links
        # (inf without bodies)
        "sep_furniture": sep[0], "sep_person": sep[1], "sep_self": sep[2],
        "person_excess": out.pop("person_excess"),  # [E, T] a sphere approached the person faster than allowed
        "world": None if world is None else world_summary(world, speed_cap),
        "q": out.pop("q"),  # [E, T+1, n] joint positions
        "qd": out.pop("qd"),  # [E, T, n] applied joint velocities (after limits; zero when holding)
        "stick": out.pop("stick"),  # [E, T, 2] stick the operator sent (before the filter); nan when not driving
        "mode": out.pop("mode"),  # [E, T] interface mode after each step's choice
        "phase1_step": out.pop("phase1_step"),  # [E] first step at the final goal's approach pose, -1 never
        "initial_done_step": out.pop("initial_done_step"),  # [E] initial goal completed before its switch
        "limits": out.pop("limits"),  # [E, T] uint8: JOINT_LIMIT | SPEED_CAP | WORKSPACE bits of the applied command
        "reach_goal": out.pop("reach_goal"),  # [E, T, G] some candidate stick made progress toward goal g
        "orientation_error": out.pop("orientation_error"),  # [E, T+1] rad to the current goal's approach rotation
        "position_tol": suite.position_tol,  # m, the suite's arrival tolerances (diagnosis reads them)
        "orientation_tol": suite.orientation_tol,  # rad
        "goal_targets": plan.layout.targets,  # [E, G, 2, 3]
        "operator": operator.name,
        "robot": robot.name,
        "seed": suite.seed,
    }
    return RolloutRecord(
        interface=interface.name, suite=suite.name, goal_names=list(plan.layout.names), dt=suite.step_dt,
        goal_initial=plan.goal_initial, goal_final=plan.goal_final, switch_step=plan.switch_step,
        switch_fraction=plan.switch_fraction, extras=extras, **out,
    )  # fmt: skip


def _world(robot, suite: Suite, limits, world):
    """The ArmWorld of the suite's scene (None without bodies); `world=False` leaves the bodies out."""
    if world is False:
        return None
    if world is None:
        return arm_world(robot, suite.scene, limits.tcp_speed_max)
    return world


def world_summary(world, speed_cap: float) -> dict:
    """What metrics and reports need to know of the world: names, zones (the reduced-speed zone for the tool
    speed cap `speed_cap`), clearance (plain values)."""
    s = world.world.settings
    return {"furniture": [b.name for b in world.world.furniture], "person": [b.name for b in world.world.person],
            "clearance": s.clearance, "keep_out": s.keep_out, "reduced_zone": s.reduced_zone(speed_cap),
            "excess_tol": EXCESS_TOL}  # fmt: skip


def rollout(robot, interface, operator, suite: Suite, belief_model, limits, generator: torch.Generator,
            progress: Progress | None = None, *, stick_gain_every: int = 10,
            dtype: torch.dtype = torch.float64, world=None) -> RolloutRecord:  # fmt: skip
    """Run every episode of `suite` with `interface` driven by `operator`, all episodes as one batch.
    The suite's scene bodies are in the loop (the filter's separation step and the separation records)
    unless `world=False`; an ArmWorld may be given to reuse one.

    `generator` is the only source of randomness: the episode plan is drawn from it first, then the
    operator's choices and perturbations. Give every interface a fresh `suite.generator()` so all of them
    meet the same episodes. `progress(step, total)` is called after every control step.
    """
    plan = suite.episodes_plan(generator, robot)
    world = _world(robot, suite, limits, world)
    with torch.no_grad():
        out = _simulate(robot, interface, operator, suite, belief_model, limits, plan, generator, progress,
                        stick_gain_every, dtype, world)  # fmt: skip
    return _record(robot, interface, operator, suite, plan, out, world, limits.tcp_speed_max)


def rollout_per_episode(robot, interface, operator, suite: Suite, belief_model, limits,
                        generator: torch.Generator, progress: Progress | None = None, *,
                        stick_gain_every: int = 10, dtype: torch.dtype = torch.float64,
                        world=None) -> RolloutRecord:  # fmt: skip
    """The same rollouts one episode at a time (a plain Python loop): the reference `coreach bench vet`
    measures the batched loop against. Same plan as `rollout` for the same generator; with a
    deterministic operator (e.g. greedy) the outcomes are identical."""
    plan = suite.episodes_plan(generator, robot)
    world = _world(robot, suite, limits, world)
    parts = []
    E, T = len(plan), suite.steps
    with torch.no_grad():
        for e in range(E):
            step = None if progress is None else (lambda t, _T, e=e: progress(e * T + t, E * T))
            parts.append(_simulate(robot, interface, operator, suite, belief_model, limits, plan.select([e]),
                                   generator, step, stick_gain_every, dtype, world))  # fmt: skip
    out = {k: torch.cat([p[k] for p in parts], dim=1 if k == "separation" else 0) for k in parts[0]}
    return _record(robot, interface, operator, suite, plan, out, world, limits.tcp_speed_max)
