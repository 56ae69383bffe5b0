"""Where a stage writes: Hydra's output folder when run through the CLI, a fresh local folder otherwise."""

from __future__ import annotations

import time
from pathlib import Path

from hydra.core.hydra_config import HydraConfig
from hydra.types import RunMode


def output_dir() -> Path:
    try:
        return Path(HydraConfig.get().runtime.output_dir)
    except (ValueError, ImportError):  # not inside a Hydra run (tests, notebooks)
        path = Path(".coreach") / "runs" / time.strftime("%Y%m%d-%H%M%S") / str(time.perf_counter_ns())
        path.mkdir(parents=True, exist_ok=True)
        return path


def sweep_tag() -> str | None:
    """The sweep folder name in a Hydra multirun, so a sweep's runs can be grouped in MLflow."""
    try:
        hc = HydraConfig.get()
    except (ValueError, ImportError):
        return None
    if hc.mode != RunMode.MULTIRUN:
        return None
    return Path(hc.sweep.dir).name
