"""Descriptive tables of a study's trials: per condition, and per condition and task."""

from __future__ import annotations

import pandas as pd

from coreach.study.trials import FIGURES


def _summary(frame: pd.DataFrame, by: list[str]) -> pd.DataFrame:
    """Trials, participants, success rate, completion time of successful trials (mean, sd, median), the mean of
    each per-trial figure a session recorded (path, idle time, stick reversals, mode switches, filter
    activations, closest approach to furniture and person) and, where rated, raw TLX, liking and preference
    rank."""
    groups = frame.groupby(by, sort=False)
    ok = frame[frame["success"] == 1].groupby(by, sort=False)["time_s"]
    out = pd.DataFrame({
        "trials": groups.size(),
        "participants": groups["participant"].nunique(),
        "success_rate": groups["success"].mean(),
        "time_s_mean": ok.mean(),
        "time_s_sd": ok.std(),
        "time_s_median": ok.median(),
    })
    for column in FIGURES:  # a session's per-trial figures, when the table has them
        if column in frame.columns and frame[column].notna().any():
            # closest approach: the lowest over the trials is the safety figure; the rest are means
            lowest = column.startswith("min_")
            out[f"{column}_{'lowest' if lowest else 'mean'}"] = groups[column].min() if lowest else groups[column].mean()
    for column in ("tlx", "liking", "preference"):
        if column in frame.columns and frame[column].notna().any():
            out[f"{column}_mean"] = groups[column].mean()
            out[f"{column}_sd"] = groups[column].std()
    return out.reset_index()


def by_condition(frame: pd.DataFrame) -> pd.DataFrame:
    return _summary(frame, ["condition"])


def by_condition_and_task(frame: pd.DataFrame) -> pd.DataFrame:
    return _summary(frame, ["condition", "task"])
