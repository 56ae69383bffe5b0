"""`coreach demo`: the whole job on the embedded defaults, end to end, in a few minutes on 2 cores."""

from __future__ import annotations

import logging

from hydra import compose
from hydra.core.hydra_config import HydraConfig
from omegaconf import DictConfig

from coreach.commands.summaries import mlflow_hint
from coreach.training.run import train

log = logging.getLogger("coreach.demo")


def run_demo(cfg: DictConfig) -> dict:
    """Train each decoder family of `demo.variants` on the same demonstrations and compare them."""
    user = [o for o in HydraConfig.get().overrides.task if not o.startswith("hydra.")]
    runs = []
    for label, variant in cfg.demo.variants.items():
        log.info("training %s", label)
        sub = compose(config_name="demo", overrides=[*user, *variant, f"label='{label}'"])
        runs.append(train(sub))
    steps = [f"MLflow: {mlflow_hint()}"]
    return {"runs": runs, "next_steps": steps}
