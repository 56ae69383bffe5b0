"""What the user typed: the running Hydra command's overrides, for stages that must repeat or respect them."""

from __future__ import annotations

from hydra.core.hydra_config import HydraConfig


def override_key(override: str) -> str:
    """The dotted key an override sets: `+robot.urdf=x`, `~robot.urdf` and `robot.urdf=x` -> `robot.urdf`."""
    return override.lstrip("+~").split("=", 1)[0]


def user_overrides() -> list[str]:
    """The overrides the running Hydra command was started with, as the user typed them (Hydra's own
    `hydra.*` left out); empty when not run as a Hydra app (e.g. a stage called inside `coreach recipes`)."""
    try:
        task = list(HydraConfig.get().overrides.task)
    except ValueError:  # HydraConfig not set
        return []
    return [o for o in task if override_key(o).split(".", 1)[0] != "hydra"]


def command_line_options() -> dict[str, str]:
    """The running Hydra command's overrides by top-level option (`robot.urdf=x` -> {"robot.urdf=x": "robot"})."""
    return {o: override_key(o).split(".", 1)[0] for o in user_overrides()}
