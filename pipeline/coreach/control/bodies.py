"""Signed distances from points to the scene's primitives (box, cylinder, sphere, capsule), batched, array API.

Every primitive is written as one shape: a box of half extents h, rounded by a radius r, in its own frame
(rotation R, centre t). Its signed distance at a local point p is the box's, minus r:

    q = |p| - h;   sdf_box(p) = |max(q, 0)| + min(max_i q_i, 0);   sdf(p) = sdf_box(p) - r

- sphere of radius R:                 h = (0, 0, 0),        r = R
- capsule (axis z, half length L):    h = (0, 0, L),        r = R
- box of half extents (a, b, c):      h = (a, b, c),        r = 0
- cylinder (axis z, radius R, half length L): the point is first folded onto its radial plane,
  p' = (sqrt(x^2 + y^2), 0, z), and the box is h = (R, BIG, L), r = 0 (BIG keeps the unused axis out of
  max_i q_i), which is the exact signed distance of a solid cylinder.
(Textbook signed distance functions of convex primitives; the comparison is tests/test_bodies_coal.py, against
the coal collision library.)

A link of the arm is modelled as spheres (coreach.world.link_model), so the distance between a link body and an
obstacle is `sdf(centre) - sphere radius`: exact for a sphere, and one code path for every obstacle at once.
The gradient of the distance with respect to the sphere centre (a unit vector, the direction in which the
distance grows fastest) is returned with it: the separation filter needs it to predict how a command changes
each distance.

The functions take numpy arrays on the robot computer and torch tensors in vetting (coreach.control.arrays).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from coreach.control.arrays import namespace

__all__ = ["SHAPES", "BIG", "Primitive", "PackedBodies", "pack", "point_distances", "sphere_pair_distances", "sum3",
           "max3"]

SHAPES = ("box", "cylinder", "sphere", "capsule")
# half extent of a cylinder's unused axis after folding: far larger than any scene, small enough for float32
BIG = 1e6


@dataclass(frozen=True)
class Primitive:
    """One body: `shape` in SHAPES, `size` as written in a scene (box: [x, y, z] full lengths; cylinder and
    capsule: [radius, length], the length along the body's z-axis, a capsule's without its end caps;
    sphere: [radius]), pose `xyz` (m) and `rpy` (rad, URDF roll-pitch-yaw) in the world frame."""

    name: str
    shape: str
    size: tuple[float, ...]
    xyz: tuple[float, float, float] = (0.0, 0.0, 0.0)
    rpy: tuple[float, float, float] = (0.0, 0.0, 0.0)

    def half_extents_and_radius(self) -> tuple[tuple[float, float, float], float, bool]:
        """(h, r, folded) of the rounded-box form in the module docstring."""
        s = self.size
        if self.shape == "box":
            return (s[0] / 2, s[1] / 2, s[2] / 2), 0.0, False
        if self.shape == "sphere":
            return (0.0, 0.0, 0.0), s[0], False
        if self.shape == "capsule":
            return (0.0, 0.0, s[1] / 2), s[0], False
        if self.shape == "cylinder":
            return (s[0], BIG, s[1] / 2), 0.0, True
        raise ValueError(f"unknown shape {self.shape!r}; expected one of {SHAPES}")


@dataclass
class PackedBodies:
    """O primitives as arrays, the form the distance functions take: rotations [O, 3, 3] (body -> world),
    centres [O, 3], half extents [O, 3], radii [O], folded [O] bool (cylinders). `shifted` gives the same
    bodies translated per episode (centres [E, O, 3]); only translations vary, so rotations stay shared."""

    names: list[str]
    rot: np.ndarray
    centre: np.ndarray
    half: np.ndarray
    radius: np.ndarray
    folded: np.ndarray

    def __post_init__(self):
        # every body frame at once: p_local = p^T R - t^T R, as one product p^T [R_1 ... R_O] ([3, 3 O])
        O = self.rot.shape[0] if self.rot.ndim == 3 else 0
        self.rot_cat = np.transpose(self.rot, (1, 0, 2)).reshape(3, 3 * O) if O else None
        self.centre_local = (self.centre[..., None, :] @ self.rot)[..., 0, :] if O else None
        # folding as products, not per-axis selects ([O, 3], broadcast over the points): p = local * keep +
        # rho * radial, with keep = (0, 0, 1), radial = (1, 0, 0) on a cylinder, keep = (1, 1, 1), radial = 0
        # elsewhere; planar = (1, 1, 0) on a cylinder picks its radial plane
        if isinstance(self.folded, np.ndarray) and self.folded.ndim == 1:
            f = self.folded[:, None]
            self.keep = np.where(f, [0.0, 0.0, 1.0], 1.0)
            self.radial = np.where(f, [1.0, 0.0, 0.0], 0.0)
            self.planar = np.where(f, [1.0, 1.0, 0.0], 0.0)

    def __len__(self) -> int:
        return len(self.names)

    def shifted(self, shift) -> PackedBodies:
        """The same bodies translated per episode by shift [E, O, 3] (m, world frame): centres [E, O, 3].
        point_distances then takes points [E, S, 3] (one leading episode axis) and measures episode e's points
        against episode e's bodies. The body-frame centres are the unshifted ones plus the shift's (R^T s), so
        a zero shift gives exactly the unshifted numbers."""
        shift = np.asarray(shift, dtype=np.float64)
        out = PackedBodies(self.names, self.rot, self.centre + shift, self.half, self.radius, self.folded)
        if self.centre_local is not None:
            # [E, 1, O, 3]: broadcast over the S points of each episode in point_distances' one-product path
            out.centre_local = (self.centre_local + (shift[..., None, :] @ self.rot)[..., 0, :])[:, None]
        return out

    def take(self, index) -> PackedBodies:
        """Bodies index [K] as K groups of one ([K, 1, 1, ...] arrays): with points [K, 1, 3], point_distances
        then measures point k against body index[k] only. Per-episode bodies (`shifted`) keep their episode
        axis: centres [E, K, 1, 1, 3], against points [E, K, 1, 3]."""
        keys = ("rot", "centre", "half", "radius", "folded", "keep", "radial", "planar")
        out = object.__new__(PackedBodies)
        out.names, out.rot_cat, out.centre_local = [], None, None  # [K, 1, 1, 3, 3] rotations: the per-point path
        for k in keys:
            v = getattr(self, k)
            setattr(out, k, v[:, index][:, :, None, None] if k == "centre" and v.ndim == 3 else v[index][:, None, None])
        return out

    def as_namespace(self, xp, like) -> PackedBodies:
        """The same bodies as arrays of `like`'s namespace, dtype and device (torch in vetting), made once."""
        if xp is np or type(like) is np.ndarray or type(self.rot) is type(like):
            return self
        key = (str(like.dtype), str(getattr(like, "device", "")))
        cache = self.__dict__.setdefault("_converted", {})
        if key not in cache:
            out = object.__new__(PackedBodies)
            out.names = self.names
            for k in ("rot", "centre", "half", "radius", "rot_cat", "centre_local", "keep", "radial", "planar"):
                v = getattr(self, k)
                setattr(out, k, None if v is None else xp.asarray(v, dtype=like.dtype, device=like.device))
            out.folded = xp.asarray(self.folded, device=like.device)
            cache[key] = out
        return cache[key]


def _rpy_matrix(rpy) -> np.ndarray:
    r, p, y = rpy
    cr, sr, cp, sp, cy, sy = math.cos(r), math.sin(r), math.cos(p), math.sin(p), math.cos(y), math.sin(y)
    return np.array([[cy * cp, cy * sp * sr - sy * cr, cy * sp * cr + sy * sr],
                     [sy * cp, sy * sp * sr + cy * cr, sy * sp * cr - cy * sr],
                     [-sp, cp * sr, cp * cr]])  # fmt: skip


def pack(bodies: list[Primitive]) -> PackedBodies:
    """Primitives -> PackedBodies (float64 numpy)."""
    forms = [b.half_extents_and_radius() for b in bodies]
    if not bodies:
        z = np.zeros((0, 3))
        return PackedBodies([], np.zeros((0, 3, 3)), z, z.copy(), np.zeros(0), np.zeros(0, dtype=bool))
    return PackedBodies(
        names=[b.name for b in bodies],
        rot=np.stack([_rpy_matrix(b.rpy) for b in bodies]),
        centre=np.array([b.xyz for b in bodies], dtype=np.float64),
        half=np.array([f[0] for f in forms], dtype=np.float64),
        radius=np.array([f[1] for f in forms], dtype=np.float64),
        folded=np.array([f[2] for f in forms], dtype=bool),
    )


# Sums and maxima over a last axis of 3 written out: numpy's reductions over a short last axis cost 5-15 us
# each on [31, 15, 3] arrays, three element-wise operations about 2 us; the robot's step makes several of them.
# Rerun: python -m timeit -s 'import numpy as np; x = np.random.rand(31, 15, 3)' 'x.sum(-1)' (6.2 us; 'x.max(-1)'
# 14.2 us; 'x[..., 0] + x[..., 1] + x[..., 2]' 1.6 us; numpy 2.4, 2-core development machine, 2026-12-06).
def sum3(x):
    """x[..., 3] -> x_0 + x_1 + x_2 [...]."""
    return x[..., 0] + x[..., 1] + x[..., 2]


def max3(x, xp):
    """x[..., 3] -> max(x_0, x_1, x_2) [...]."""
    return xp.maximum(xp.maximum(x[..., 0], x[..., 1]), x[..., 2])


def point_distances(points, bodies: PackedBodies, grad: bool = True):
    """Signed distances from points [..., S, 3] (world frame) to every body: (d [..., S, O] m, negative
    inside; grad [..., S, O, 3] unit vectors, world frame, d's gradient with respect to the point, or None
    when `grad` is false). With per-episode bodies (PackedBodies.shifted) the points are [E, S, 3]."""
    xp = namespace(points)
    b = bodies.as_namespace(xp, points)
    # body frame: p_local = R^T (p - t), as the row vector (p - t)^T R; [..., S, O, 3]
    if b.rot_cat is not None and b.rot.ndim == 3:  # one product for every body
        S = points.shape[-2]
        local = xp.reshape(points @ b.rot_cat, (*points.shape[:-2], S, -1, 3)) - b.centre_local
    else:  # bodies taken per point (PackedBodies.take)
        rel = points[..., :, None, :] - b.centre
        local = (rel[..., None, :] @ b.rot)[..., 0, :]
    # cylinders: fold (x, y) onto the radial axis: p = (rho, 0, z)
    planar = local * b.planar  # (x, y, 0) on a cylinder, 0 elsewhere
    rho = xp.sqrt(sum3(planar * planar))[..., None]  # [..., S, O, 1]
    p = local * b.keep + rho * b.radial
    q = xp.abs(p) - b.half  # [..., S, O, 3]
    out = xp.maximum(q, 0.0)
    out_norm = xp.sqrt(sum3(out * out))  # [..., S, O]
    qmax = max3(q, xp)
    d = out_norm + xp.minimum(qmax, 0.0) - b.radius
    if not grad:
        return d, None
    # gradient in the folded frame: outside, along max(q, 0); inside, along the axis of the nearest face
    sgn = xp.where(p >= 0.0, 1.0, -1.0)
    outside = out_norm > 0.0
    face = xp.astype(q == qmax[..., None], p.dtype)
    g = xp.where(outside[..., None], out / xp.where(outside, out_norm, 1.0)[..., None], face) * sgn
    g = g / xp.sqrt(sum3(g * g))[..., None]  # a tie (an edge or corner inside) splits evenly
    # unfold: the radial component points along (x, y) / rho (any direction on the axis itself: x)
    on_axis = rho < 1e-12
    u = xp.where(on_axis, b.radial, planar / xp.where(on_axis, 1.0, rho))  # (x, y, 0) / rho on a cylinder
    g_local = g * b.keep + g[..., :1] * u
    # R g_local, column by column (a batched [3, 3] @ [3, 1] product per pair is many times slower in numpy)
    rot = b.rot
    return d, (g_local[..., 0, None] * rot[..., :, 0] + g_local[..., 1, None] * rot[..., :, 1]
               + g_local[..., 2, None] * rot[..., :, 2])  # fmt: skip


def sphere_pair_distances(centres, radii, first, second):
    """Distances between sphere pairs (first[i], second[i]) of centres [..., S, 3] with radii [S] (numpy):
    (d [..., P] = |c_a - c_b| - r_a - r_b, u [..., P, 3] unit vector from b to a)."""
    xp = namespace(centres)
    r = radii[first] + radii[second]
    if type(centres) is not np.ndarray:
        first, second, r = xp.asarray(first), xp.asarray(second), xp.asarray(r, dtype=centres.dtype)
    diff = centres[..., first, :] - centres[..., second, :]
    norm = xp.sqrt(sum3(diff * diff))
    u = diff / xp.where(norm > 1e-12, norm, 1.0)[..., None]
    return norm - r, u
