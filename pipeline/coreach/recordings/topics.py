"""Which bag topics hold what, and the per-bag sidecar file that can label a bag's goal instead of a topic."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import yaml

from coreach.errors import DataError

JOINT_STATE = "sensor_msgs/msg/JointState"
JOY = "sensor_msgs/msg/Joy"
STRING = "std_msgs/msg/String"
MULTI_ARRAY = "std_msgs/msg/Float64MultiArray"
CLOCKS = ("header", "bag")


@dataclass
class TopicMap:
    """Topic names (None leaves a stream out) and which clock stamps the samples."""

    joint_states: str = "/joint_states"  # sensor_msgs/msg/JointState: positions by joint name
    stick: str | None = "/joy"  # sensor_msgs/msg/Joy: kept as the extra `stick` column
    goal: str | None = "/goal"  # std_msgs/msg/String: goal name; a sidecar file wins when present
    command: str | None = None  # JointState (velocity field) or Float64MultiArray (robot joint order)
    clock: str = "header"  # header: message header stamps; bag: when the recorder received each message
    sidecar_suffix: str = ".goal.yaml"  # <bag folder><suffix> next to the bag: `goal: <name>`


def sidecar_goal(bag: Path, suffix: str) -> tuple[str, str] | None:
    """(goal name, file) from `<bag><suffix>` beside the bag folder, or None when there is no such file."""
    path = bag.parent / f"{bag.name}{suffix}"
    if not path.is_file():
        return None
    try:
        data = yaml.safe_load(path.read_text(encoding="utf-8"))
    except yaml.YAMLError as e:
        raise DataError(str(path), f"not valid YAML ({str(e).splitlines()[0]})") from None
    goal = data.get("goal") if isinstance(data, dict) else None
    if not isinstance(goal, str) or not goal:
        raise DataError(str(path), f"expected `goal: <goal name>`, got {data!r}")
    return goal, str(path)
