"""How the scripted demonstrator gets around furniture: a detour point for the tool, and a null-space push for
the other links.

Why these two and not a sampling planner (e.g. OMPL): the demonstrator runs hundreds of episodes as one
batch of tensors, and its labels must be a smooth velocity law that a decoder can learn. A detour point keeps
the resolved-rate law (straight tool segments start -> detour -> approach point) and is found once per
episode; the push moves the elbow and wrist away from nearby bodies inside the null space of the tool's task,
so the tool's motion is unchanged. Both are followed by the shared safety filter, which guarantees the
clearance whatever the demonstrator does; these two only keep the filter from having to stop it.
"""

from __future__ import annotations

import itertools

import numpy as np
import torch
from torch import Tensor

from coreach.control.bodies import pack, point_distances
from coreach.control.separation import measure, row_thresholds

__all__ = ["detour_points", "null_space_push", "DETOUR_MARGIN"]

DETOUR_MARGIN = 0.03  # m kept between the gripper's spheres and furniture on a planned tool segment
_SAMPLES = 16  # points checked per segment
# detour offsets tried from the segment's midpoint (m): up, down, sideways and diagonals; pairs of detour
# points (one on each side of a body across the way) come from the coarser set
_OFFSETS = np.array([v for v in itertools.product((0.0, -0.15, 0.15, -0.3, 0.3), (0.0, -0.15, 0.15, -0.3, 0.3),
                                                  (0.0, -0.15, 0.15, 0.3))
                     if any(v)], dtype=np.float64)  # fmt: skip
_PAIR_OFFSETS = np.array([v for v in itertools.product((-0.15, 0.15), (0.0, -0.3, 0.3), (0.0, -0.3, 0.3))],
                         dtype=np.float64)


def _blocked(a: np.ndarray, b: np.ndarray, packed, inflate: float) -> np.ndarray:
    """Segments a [..., 3] -> b [..., 3]: does any sampled point come within `inflate` of a body? [...]"""
    t = np.linspace(0.0, 1.0, _SAMPLES)[:, None]
    pts = a[..., None, :] + t * (b - a)[..., None, :]  # [..., K, 3]
    d, _ = point_distances(pts, packed, grad=False)  # [..., K, O]
    return (d < inflate).any(axis=(-2, -1))


def detour_points(world, start: Tensor, goal: Tensor) -> Tensor:
    """[E, 2, 3] up to two detour points per episode (nan where none is needed or none was found): the
    shortest path start -> detour(s) -> goal whose segments keep the gripper's largest sphere DETOUR_MARGIN plus
    the clearance away from furniture; one detour point when one suffices, else a pair."""
    E = start.shape[0]
    out = torch.full((E, 2, 3), float("nan"), dtype=torch.float64)
    if world is None or not world.world.furniture:
        return out
    packed = pack(world.world.furniture)
    inflate = world.gripper_radius
    inflate += world.world.settings.clearance + DETOUR_MARGIN
    a, b = start.numpy().astype(np.float64), goal.numpy().astype(np.float64)
    need = _blocked(a, b, packed, inflate)
    for e in np.nonzero(need)[0]:
        via = (a[e] + b[e]) / 2 + _OFFSETS  # [C, 3]
        ok = ~_blocked(np.broadcast_to(a[e], via.shape), via, packed, inflate) & ~_blocked(
            via, np.broadcast_to(b[e], via.shape), packed, inflate)
        if ok.any():
            length = np.linalg.norm(via - a[e], axis=-1) + np.linalg.norm(b[e] - via, axis=-1)
            out[e, 0] = torch.from_numpy(via[np.argmin(np.where(ok, length, np.inf))])
            continue
        # a pair: the first near the start's side, the second near the goal's side of the way
        along = b[e] - a[e]
        first = a[e] + along / 3 + _PAIR_OFFSETS  # [C, 3]
        second = a[e] + 2 * along / 3 + _PAIR_OFFSETS
        C = len(_PAIR_OFFSETS)
        ok1 = ~_blocked(np.broadcast_to(a[e], first.shape), first, packed, inflate)  # [C]
        ok3 = ~_blocked(second, np.broadcast_to(b[e], second.shape), packed, inflate)  # [C]
        f, g = np.broadcast_to(first[:, None], (C, C, 3)), np.broadcast_to(second[None], (C, C, 3))
        ok = ok1[:, None] & ok3[None, :] & ~_blocked(f, g, packed, inflate)  # [C, C]
        if ok.any():
            length = (np.linalg.norm(first - a[e], axis=-1)[:, None] + np.linalg.norm(g - f, axis=-1)
                      + np.linalg.norm(b[e] - second, axis=-1)[None, :])  # fmt: skip
            i, j = np.unravel_index(np.argmin(np.where(ok, length, np.inf)), ok.shape)
            out[e, 0], out[e, 1] = torch.from_numpy(first[i]), torch.from_numpy(second[j])
    return out


def null_space_push(world, q: Tensor, J: Tensor, damping: float, reach: float = 0.06, gain: float = 1.0) -> Tensor:
    """[B, n] joint velocity that moves link spheres away from bodies (and from each other) closer than their
    protective distance plus `reach` (m), weighted linearly from 0 at that distance to 1 at the protective
    distance, projected into the null space of the tool's 6-D task (I - J^T (J J^T + damping^2 I)^-1 J), so
    the tool's motion is not changed."""
    w, centres, jac = world.separation(q)
    lookahead = 1.0  # only the protective distances matter here, not the rule's look-ahead
    d_body, _, d_self, _ = w.thresholds(lookahead, torch, centres)
    geo = measure(w, centres, jac, d_body + reach, d_self + reach)
    d_p, _ = row_thresholds(w, geo, lookahead, torch, centres)
    weight = ((d_p + reach - geo.d) / reach).clamp(0.0, 1.0)  # [B, R]
    push = gain * (weight[..., None] * geo.g).sum(dim=-2)  # [B, n]: grows every nearby distance
    J = J.to(torch.float64)
    Jt = J.transpose(-1, -2)
    A = J @ Jt + damping**2 * torch.eye(J.shape[-2], dtype=J.dtype)
    return push - (Jt @ torch.linalg.solve(A, (J @ push[..., None])))[..., 0]
