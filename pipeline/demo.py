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
    """Train each decoder family of `demo.variants` on the same demonstrations, then vet them with the
    baselines in closed loop."""
    user = [o for o in HydraConfig.get().overrides.task if not o.startswith("hydra.")]
    runs = []
    for label, variant in cfg.demo.variants.items():
        log.info("training %s", label)
        sub = compose(config_name="demo", overrides=[*user, *variant, f"label='{label}'"])
        runs.append(train(sub))
    result = {"runs": runs}
    steps = [f"MLflow: {mlflow_hint()}"]
    if cfg.demo.vet.enabled:
        from coreach.vetting.stage import vet

        candidates = [r["run_id"] for r in runs] + list(cfg.demo.vet.baselines)
        vet_cfg = compose(
            config_name="vet",
            overrides=[f"candidates=[{','.join(candidates)}]", f"suite={cfg.demo.vet.suite}",
                       f"episodes={cfg.demo.vet.episodes}"],  # fmt: skip
        )
        result["vetting"] = vet(vet_cfg)
        steps.append(f"vetting report (open in a browser): {result['vetting']['report']}")
        steps.append(
            "vet at full size: .venv/bin/coreach vet 'candidates=[<run id>,direct,blend]' suite=held-out"
        )
        if cfg.demo.release.enabled:
            from coreach.release.stage import release_best

            result["release"] = release_best(result, cfg)  # its summary says whether anything was released
    result["next_steps"] = steps
    return result
