"""What the user typed: the running Hydra command's overrides, for stages that must repeat or respect them."""

from __future__ import annotations


def command_line_options() -> dict[str, str]:
    """The running Hydra command's overrides by top-level option (`robot.urdf=x` -> {"robot.urdf=x": "robot"});
    empty when not run as a Hydra app (e.g. a stage called inside `coreach recipes`)."""
    from hydra.core.hydra_config import HydraConfig

    try:
        task = list(HydraConfig.get().overrides.task)
    except ValueError:  # HydraConfig not set
        return {}
    return {o: o.lstrip("+~").split("=", 1)[0].split(".", 1)[0] for o in task}
