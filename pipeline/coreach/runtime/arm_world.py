"""The arm among the scene's bodies: joint positions -> link spheres -> distances and their joint gradients.

Shared by the demonstrator, vetting and the robot's Session: the spheres ride on the numpy kinematics chain
(coreach.runtime.kinematics), the distances and the rule are coreach.control.separation's.
"""

from __future__ import annotations

import copy

import numpy as np

from coreach.control.arrays import namespace
from coreach.control.bodies import Primitive
from coreach.control.separation import Geometry, SeparationSettings, World, measure
from coreach.runtime.kinematics import Chain

__all__ = ["ArmWorld", "contact_report"]


class ArmWorld:
    """A Chain with spheres on its links (links [S], centres [S, 3] in the link frames) and the World."""

    def __init__(self, chain: Chain, links: list[str], centres, world: World):
        self.chain = chain
        self.links = list(links)
        self.centres = np.asarray(centres, dtype=np.float64).reshape(-1, 3)
        self.attached = chain.attach(self.links, self.centres)
        self.world = world

    @classmethod
    def build(cls, chain: Chain, links: list[str], centres, radii, self_pairs, furniture: list[Primitive],
              person: list[Primitive], settings: SeparationSettings) -> ArmWorld:  # fmt: skip
        return cls(chain, links, centres, World(list(furniture), list(person), radii, settings, self_pairs))

    def shifted(self, offsets: dict) -> ArmWorld:
        """The same arm with named bodies translated per episode ({body name: [E, 3]} m; World.shifted)."""
        out = copy.copy(self)
        out.world = self.world.shifted(offsets)
        return out

    def clear(self, geo: Geometry) -> np.ndarray:
        """[...] bool: every sphere at or beyond its protective distance (the clearance from furniture and
        between links, the keep-out distance from the person) in a numpy Geometry."""
        s = self.world.settings
        limit = self.world.protective()
        ok = (np.asarray(geo.body_d) >= limit).all(axis=(-2, -1))
        return ok & (np.asarray(geo.self_d) >= s.clearance).all(axis=-1)

    def spheres(self, q, frames=None, jacobian: bool = True):
        """Sphere centres [..., S, 3] and their linear Jacobians [..., S, 3, n] (None without `jacobian`) at
        q [..., n] (numpy)."""
        return self.chain.points(np.asarray(q, dtype=np.float64), self.attached, frames, jacobian)

    @property
    def gripper_radius(self) -> float:
        """The largest sphere radius on the tool-side link (spheres are listed root to tool: the last link's
        are the gripper's)."""
        return float(max(r for r, link in zip(self.world.radii, self.links) if link == self.links[-1]))

    def separation(self, q, frames=None):
        """(World, centres [..., S, 3], Jacobians [..., S, 3, n]) at q [..., n], in q's namespace: what the
        safety filter's `separation` argument takes (numpy `frames` of the chain at q may be passed)."""
        if type(q) is np.ndarray:
            return (self.world, *self.spheres(q, frames))
        xp = namespace(q)
        centres, jac = self.spheres(q.detach().cpu().numpy())
        return self.world, xp.asarray(centres, dtype=q.dtype), xp.asarray(jac, dtype=q.dtype)

    def geometry(self, q, frames=None, grad: bool = True) -> Geometry:
        """Distances (and gradients, with `grad`) at q: numpy for a numpy q, torch (float64 kinematics) for a
        torch q."""
        if type(q) is np.ndarray or isinstance(q, (list, tuple)):
            centres, jac = self.spheres(q, frames, jacobian=grad)
            return measure(self.world, centres, jac)
        xp = namespace(q)
        centres, jac = self.spheres(np.asarray(q.detach().cpu().numpy(), dtype=np.float64))
        return measure(self.world, xp.asarray(centres, dtype=q.dtype), xp.asarray(jac, dtype=q.dtype))


def contact_report(world: World, geo: Geometry) -> tuple[np.ndarray, np.ndarray]:
    """Per state (numpy Geometry of [..., ] states): (touching [...] bool: a sphere inside furniture or two
    non-adjacent spheres overlapping, or a sphere inside the person's keep-out zone; the body involved [...],
    an index into world.body_names, or -1 for a self contact)."""
    body_d = np.asarray(geo.body_d)  # [..., S, O]
    limit = world.protective(furniture=0.0)  # [O]
    worst_body = (body_d - limit).min(axis=-2)  # [..., O]
    worst = worst_body.min(axis=-1)
    body = worst_body.argmin(axis=-1)
    self_d = np.asarray(geo.self_d)
    self_min = self_d.min(axis=-1) if self_d.shape[-1] else np.full(worst.shape, np.inf)
    touching = (worst < 0) | (self_min < 0)
    return touching, np.where(worst < 0, body, -1)
