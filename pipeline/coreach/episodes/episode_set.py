"""Demonstration episodes in joint space (numpy), the set they come in, and its fingerprint."""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from typing import Iterator

import numpy as np

SCHEMA_VERSION = "1"
REQUIRED_COLUMNS = ("episode", "step", "goal", "q", "qd", "goal_pos", "goal_quat", "goal_fine")
OPTIONAL_COLUMNS = ("ee_pos", "ee_quat")
FLOAT_FIELDS = ("q", "qd", "ee_pos", "ee_quat", "goal_pos", "goal_quat", "goal_fine")


@dataclass
class Episode:
    """One demonstration of length T on an n-joint arm in a layout of G goals (float64 numpy)."""

    episode_id: int
    goal: int  # index into EpisodeSet.goal_names
    q: np.ndarray  # [T, n] joint positions before each step
    qd: np.ndarray  # [T, n] commanded joint velocities
    ee_pos: np.ndarray  # [T, 3]
    ee_quat: np.ndarray  # [T, 4] (w, x, y, z)
    goal_pos: np.ndarray  # [G, 3]
    goal_quat: np.ndarray  # [G, 4]
    goal_fine: np.ndarray  # [G, 3]

    def __len__(self) -> int:
        return self.q.shape[0]

    @property
    def goal_targets(self) -> np.ndarray:
        """Waypoints [G, 2, 3]: approach point and end of the fine motion of every goal."""
        return np.stack([self.goal_pos, self.goal_pos + self.goal_fine], axis=1)


@dataclass
class EpisodeSet:
    """Episodes sharing one robot, goal list and time step."""

    episodes: list[Episode]
    goal_names: list[str]
    joint_names: list[str]
    dt: float
    source: str = ""  # where the episodes came from; not part of the fingerprint
    arrival: dict | None = None  # per-goal arrival of the demonstrator that made them (coreach.arrival)

    def __len__(self) -> int:
        return len(self.episodes)

    def __iter__(self) -> Iterator[Episode]:
        return iter(self.episodes)

    def __getitem__(self, i: int) -> Episode:
        return self.episodes[i]

    @property
    def total_steps(self) -> int:
        return sum(len(e) for e in self.episodes)

    @property
    def goals(self) -> np.ndarray:
        """Goal index of every episode [N]."""
        return np.array([e.goal for e in self.episodes], dtype=np.int64)

    def fingerprint(self) -> str:
        """SHA-256 (hex) of a canonical serialisation: names, dt and every episode's ids and float64 arrays
        in little-endian order. Equal sets give equal fingerprints, also after a Parquet round trip.
        Not cached: the arrays are mutable."""
        h = hashlib.sha256()
        head = {"goal_names": list(self.goal_names), "joint_names": list(self.joint_names), "dt": repr(float(self.dt))}
        h.update(json.dumps(head, sort_keys=True).encode())
        for e in self.episodes:
            h.update(np.array([e.episode_id, e.goal, len(e)], dtype="<i8").tobytes())
            for name in FLOAT_FIELDS:
                a = np.ascontiguousarray(getattr(e, name), dtype="<f8")
                h.update(np.array(a.shape, dtype="<i8").tobytes())
                h.update(a.tobytes())
        return h.hexdigest()
