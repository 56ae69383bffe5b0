"""Numpy-only forward kinematics and geometric Jacobian of a URDF serial chain, for the torch-free runtime."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from coreach.world.geometry import quat_to_matrix, rpy_to_matrix
from coreach.world.urdf import JointSpec, parse_path, read_path

__all__ = ["Chain", "SpherePoints", "quat_to_matrix"]  # quat_to_matrix re-exported for the runtime session

_YZX = np.array([1, 2, 0])
_ZXY = np.array([2, 0, 1])


def _transform(spec: JointSpec) -> np.ndarray:
    """4x4 parent link -> joint frame of a URDF <origin>."""
    t = np.eye(4)
    t[:3, :3] = rpy_to_matrix(np.array(spec.rpy))
    t[:3, 3] = spec.xyz
    return t


def _axis_to_z(axis: np.ndarray) -> np.ndarray:
    """A 4x4 rotation whose third column is the unit `axis`: it maps the joint axis onto local z."""
    helper = np.array([1.0, 0.0, 0.0]) if abs(axis[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    x = np.cross(helper, axis)
    x /= np.linalg.norm(x)
    a = np.eye(4)
    a[:3, 0], a[:3, 1], a[:3, 2] = x, np.cross(axis, x), axis
    return a


class SpherePoints:
    """Points rigidly attached to links of a Chain: moving-frame index [S] (-1 = root, static), the point in
    that frame [S, 3], and which joints move it, upstream [S, n]."""

    def __init__(self, frame: np.ndarray, local: np.ndarray, chain: Chain):
        self.frame, self.local = frame, local
        self.static = frame < 0
        self.upstream = np.arange(chain.dof)[None, :] <= frame[:, None]


class Chain:
    """Tool pose and geometric Jacobian (base = root link frame) of a serial chain, batched over q [..., n]."""

    def __init__(self, joints: list[JointSpec], tool_link: str):
        self.tool_link = tool_link
        movable = [j for j in joints if j.movable]
        self.joint_names = [j.name for j in movable]
        self.kinds = [j.kind for j in movable]
        self.q_lower = np.array([j.lower for j in movable])
        self.q_upper = np.array([j.upper for j in movable])
        self.qd_max = np.array([j.velocity for j in movable])
        # Fold fixed joints into the origin of the next movable joint (or into the tool offset), and turn
        # each joint frame so that its axis is local z: with A_i mapping z onto axis i, the motion about
        # axis i is A_i Rz(q) A_i^T, and A_i^T joins the next origin. Then the local transform of joint i
        # is M_i Rz(q_i) (M_i Tz(q_i) if prismatic), which changes only columns 0-1 (column 3), and the
        # world axis and origin of joint i are columns 2 and 3 of its frame.
        origins, pending, turn_back = [], np.eye(4), np.eye(4)
        # every link on the path: (index of the moving frame it rides on, -1 = the root; its pose in that frame)
        self.link_frames: dict[str, tuple[int, np.ndarray]] = {joints[0].parent: (-1, np.eye(4))} if joints else {}
        for j in joints:
            pending = pending @ _transform(j)
            if j.movable:
                turn = _axis_to_z(np.array(j.axis))
                origins.append(turn_back @ pending @ turn)
                pending, turn_back = np.eye(4), turn.T
                self.link_frames[j.child] = (len(origins) - 1, turn.T.copy())
            else:
                k, pose = self.link_frames[j.parent]
                self.link_frames[j.child] = (k, pose @ _transform(j))
        self._m = np.stack(origins)  # [n, 4, 4] M_i
        self._tool = turn_back @ pending  # [4, 4] last joint frame (axis = z) -> tool link
        self._m01 = self._m[:, :, 0:2].copy()  # [n, 4, 2] columns 0-1 of M
        self._m1n0 = np.stack([self._m[:, :, 1], -self._m[:, :, 0]], axis=-1)  # [n, 4, 2] (M1, -M0)
        # M Rz(q) columns 0-1 = cos(q) (M0, M1) + sin(q) (M1, -M0)
        self._prismatic = np.array([k == "prismatic" for k in self.kinds])
        self._has_prismatic = bool(self._prismatic.any())

    @classmethod
    def from_urdf(cls, path: str | Path, tool_link: str = "tool") -> Chain:
        return cls(read_path(path, tool_link)[1], tool_link)

    @classmethod
    def from_string(cls, text: str, tool_link: str = "tool", where: str = "robot.urdf") -> Chain:
        return cls(parse_path(text, tool_link, where), tool_link)

    @property
    def dof(self) -> int:
        return len(self.joint_names)

    def _locals(self, q: np.ndarray) -> np.ndarray:
        """Local transforms M_i Rz(q_i) / M_i Tz(q_i) [..., n, 4, 4] for q [..., n]."""
        if q.shape[-1:] != (self.dof,):
            raise ValueError(f"q must have shape [..., {self.dof}], got {list(q.shape)}")
        c, s = np.cos(q), np.sin(q)
        if self._has_prismatic:  # a slide leaves the rotation at identity
            c = np.where(self._prismatic, 1.0, c)
            s = np.where(self._prismatic, 0.0, s)
        local = self._m.copy() if q.ndim == 1 else np.broadcast_to(self._m, q.shape + (4, 4)).copy()
        local[..., 0:2] = c[..., None, None] * self._m01 + s[..., None, None] * self._m1n0
        if self._has_prismatic:
            slide = np.where(self._prismatic, q, 0.0)[..., None]  # [..., n, 1]
            local[..., 3] += slide * self._m[:, :, 2]
        return local

    def _frames(self, q) -> tuple[np.ndarray, np.ndarray]:
        """Joint frames after motion [..., n, 4, 4] and the tool frame [..., 4, 4] for q [..., n]."""
        q = np.asarray(q, dtype=np.float64)
        local = self._locals(q)
        frames = np.empty_like(local)
        if q.ndim == 1:  # the control loop's case: ndarray.dot on 2-D views has the least call overhead
            out, steps = list(frames), list(local)
            acc = out[0]
            acc[...] = steps[0]
            for i in range(1, self.dof):
                acc = acc.dot(steps[i], out=out[i])
            return frames, acc.dot(self._tool)
        frames[..., 0, :, :] = local[..., 0, :, :]
        for i in range(1, self.dof):
            np.matmul(frames[..., i - 1, :, :], local[..., i, :, :], out=frames[..., i, :, :])
        return frames, frames[..., -1, :, :] @ self._tool

    def fk(self, q) -> tuple[np.ndarray, np.ndarray]:
        """Tool position [..., 3] (m) and rotation [..., 3, 3] in the base frame."""
        _, tool = self._frames(q)
        return tool[..., :3, 3], tool[..., :3, :3]

    def fk_jacobian(self, q, frames_out: list | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Tool position [..., 3], rotation [..., 3, 3] and geometric Jacobian [..., 6, n] (rows 0-2 linear,
        3-5 angular velocity, both in the base frame, linear at the tool point). `frames_out`, a list, receives
        the joint frames, so `points` at the same q need not compute them again."""
        frames, tool = self._frames(q)
        if frames_out is not None:
            frames_out.append(frames)
        # Rotating about (or sliding along) local z leaves z and the origin unchanged, so the frame after
        # the motion gives the joint's world axis (column 2) and origin (column 3).
        z = frames[..., :3, 2]  # [..., n, 3]
        p_tool = tool[..., :3, 3]
        lever = p_tool[..., None, :] - frames[..., :3, 3]  # [..., n, 3] joint origin -> tool
        jac = np.empty(z.shape[:-1] + (6,))  # [..., n, 6]
        if lever.ndim == 2:  # single q: a cross product of seven 3-vectors is cheaper on Python floats
            jac[:, :3] = [(a[1] * b[2] - a[2] * b[1], a[2] * b[0] - a[0] * b[2], a[0] * b[1] - a[1] * b[0])
                          for a, b in zip(z.tolist(), lever.tolist())]
        else:
            jac[..., :3] = z[..., _YZX] * lever[..., _ZXY] - z[..., _ZXY] * lever[..., _YZX]  # z x lever
        jac[..., 3:] = z
        if self._has_prismatic:  # a slide moves the tool along its axis and does not turn it
            jac[..., self._prismatic, :3] = z[..., self._prismatic, :]
            jac[..., self._prismatic, 3:] = 0.0
        return p_tool, tool[..., :3, :3], np.swapaxes(jac, -1, -2)

    def jacobian(self, q) -> np.ndarray:
        return self.fk_jacobian(q)[2]

    def attach(self, links: list[str], centres) -> SpherePoints:
        """Points fixed to links (centres [S, 3] in each link's frame) -> SpherePoints, for `points`."""
        idx, local = [], []
        for name, c in zip(links, np.asarray(centres, dtype=np.float64)):
            if name not in self.link_frames:
                raise ValueError(f"link {name!r} is not on the root-to-tool path {sorted(self.link_frames)}")
            k, pose = self.link_frames[name]
            idx.append(k)
            local.append(pose[:3, :3] @ c + pose[:3, 3])
        return SpherePoints(np.array(idx, dtype=np.int64), np.array(local).reshape(-1, 3), self)

    def points(self, q, attached: SpherePoints, frames=None, jacobian: bool = True):
        """World positions [..., S, 3] of attached points and their linear Jacobians [..., S, 3, n] at q (None
        without `jacobian`)."""
        if frames is None:
            frames = self._frames(q)[0]
        k = attached.frame
        moving = np.maximum(k, 0)
        f = frames[..., moving, :, :]  # [..., S, 4, 4]
        pos = (f[..., :3, :3] @ attached.local[..., None])[..., 0] + f[..., :3, 3]
        pos = np.where(attached.static[:, None], attached.local, pos)
        if not jacobian:
            return pos, None
        z = frames[..., :3, 2]  # [..., n, 3] joint axes
        lever = pos[..., :, None, :] - frames[..., None, :, :3, 3]  # [..., S, n, 3]
        zz = np.broadcast_to(z[..., None, :, :], lever.shape)
        cross = zz[..., _YZX] * lever[..., _ZXY] - zz[..., _ZXY] * lever[..., _YZX]
        if self._has_prismatic:
            cross = np.where(self._prismatic[:, None], zz, cross)
        jac = np.where(attached.upstream[..., None], cross, 0.0)  # joints after the point's link do not move it
        return pos, np.swapaxes(jac, -1, -2)
