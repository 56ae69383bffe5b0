"""What a reader hands on: raw timestamped streams of one recording, joints already in the robot's order."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass
class Stream:
    """Samples of one topic (or CSV column group) as recorded: not yet sorted, deduplicated or checked."""

    topic: str  # where it came from, for messages: a topic name or "columns q_*"
    t: np.ndarray  # [K] seconds
    values: np.ndarray  # [K, w]


@dataclass
class Recording:
    """One bag or CSV file. `goals` are label changes (time, goal name); a sidecar label has time -inf."""

    source: str
    joints: Stream  # positions (rad) in the robot's joint order
    velocities: Stream | None = None  # recorded joint velocities (rad/s): checked against the limits only
    command: Stream | None = None  # commanded joint velocities (rad/s): the action when present
    stick: Stream | None = None  # operator's stick axes
    goals: list[tuple[float, str]] = field(default_factory=list)
    goal_origin: str = ""  # topic or sidecar file the labels came from, for messages
