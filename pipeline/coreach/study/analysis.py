"""The whole analysis of a study's trials: summaries, paired tests, models, as tables and a result dict."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from coreach.errors import ConfigError, DataError
from coreach.study import models, paired, summaries
from coreach.study.tlx import tlx_column

# What each paired outcome is and which way is better, for the report's words (the numbers do not depend on it)
OUTCOMES = {
    "time_s": "completion time of successful trials (s, lower is better)",
    "success": "success rate (higher is better)",
    "tlx": "raw NASA-TLX workload (0-100, lower is better)",
    "preference": "preference rank (1 = most preferred)",
}


def align_to_plan(frame: pd.DataFrame, plan: dict, warn) -> pd.DataFrame:
    """Rows whose condition is a condition's name or its letter (letters become names) and whose participant
    is a code of the plan; any other row is named in a warning and left out."""
    letters = plan["letters"]
    names = set(letters.values())
    codes = {p["code"] for p in plan["participants"]}
    tasks = {t["name"] for t in plan["tasks"]}
    frame = frame.copy()
    frame["condition"] = frame["condition"].map(lambda c: letters.get(c, c))
    keep = []
    for idx, row in frame.iterrows():
        if row["condition"] not in names:
            warn(f"{row['_where']}: left out, condition {row['condition']!r} is not in the plan "
                 f"({', '.join(sorted(names))} or {', '.join(sorted(letters))})")  # fmt: skip
        elif row["participant"] not in codes:
            warn(f"{row['_where']}: left out, participant {row['participant']!r} is not a code of the plan")
        elif row["task"] not in tasks:
            warn(f"{row['_where']}: left out, task {row['task']!r} is not a task of the plan")
        else:
            keep.append(idx)
    out = frame.loc[keep].reset_index(drop=True)
    if out.empty:
        raise DataError("trials", "no row matches the plan's conditions, participants and tasks")
    return out


def default_reference(conditions: list[str]) -> str:
    """The models' baseline when none is asked for: `direct` when the study has it, else the first condition."""
    return "direct" if "direct" in conditions else conditions[0]


def analyse(frame: pd.DataFrame, plan: dict, reference: str | None = None, resamples: int = 2000) -> dict:
    """Everything the report shows, from rows already aligned to the plan. The bootstrap draws from a
    Generator seeded with the plan's seed, so the same trials give the same intervals."""
    conditions = [c["name"] for c in plan["conditions"]]
    reference = reference or default_reference(conditions)
    if reference not in conditions:
        raise ConfigError("--reference", f"{reference!r} is not a condition of the plan; expected one of "
                                         f"{', '.join(conditions)}")  # fmt: skip
    frame = frame.copy()
    frame["tlx"] = tlx_column(frame)
    rng = np.random.default_rng(plan["config"]["seed"])
    outcomes = {}
    for outcome in OUTCOMES:
        column = frame[frame["success"] == 1] if outcome == "time_s" else frame
        if outcome not in column.columns or column[outcome].notna().sum() == 0:
            continue
        wide = paired.per_participant(column, outcome, conditions)
        everyone = set(frame["participant"])
        outcomes[outcome] = {
            "about": OUTCOMES[outcome],
            "wide": wide,
            "incomplete": sorted(everyone - set(wide.index)),  # left out of the paired tests: a missing cell
            "friedman": paired.friedman(wide),
            "pairwise": paired.pairwise(wide, rng, resamples) if len(wide) >= 1 else pd.DataFrame(),
        }
    return {
        "reference": reference,
        "conditions": conditions,
        "frame": frame,
        "by_condition": summaries.by_condition(frame),
        "by_condition_task": summaries.by_condition_and_task(frame),
        "outcomes": outcomes,
        "time_model": models.time_model(frame, conditions, reference),
        "success_model": models.success_model(frame, conditions, reference),
    }


def tests_table(result: dict) -> pd.DataFrame:
    """One row per outcome: the Friedman test (participants with every condition)."""
    return pd.DataFrame([{"outcome": name, **{k: v for k, v in o["friedman"].items()},
                          "left_out": len(o["incomplete"])} for name, o in result["outcomes"].items()])  # fmt: skip


def pairwise_table(result: dict) -> pd.DataFrame:
    frames = [o["pairwise"].assign(outcome=name) for name, o in result["outcomes"].items() if len(o["pairwise"])]
    if not frames:
        return pd.DataFrame()
    out = pd.concat(frames, ignore_index=True)
    return out[["outcome", *[c for c in out.columns if c != "outcome"]]]


def models_table(result: dict) -> pd.DataFrame:
    return pd.concat([models.effects_frame(result["time_model"], "mixedlm time_s"),
                      models.effects_frame(result["success_model"], "gee success")], ignore_index=True)  # fmt: skip


def aggregates(result: dict) -> dict[str, float]:
    """Numbers safe to log outside the study folder: per-condition summaries and test results, no row of
    any participant."""
    out: dict[str, float] = {}
    for _, row in result["by_condition"].iterrows():
        for key in row.index:  # every column of the per-condition summary is an aggregate over participants
            if key != "condition" and isinstance(row[key], (int, float, np.integer, np.floating)) and math.isfinite(row[key]):
                out[f"{row['condition']}/{key}"] = float(row[key])
    for name, o in result["outcomes"].items():
        for key in ("statistic", "p"):
            if math.isfinite(o["friedman"][key]):
                out[f"friedman/{name}/{key}"] = o["friedman"][key]
    for model in ("time_model", "success_model"):
        for e in result[model]["effects"]:
            for key in ("effect", "lo", "hi"):
                out[f"{model}/{e['condition']}/{key}"] = e[key]
    return {k.replace("@", "_at_"): v for k, v in out.items()}  # MLflow metric names allow no '@'
