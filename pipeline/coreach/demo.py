"""`coreach demo`: the whole job on the embedded defaults, end to end, in a few minutes on 2 cores."""

from __future__ import annotations

import logging

from omegaconf import DictConfig

from coreach.commands.recipes import compose_stage, stage_command
from coreach.commands.summaries import mlflow_hint
from coreach.config.command_line import override_key, user_overrides
from coreach.release.demo_helpers import release_best
from coreach.vetting.stage import vet

log = logging.getLogger("coreach.demo")


def run_demo(cfg: DictConfig) -> dict:
    """Train each variant of `demo.variants` (a stage, train or aggregate, and its overrides) on the same
    demonstrations, vet them with the baselines in closed loop, then release the best one that passes the
    real gate, field it, step it in a runtime session and replay it against its vetting."""
    user = [o for o in user_overrides() if not override_key(o).startswith("demo.")]  # the demo's own options
    extra = [str(o) for o in cfg.demo.get("overrides", [])]
    runs = []
    for label, variant in cfg.demo.variants.items():
        config_name, fn = stage_command(str(variant.command), f"option demo.variants.{label}.command")
        sub = compose_stage(config_name, [*extra, *user, *map(str, variant.overrides), f"label='{label}'"],
                       f"demo variant {label}")  # fmt: skip
        log.info("%s %s", variant.command, label)
        summary = fn(sub)
        runs.append({**summary, "label": label, "command": str(variant.command)})
    result = {"runs": runs}
    steps = [f"MLflow: {mlflow_hint()}"]
    if cfg.demo.vet.enabled:
        candidates = [r["run_id"] for r in runs] + list(cfg.demo.vet.baselines)
        vet_cfg = compose_stage("vet", [f"candidates=[{','.join(candidates)}]", f"suite={cfg.demo.vet.suite}",
                                   f"suite.episodes={cfg.demo.vet.episodes}"], "option demo.vet")  # fmt: skip
        result["vetting"] = vet(vet_cfg)
        steps.append(f"vetting report (open in a browser): {result['vetting']['report']}")
        steps.append(
            "vet at full size: .venv/bin/coreach vet 'candidates=[<run id>,direct,blend]' suite=held-out"
        )
        if cfg.demo.release.enabled:
            result["release"] = release_best(result, cfg)  # its summary says whether anything was released
    result["next_steps"] = steps
    return result
