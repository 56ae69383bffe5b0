"""Numpy-only forward kinematics and geometric Jacobian of a URDF serial chain, for the torch-free runtime."""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from coreach.errors import ConfigError

MOVABLE = ("revolute", "continuous", "prismatic")
SUPPORTED = MOVABLE + ("fixed",)
_YZX = np.array([1, 2, 0])
_ZXY = np.array([2, 0, 1])


def rpy_matrix(rpy) -> np.ndarray:
    """URDF roll-pitch-yaw (rad) -> 3x3 rotation R = Rz(yaw) Ry(pitch) Rx(roll) (fixed axes)."""
    r, p, y = (float(v) for v in rpy)
    cr, sr, cp, sp, cy, sy = math.cos(r), math.sin(r), math.cos(p), math.sin(p), math.cos(y), math.sin(y)
    return np.array(
        [
            [cy * cp, cy * sp * sr - sy * cr, cy * sp * cr + sy * sr],
            [sy * cp, sy * sp * sr + cy * cr, sy * sp * cr - cy * sr],
            [-sp, cp * sr, cp * cr],
        ]
    )


def quat_to_matrix(quat) -> np.ndarray:
    """Quaternions [..., 4] (w, x, y, z; normalised here) -> rotation matrices [..., 3, 3]."""
    q = np.asarray(quat, dtype=np.float64)
    q = q / np.linalg.norm(q, axis=-1, keepdims=True)
    w, x, y, z = q[..., 0], q[..., 1], q[..., 2], q[..., 3]
    rows = [
        1 - 2 * (y * y + z * z), 2 * (x * y - w * z), 2 * (x * z + w * y),
        2 * (x * y + w * z), 1 - 2 * (x * x + z * z), 2 * (y * z - w * x),
        2 * (x * z - w * y), 2 * (y * z + w * x), 1 - 2 * (x * x + y * y),
    ]  # fmt: skip
    return np.stack(rows, axis=-1).reshape(*q.shape[:-1], 3, 3)


def urdf_floats(text, default: tuple[float, ...], where: str, what: str) -> tuple[float, ...]:
    """A URDF attribute such as xyz="0 0 0.1" as floats (`default` when absent); ConfigError if malformed."""
    if text is None:
        return default
    try:
        values = tuple(float(v) for v in text.split())
    except ValueError:
        values = ()
    if len(values) != len(default) or not all(math.isfinite(v) for v in values):
        raise ConfigError(where, f"{what} must be {len(default)} finite numbers, got {text!r}")
    return values


def _transform(xyz, rpy) -> np.ndarray:
    t = np.eye(4)
    t[:3, :3] = rpy_matrix(rpy)
    t[:3, 3] = xyz
    return t


@dataclass(frozen=True)
class Joint:
    """One joint on the root-to-tool path as read from the URDF (float64)."""

    name: str
    kind: str
    parent: str
    child: str
    origin: np.ndarray  # [4, 4] parent link -> joint frame at q = 0
    axis: np.ndarray  # [3] unit vector in the joint frame (zeros for fixed joints)
    lower: float
    upper: float
    velocity: float


def parse_chain(text: str, tool_link: str, where: str = "robot.urdf") -> list[Joint]:
    """The joints from the root link to `tool_link`, root first; raises ConfigError naming what is wrong."""
    try:
        robot = ET.fromstring(text)
    except ET.ParseError as exc:
        raise ConfigError(where, f"not a readable URDF: XML error {exc}") from exc
    if robot.tag != "robot":
        raise ConfigError(where, f"not a URDF: root element is <{robot.tag}>, expected <robot>")
    links = [link.get("name") for link in robot.findall("link")]
    if tool_link not in links:
        raise ConfigError(where, f"tool link {tool_link!r} not found; links are: {', '.join(map(str, links[:12]))}")
    parent_joint: dict[str, ET.Element] = {}
    for joint in robot.findall("joint"):
        child, parent = joint.find("child"), joint.find("parent")
        if child is None or parent is None or child.get("link") is None or parent.get("link") is None:
            raise ConfigError(where, f"joint {joint.get('name')!r} needs <parent link=...> and <child link=...>")
        if child.get("link") in parent_joint:
            raise ConfigError(where, f"link {child.get('link')!r} is the child of two joints; a URDF must be a tree")
        parent_joint[str(child.get("link"))] = joint

    path: list[ET.Element] = []
    link = tool_link
    while link in parent_joint:
        path.append(parent_joint[link])
        link = str(parent_joint[link].find("parent").get("link"))  # type: ignore[union-attr]
        if len(path) > len(parent_joint):
            raise ConfigError(where, "joints form a loop; a URDF must be a tree")
    path.reverse()

    joints = []
    for el in path:
        name = str(el.get("name"))
        jwhere = f"{where} (joint {name!r})"
        kind = el.get("type", "")
        if kind not in SUPPORTED:
            raise ConfigError(jwhere, f"joint type {kind!r} unsupported; expected one of {', '.join(SUPPORTED)}")
        if el.find("mimic") is not None:
            raise ConfigError(jwhere, "mimic joints between the root and the tool link are unsupported")
        origin = el.find("origin")
        xyz = urdf_floats(None if origin is None else origin.get("xyz"), (0.0, 0.0, 0.0), jwhere, "origin xyz")
        rpy = urdf_floats(None if origin is None else origin.get("rpy"), (0.0, 0.0, 0.0), jwhere, "origin rpy")
        axis_el = el.find("axis")
        # the URDF specification's default axis is x
        axis = np.array(urdf_floats(None if axis_el is None else axis_el.get("xyz"), (1.0, 0.0, 0.0), jwhere, "axis xyz"))
        lower, upper, velocity = -math.inf, math.inf, math.inf
        if kind in MOVABLE:
            norm = float(np.linalg.norm(axis))
            if norm < 1e-9:
                raise ConfigError(jwhere, "axis xyz must be a non-zero vector")
            axis = axis / norm
            limit = el.find("limit")
            if limit is None or limit.get("velocity") is None:
                raise ConfigError(jwhere, "no velocity limit; expected <limit velocity=...> (rad/s or m/s)")
            (velocity,) = urdf_floats(limit.get("velocity"), (0.0,), jwhere, "limit velocity")
            if velocity <= 0:
                raise ConfigError(jwhere, f"limit velocity must be > 0, got {velocity}")
            if kind != "continuous":
                (lower,) = urdf_floats(limit.get("lower"), (math.nan,), jwhere, "limit lower")
                (upper,) = urdf_floats(limit.get("upper"), (math.nan,), jwhere, "limit upper")
                if not lower < upper:  # also catches missing bounds (nan)
                    raise ConfigError(jwhere, f"expected <limit lower=... upper=...> with lower < upper, got "
                                              f"lower={limit.get('lower')} upper={limit.get('upper')}")
        else:
            axis = np.zeros(3)
        joints.append(Joint(name, kind, str(el.find("parent").get("link")),  # type: ignore[union-attr]
                            str(el.find("child").get("link")), _transform(xyz, rpy), axis,  # type: ignore[union-attr]
                            lower, upper, velocity))
    if not any(j.kind in MOVABLE for j in joints):
        raise ConfigError(where, f"no movable joint between the root link and tool link {tool_link!r}")
    return joints


class Chain:
    """Tool pose and geometric Jacobian (base = root link frame) of a serial chain, batched over q [..., n]."""

    def __init__(self, joints: list[Joint], tool_link: str):
        self.tool_link = tool_link
        movable = [j for j in joints if j.kind in MOVABLE]
        self.joint_names = [j.name for j in movable]
        self.kinds = [j.kind for j in movable]
        self.q_lower = np.array([j.lower for j in movable])
        self.q_upper = np.array([j.upper for j in movable])
        self.qd_max = np.array([j.velocity for j in movable])
        # Fold fixed joints into the origin of the next movable joint (or into the tool offset), so the
        # per-step work is one 4x4 product per movable joint.
        origins, pending = [], np.eye(4)
        for j in joints:
            pending = pending @ j.origin
            if j.kind in MOVABLE:
                origins.append(pending)
                pending = np.eye(4)
        self._origin = np.stack(origins)  # [n, 4, 4]
        self._tool = pending  # [4, 4] last movable joint frame -> tool link
        self._axis = np.stack([j.axis for j in movable])  # [n, 3]
        self._axis_col = self._axis[:, :, None]  # [n, 3, 1]
        revolute = np.array([k != "prismatic" for k in self.kinds])
        self._has_prismatic = not revolute.all()
        self._rev_mask = revolute[:, None].astype(np.float64)  # [n, 1]
        # The local transform of joint i is affine in (sin q, 1 - cos q, q) by Rodrigues' formula:
        # origin @ motion(q) = O + sin(q) O K + (1 - cos(q)) O K^2 (revolute) or O + q O T (prismatic),
        # K the cross-product matrix of the axis and T the translation along it. Precomputing the three
        # terms turns the per-step work into a few vectorised operations plus one product per joint.
        k = np.zeros((self.dof, 4, 4))
        a = self._axis
        k[:, 0, 1], k[:, 0, 2], k[:, 1, 2] = -a[:, 2], a[:, 1], -a[:, 0]
        k[:, 1, 0], k[:, 2, 0], k[:, 2, 1] = a[:, 2], -a[:, 1], a[:, 0]
        t = np.zeros((self.dof, 4, 4))
        t[:, :3, 3] = a
        rev = revolute[:, None, None]
        self._sin_term = np.where(rev, self._origin @ k, 0.0)  # [n, 4, 4]
        self._cos_term = np.where(rev, self._origin @ k @ k, 0.0)
        self._lin_term = np.where(rev, 0.0, self._origin @ t)

    @classmethod
    def from_urdf(cls, path: str | Path, tool_link: str = "tool") -> Chain:
        path = Path(path)
        try:
            text = path.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise ConfigError(str(path), f"cannot read the URDF file: {exc}") from exc
        return cls(parse_chain(text, tool_link, str(path)), tool_link)

    @classmethod
    def from_string(cls, text: str, tool_link: str = "tool", where: str = "robot.urdf") -> Chain:
        return cls(parse_chain(text, tool_link, where), tool_link)

    @property
    def dof(self) -> int:
        return len(self.joint_names)

    def _frames(self, q) -> tuple[np.ndarray, np.ndarray]:
        """Joint frames after motion [..., n, 4, 4] and the tool frame [..., 4, 4] for q [..., n]."""
        q = np.asarray(q, dtype=np.float64)
        if q.shape[-1:] != (self.dof,):
            raise ValueError(f"q must have shape [..., {self.dof}], got {list(q.shape)}")
        q4 = q[..., None, None]  # [..., n, 1, 1]
        local = self._origin + np.sin(q4) * self._sin_term + (1.0 - np.cos(q4)) * self._cos_term
        if self._has_prismatic:
            local = local + q4 * self._lin_term
        if q.ndim == 1:  # the control loop's case: np.dot on 2-D arrays has less overhead than matmul
            acc = local[0]
            frames = [acc]
            for i in range(1, self.dof):
                acc = np.dot(acc, local[i])
                frames.append(acc)
            return np.stack(frames), np.dot(acc, self._tool)
        acc = local[..., 0, :, :]
        frames = [acc]
        for i in range(1, self.dof):
            acc = acc @ local[..., i, :, :]
            frames.append(acc)
        return np.stack(frames, axis=-3), acc @ self._tool

    def fk(self, q) -> tuple[np.ndarray, np.ndarray]:
        """Tool position [..., 3] (m) and rotation [..., 3, 3] in the base frame."""
        _, tool = self._frames(q)
        return tool[..., :3, 3], tool[..., :3, :3]

    def fk_jacobian(self, q) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Tool position [..., 3], rotation [..., 3, 3] and geometric Jacobian [..., 6, n] (rows 0-2 linear,
        3-5 angular velocity, both in the base frame, linear at the tool point)."""
        frames, tool = self._frames(q)
        # Rotating about (or sliding along) a joint's axis leaves the axis unchanged, so the frame after
        # the motion gives the same world axis and joint origin as the frame before it.
        z = (frames[..., :3, :3] @ self._axis_col)[..., 0]  # [..., n, 3] joint axes in the base frame
        p_tool = tool[..., :3, 3]
        lever = p_tool[..., None, :] - frames[..., :3, 3]  # [..., n, 3]
        lin = z[..., _YZX] * lever[..., _ZXY] - z[..., _ZXY] * lever[..., _YZX]  # z x lever
        if self._has_prismatic:
            lin = self._rev_mask * lin + (1.0 - self._rev_mask) * z
            ang = self._rev_mask * z
        else:
            ang = z
        jac = np.concatenate([lin, ang], axis=-1)  # [..., n, 6]
        return p_tool, tool[..., :3, :3], np.swapaxes(jac, -1, -2)

    def jacobian(self, q) -> np.ndarray:
        return self.fk_jacobian(q)[2]
