"""`coreach study analyze`: a study's trials -> CSV tables, an HTML report and (optionally) MLflow aggregates."""

from __future__ import annotations

import json
import math
from pathlib import Path

from coreach.study.analysis import aggregates, align_to_plan, analyse, models_table, pairwise_table, tests_table
from coreach.study.files import private_folder, write_private
from coreach.study.plan import PLAN_FILE, SESSIONS, latest_folder, read_plan
from coreach.study.report import render
from coreach.study.trials import read_trials
from coreach.study.upload import log_aggregates


def _nan_free(value):
    return None if isinstance(value, float) and math.isnan(value) else value


def run_analysis(root: Path, name: str, version: int | None = None, trials: list[Path] | None = None,
                 out: Path | None = None, reference: str | None = None, resamples: int = 2000,
                 uri: str | None = None, warn=print) -> dict:  # fmt: skip
    """Analyse version `version` (default the latest) of study `name` under `root`; returns the summary."""
    folder = latest_folder(root, name, version)
    document = read_plan(folder / PLAN_FILE)
    plan, number, digest = document["plan"], document["version"], document["sha256"]
    left_out: list[str] = []

    def note(message: str) -> None:  # every row or file left out is named, on stderr and in the report
        left_out.append(message)
        warn(message)

    paths = trials or sorted((folder / SESSIONS).glob("*/trials.csv"))
    read = read_trials(list(paths), note)
    frame = align_to_plan(read, plan, note)
    result = analyse(frame, plan, reference, resamples)
    out = private_folder(out or folder / "analysis")
    tables = {"by_condition.csv": result["by_condition"], "by_condition_task.csv": result["by_condition_task"],
              "friedman.csv": tests_table(result), "pairwise.csv": pairwise_table(result),
              "models.csv": models_table(result)}  # fmt: skip
    for file, table in tables.items():
        write_private(out / file, table.to_csv(index=False))
    plan_for_report = {**plan, "_sha256": digest}
    report = write_private(out / "report.html", render(result, plan_for_report, number, left_out))
    summary = {
        "study": plan["name"], "version": number, "plan_sha256": digest, "pilot": plan["pilot"],
        "rows": int(len(result["frame"])), "participants": int(result["frame"]["participant"].nunique()),
        "left_out": len(left_out), "practice_rows": int(read.attrs.get("practice", 0)),
        "incomplete_trials": int(read.attrs.get("incomplete", 0)), "reference": result["reference"],
        "friedman": {k: {kk: _nan_free(vv) for kk, vv in o["friedman"].items()} for k, o in result["outcomes"].items()},
        "time_effects": result["time_model"]["effects"], "success_effects": result["success_model"]["effects"],
        "report": str(report), "tables": [str(out / f) for f in tables],
    }
    if plan["config"].get("upload_to_tracking"):
        summary["mlflow_run"] = log_aggregates(aggregates(result), plan, number, digest, uri)
    write_private(out / "summary.json", json.dumps(summary, indent=2, default=str) + "\n")
    return summary
