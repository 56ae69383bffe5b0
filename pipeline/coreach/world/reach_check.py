"""Can this arm, placed where it is, do every goal of a scene? Checked before any demonstration is made.

For each goal: the approach pose and the end of the fine motion (same orientation) are solved by inverse
kinematics from several starts (damped least squares, Nakamura & Hanafusa 1986, with the joints kept inside
their limits); a pose counts as reachable when a solution is within `pos_tol` and `ang_tol`. Of the solutions
the one with the largest margin to the joint limits is reported, with its manipulability (the smallest
singular value of the 6 x n Jacobian: near zero means a singular pose where some tool motion is impossible).
In a scene with bodies a solution must also keep every link clear (coreach.world.scene_arm: the clearance from furniture
and between links, the keep-out distance from the person), and the approach must come from open space: the
tool's path over the last `approach_m` before the approach point, along the approach axis, keeps the gripper's
largest sphere and the clearance away from every piece of furniture.
When a goal is out of reach, base placements on a grid around the current one are tried (moving the base by d
is moving every goal by -d) and the one that reaches every goal with the largest margin is suggested.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np
import torch
from torch import Tensor

from coreach.config.option_specs import integer, number
from coreach.control.bodies import pack, point_distances
from coreach.world.geometry import rotation_error, rpy_to_matrix
from coreach.world.scene_arm import arm_world

__all__ = ["ReachOptions", "GoalReach", "check_reach", "suggest_base_shift"]


@dataclass(frozen=True)
class ReachOptions:
    starts: int = integer(12, 1, " (IK starts per pose: home, then uniform within the joint limits)")
    iterations: int = integer(150, 1)
    damping: float = number(0.05, 0.0, 1.0)
    pos_tol: float = number(0.002, 0.0, 0.1, "m", open_range=True)
    ang_tol_deg: float = number(1.0, 0.0, 45.0, "deg", open_range=True)
    seed: int = integer(0, 0)
    shift_range: float = number(0.3, 0.0, 2.0, "m (base shifts tried per axis: -range..range)")
    shift_step: float = number(0.1, 0.0, 1.0, "m", open_range=True)
    approach_m: float = number(0.10, 0.0, 1.0, "m (the approach corridor checked for open space)")


@dataclass
class GoalReach:
    goal: str
    approach_reachable: bool
    fine_reachable: bool
    approach_error_m: float  # best position error of the approach pose (m)
    limit_margin_rad: float  # smallest distance to a joint limit at the chosen solution (rad; nan if unreachable)
    manipulability: float  # smallest singular value of the Jacobian there (nan if unreachable)
    collision_free: bool = True  # some solution of both poses keeps every link clear of the scene's bodies
    open_approach: bool = True  # the approach corridor is clear of furniture
    blocked_by: str = ""  # the body in the way, when one is

    @property
    def reachable(self) -> bool:
        return self.approach_reachable and self.fine_reachable and self.collision_free and self.open_approach


def _targets(scene, shift: Tensor) -> tuple[Tensor, Tensor]:
    """[S, G, 2, 3] approach point and fine-motion end per base shift (goals move by -shift); [G, 3, 3]."""
    pos = torch.tensor([g.position for g in scene.goals], dtype=torch.float64)  # [G, 3]
    fine = torch.tensor([g.fine_motion for g in scene.goals], dtype=torch.float64)
    rot = rpy_to_matrix(torch.deg2rad(torch.tensor([g.approach_rpy_deg for g in scene.goals], dtype=torch.float64)))
    pts = torch.stack([pos, pos + fine], dim=1)  # [G, 2, 3]
    return pts[None] - shift[:, None, None, :], rot


def _solve(robot, pos: Tensor, rot: Tensor, opt: ReachOptions) -> tuple[Tensor, Tensor, Tensor]:
    """IK for B target poses (pos [B, 3], rot [B, 3, 3]) from opt.starts starts each.
    Returns q [B, K, n], position error [B, K], angle error [B, K] (rad)."""
    B, K = pos.shape[0], opt.starts
    lo, hi = robot.q_lower.to(torch.float64), robot.q_upper.to(torch.float64)
    lo_f = torch.where(torch.isfinite(lo), lo, torch.full_like(lo, -math.pi))
    hi_f = torch.where(torch.isfinite(hi), hi, torch.full_like(hi, math.pi))
    gen = torch.Generator().manual_seed(opt.seed)
    q = lo_f + (hi_f - lo_f) * torch.rand(B, K, lo.shape[0], generator=gen, dtype=torch.float64)
    q[:, 0] = robot.q_home.to(torch.float64)
    q = q.reshape(B * K, -1)
    p_t = pos.repeat_interleave(K, 0)
    r_t = rot.repeat_interleave(K, 0)
    eye = torch.eye(6, dtype=torch.float64)
    for _ in range(opt.iterations):
        p, r = robot.fk(q)
        err = torch.cat([p_t - p.to(torch.float64), rotation_error(r_t, r.to(torch.float64))], dim=-1)  # [BK, 6]
        J = robot.jacobian(q).to(torch.float64)  # [BK, 6, n]
        step = J.transpose(-1, -2) @ torch.linalg.solve(J @ J.transpose(-1, -2) + opt.damping**2 * eye, err[..., None])
        q = torch.minimum(torch.maximum(q + step[..., 0], lo), hi)
    p, r = robot.fk(q)
    pos_err = (p_t - p.to(torch.float64)).norm(dim=-1)
    ang_err = rotation_error(r_t, r.to(torch.float64)).norm(dim=-1)
    return q.reshape(B, K, -1), pos_err.reshape(B, K), ang_err.reshape(B, K)


def _solved(robot, scene, shift: Tensor, opt: ReachOptions, world=None):
    """Per shift and goal: reachable flags [S, G, 2] and, for the approach pose, the best solution's
    position error, limit margin and manipulability [S, G]; with a world (ArmWorld) a solution also keeps
    the links clear, and the flags without that condition come fourth (collisions alone: [S, G, 2])."""
    pts, rot = _targets(scene, shift)
    S, G = pts.shape[:2]
    rot_b = rot[None, :, None].expand(S, G, 2, 3, 3).reshape(-1, 3, 3)
    q, pos_err, ang_err = _solve(robot, pts.reshape(-1, 3), rot_b, opt)
    ok = (pos_err < opt.pos_tol) & (ang_err < math.radians(opt.ang_tol_deg))  # [B, K]
    pose_ok = ok.any(dim=-1).reshape(S, G, 2)
    if world is not None:
        clear = torch.as_tensor(world.clear(world.geometry(q.numpy(), grad=False)))  # [B, K]
        ok = ok & clear
    lo, hi = robot.q_lower.to(torch.float64), robot.q_upper.to(torch.float64)
    margin = torch.minimum(q - lo, hi - q).amin(dim=-1)  # [B, K]; inf for a continuous joint
    score = torch.where(ok, margin, torch.full_like(margin, -math.inf))
    best = score.argmax(dim=-1)  # [B]
    rows = torch.arange(q.shape[0])
    q_best = q[rows, best]
    sv = torch.linalg.svdvals(robot.jacobian(q_best).to(torch.float64))[..., -1]  # [B] smallest singular value
    reach = ok.any(dim=-1).reshape(S, G, 2)
    shape = (S, G, 2)
    nan = torch.full(shape, math.nan, dtype=torch.float64)
    margin_b = torch.where(reach, margin[rows, best].reshape(shape), nan)
    sv_b = torch.where(reach, sv.reshape(shape), nan)
    return reach, pos_err.amin(dim=-1).reshape(shape), margin_b, sv_b, pose_ok


def _corridor(world, scene, opt: ReachOptions) -> list[str]:
    """Per goal, the furniture body in the approach corridor ("" when it is open)."""
    if world is None or not scene.obstacles:
        return [""] * len(scene.goals)
    r_tool = world.gripper_radius
    packed = pack(scene.obstacles)
    out = []
    for goal in scene.goals:
        axis = rpy_to_matrix(torch.deg2rad(torch.tensor(goal.approach_rpy_deg, dtype=torch.float64)))[:, 2].numpy()
        back = np.linspace(0.0, opt.approach_m, 6)[:, None]
        pts = np.asarray(goal.position) - back * axis  # [6, 3] the last approach_m before the approach point
        d, _ = point_distances(pts, packed, grad=False)  # [6, O]
        bad = d < r_tool + scene.separation.clearance
        out.append(scene.obstacles[int(np.argwhere(bad)[0, 1])].name if bad.any() else "")
    return out


def check_reach(robot, scene, opt: ReachOptions = ReachOptions()) -> list[GoalReach]:
    """One GoalReach per goal of `scene` for `robot` where it stands (the scene's frame is the robot's world)."""
    world = arm_world(robot, scene)
    with torch.no_grad():
        reach, err, margin, sv, pose_ok = _solved(robot, scene, torch.zeros(1, 3, dtype=torch.float64), opt, world)
    corridor = _corridor(world, scene, opt)
    out = []
    for g, goal in enumerate(scene.goals):
        posed = bool(pose_ok[0, g, 0]) and bool(pose_ok[0, g, 1])
        free = bool(reach[0, g].all()) or not posed
        out.append(GoalReach(goal.name, bool(pose_ok[0, g, 0]), bool(pose_ok[0, g, 1]), float(err[0, g, 0]),
                             float(margin[0, g, 0]), float(sv[0, g, 0]), collision_free=free,
                             open_approach=not corridor[g],
                             blocked_by=corridor[g] or ("" if free else "a scene body at every solution")))  # fmt: skip
    return out


def suggest_base_shift(robot, scene, opt: ReachOptions = ReachOptions()) -> tuple[list[float], float] | None:
    """(base shift [dx, dy, dz] in m, its smallest limit margin over all goals) of the grid placement that reaches
    every goal with the largest margin (nearest to the current placement on a tie), or None if none does."""
    n = int(round(opt.shift_range / opt.shift_step))
    axis = [i * opt.shift_step for i in range(-n, n + 1)]
    shifts = torch.tensor(list(itertools.product(axis, axis, axis)), dtype=torch.float64)  # [S, 3]
    cheap = ReachOptions(**{**opt.__dict__, "starts": max(4, opt.starts // 3)})
    with torch.no_grad():
        reach, _, margin, _, _ = _solved(robot, scene, shifts, cheap)
    all_ok = reach.all(dim=-1).all(dim=-1)  # [S]
    if not bool(all_ok.any()):
        return None
    worst = margin.amin(dim=-1).amin(dim=-1)  # [S]
    key = torch.where(all_ok, worst - 1e-3 * shifts.norm(dim=-1), torch.full_like(worst, -math.inf))
    i = int(key.argmax())
    return [round(float(v), 3) for v in shifts[i]], float(worst[i])
