"""Shared safety limits: kept as an import path; the one filter lives in coreach.control.safety_filter."""

from coreach.control.safety_filter import DEFAULT_TCP_SPEED_MAX, JOINT_LIMIT, SPEED_CAP, WORKSPACE, SafetyLimits

__all__ = ["DEFAULT_TCP_SPEED_MAX", "JOINT_LIMIT", "SPEED_CAP", "WORKSPACE", "SafetyLimits"]
