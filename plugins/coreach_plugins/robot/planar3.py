"""Robot plugin: a planar 3-link arm with closed-form kinematics, small and fast for tests."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Sequence

import torch
from torch import Tensor

from coreach.host.api import ConfigError

Q_LIMIT = 2.8  # rad, symmetric; keeps links from folding onto each other
QD_MAX = 1.5  # rad/s
PLANAR3_HOME = (0.4, 1.2, -0.6)  # bent elbow, tool in front; sin(q2) != 0 so not singular


@dataclass
class Planar3Config:
    """Options of the `planar3` robot (conf/robot/planar3.yaml)."""

    links: list[float] = field(default_factory=lambda: [0.35, 0.30, 0.15])
    home: list[float] | None = None
    name: str = "planar3"
    _target_: str = "coreach_plugins.robot.planar3.Planar3"


def _numbers(values: Sequence[float], where: str, what: str) -> list[float]:
    try:
        out = [float(v) for v in values]
    except (TypeError, ValueError) as exc:
        raise ConfigError(where, f"expected 3 numbers ({what}), got {values!r}") from exc
    if len(out) != 3 or not all(math.isfinite(v) for v in out):
        raise ConfigError(where, f"expected 3 finite numbers ({what}), got {values!r}")
    return out


class Planar3:
    """Three revolute joints about z in the x-y plane; the tool stays at z = 0."""

    def __init__(self, links: Sequence[float] = (0.35, 0.30, 0.15), home: list[float] | None = None,
                 name: str = "planar3"):
        if not isinstance(name, str) or not name:
            raise ConfigError("robot.name", f"expected a non-empty string, got {name!r}")
        lengths = _numbers(links, "robot.links", "link lengths in m")
        if min(lengths) < 0 or sum(lengths) <= 0:
            raise ConfigError("robot.links", f"link lengths must be >= 0 with a positive sum, got {lengths}")
        q0 = _numbers(PLANAR3_HOME if home is None else home, "robot.home", "joint angles in rad")
        if any(abs(v) > Q_LIMIT for v in q0):
            raise ConfigError("robot.home", f"values must lie within +-{Q_LIMIT} rad, got {q0}")
        self.name = name
        self.links = lengths
        self.home = None if home is None else q0
        self.joint_names: list[str] = ["joint_1", "joint_2", "joint_3"]
        self._lengths = torch.tensor(lengths, dtype=torch.float64)
        self._home = torch.tensor(q0, dtype=torch.float64)

    @property
    def dof(self) -> int:
        return 3

    # Limits have no q to follow, so they come in torch's default dtype (float32 unless changed).
    @property
    def q_lower(self) -> Tensor:
        return torch.full((3,), -Q_LIMIT)

    @property
    def q_upper(self) -> Tensor:
        return torch.full((3,), Q_LIMIT)

    @property
    def qd_max(self) -> Tensor:
        return torch.full((3,), QD_MAX)

    @property
    def q_home(self) -> Tensor:
        return self._home.to(torch.get_default_dtype())

    def _check(self, q: Tensor) -> Tensor:
        if not torch.is_tensor(q) or q.dtype not in (torch.float32, torch.float64):
            raise TypeError(f"{self.name}: q must be a float32 or float64 tensor, got {type(q).__name__} "
                            f"{getattr(q, 'dtype', '')}")
        if q.ndim != 2 or q.shape[1] != 3:
            raise ValueError(f"{self.name}: q must have shape [B, 3], got {list(q.shape)}")
        return self._lengths.to(dtype=q.dtype, device=q.device)

    def fk(self, q: Tensor) -> tuple[Tensor, Tensor]:
        lengths = self._check(q)
        phi = torch.cumsum(q, dim=1)  # [B, 3] absolute angle of each link
        x = (lengths * torch.cos(phi)).sum(dim=1)
        y = (lengths * torch.sin(phi)).sum(dim=1)
        pos = torch.stack([x, y, torch.zeros_like(x)], dim=1)
        c, s = torch.cos(phi[:, 2]), torch.sin(phi[:, 2])
        zero, one = torch.zeros_like(c), torch.ones_like(c)
        rot = torch.stack([c, -s, zero, s, c, zero, zero, zero, one], dim=1).reshape(-1, 3, 3)
        return pos, rot

    def jacobian(self, q: Tensor) -> Tensor:
        lengths = self._check(q)
        phi = torch.cumsum(q, dim=1)
        # joint i moves every link k >= i: d(pos)/dq_i = sum_{k>=i} l_k (-sin phi_k, cos phi_k)
        lx = lengths * torch.cos(phi)
        ly = lengths * torch.sin(phi)
        tail_x = torch.flip(torch.cumsum(torch.flip(lx, [1]), dim=1), [1])  # [B, 3] suffix sums
        tail_y = torch.flip(torch.cumsum(torch.flip(ly, [1]), dim=1), [1])
        zeros, ones = torch.zeros_like(tail_x), torch.ones_like(tail_x)
        return torch.stack([-tail_y, tail_x, zeros, zeros, zeros, ones], dim=1)  # [B, 6, 3]

    def __repr__(self) -> str:
        return f"Planar3(name={self.name!r}, links={self.links})"

    def urdf_text(self) -> None:
        """None: this planar test arm has no URDF, so it cannot be released to a robot."""
        return None
