"""Descriptive tables of a study's trials: per condition, and per condition and task."""

from __future__ import annotations

import pandas as pd


def _summary(frame: pd.DataFrame, by: list[str]) -> pd.DataFrame:
    """Trials, participants, success rate, completion time of successful trials (mean, sd, median) and,
    where rated, raw TLX and preference rank."""
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
    for column in ("tlx", "preference"):
        if column in frame.columns and frame[column].notna().any():
            out[f"{column}_mean"] = groups[column].mean()
            out[f"{column}_sd"] = groups[column].std()
    return out.reset_index()


def by_condition(frame: pd.DataFrame) -> pd.DataFrame:
    return _summary(frame, ["condition"])


def by_condition_and_task(frame: pd.DataFrame) -> pd.DataFrame:
    return _summary(frame, ["condition", "task"])
