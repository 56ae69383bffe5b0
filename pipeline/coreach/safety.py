"""The safety filter's settings from a config: one factory, so every stage builds the same filter."""

from coreach.control.safety_filter import (DEFAULT_TCP_SPEED_MAX, JOINT_LIMIT, SEPARATION, SPEED_CAP, WORKSPACE,
                                          SafetyLimits)
from coreach.errors import ConfigError

__all__ = ["DEFAULT_TCP_SPEED_MAX", "JOINT_LIMIT", "SEPARATION", "SPEED_CAP", "WORKSPACE", "SafetyLimits", "limits_from_config",
           "workspace_box"]


def workspace_box(node) -> tuple[list[float], list[float]]:
    """(min, max) corners of the safety config's workspace box; ConfigError unless min < max on every axis."""
    lo, hi = [float(v) for v in node.workspace_min], [float(v) for v in node.workspace_max]
    if len(lo) != 3 or len(hi) != 3 or not all(a < b for a, b in zip(lo, hi)):
        raise ConfigError("option safety.workspace_min/max",
                          f"expected two corners [x, y, z] with min < max, got {lo} and {hi}")  # fmt: skip
    return lo, hi


def limits_from_config(robot, node) -> SafetyLimits:
    """The whole filter for `robot` from a `safety` config node: speed caps, joint limits, workspace box,
    look-ahead, stick deadband and watchdog (the settings a release writes into its manifest)."""
    lo, hi = workspace_box(node)
    return SafetyLimits.for_robot(
        robot, float(node.tcp_speed_max), float(node.speed_fraction), workspace_min=tuple(lo),
        workspace_max=tuple(hi), lookahead_s=float(node.lookahead_s), deadband=float(node.deadband),
        watchdog_timeout_s=float(node.watchdog_timeout_s),
    )  # fmt: skip
