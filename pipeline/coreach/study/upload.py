"""Logging a study analysis's aggregates to MLflow (never a participant's row), when the plan asks for it."""

from __future__ import annotations

import time

from mlflow.entities import Metric, RunTag
from omegaconf import OmegaConf

from coreach import tracking


def log_aggregates(metrics: dict[str, float], plan: dict, version: int, digest: str, uri: str | None) -> str:
    """One MLflow run in the experiment coreach-study holding `metrics` (coreach.study.analysis.aggregates) and
    tags naming the study, its plan version and hash; returns the run id."""
    c, experiment = tracking.client(OmegaConf.create({"uri": uri, "experiment": "coreach-study"}))
    run = c.create_run(experiment, run_name=f"{plan['name']}-v{version}-analysis",
                       tags={"coreach.study": plan["name"], "coreach.study.version": str(version),
                             "coreach.study.plan_sha256": digest, "coreach.study.pilot": str(plan["pilot"])})  # fmt: skip
    now = int(time.time() * 1000)
    items = [Metric(k, float(v), now, 0) for k, v in sorted(metrics.items())]
    for i in range(0, len(items), 900):  # MLflow takes at most 1000 metrics per batch
        c.log_batch(run.info.run_id, metrics=items[i : i + 900], tags=[RunTag("coreach.kind", "study-analysis")])
    c.set_terminated(run.info.run_id)
    return run.info.run_id
