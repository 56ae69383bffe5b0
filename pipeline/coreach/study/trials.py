"""Reading a study's long-format trial table: every row checked, a bad row or file named and left out."""

from __future__ import annotations

import csv
import math
from pathlib import Path

import pandas as pd

from coreach.errors import DataError
from coreach.study.tlx import COLUMNS as TLX_COLUMNS

REQUIRED = ("participant", "condition", "task", "trial", "success", "time_s")
# the figures a session writes per trial (coreach.study.trial.trial_figures), and the block's ratings
FIGURES = ("path_m", "idle_s", "reversals", "mode_switches", "filter_activations", "min_furniture_m", "min_person_m")
OPTIONAL_NUMBERS = (*FIGURES, *TLX_COLUMNS, "liking", "preference")
_TRUE, _FALSE = {"1", "true", "yes", "1.0"}, {"0", "false", "no", "0.0"}


def trial_files(paths: list[Path]) -> list[Path]:
    """The CSV files of `paths` (a file; or every *.csv in a folder and every */trials.csv below it, sorted)."""
    out: list[Path] = []
    for p in paths:
        # a folder of tables, or a sessions/ folder (each participant's <code>/trials.csv)
        out += sorted(p.glob("*.csv")) + sorted(p.glob("*/trials.csv")) if p.is_dir() else [p]
    return out


def _number(text: str, column: str, optional: bool) -> float:
    if text.strip() == "" and optional:
        return math.nan
    value = float(text)  # ValueError names the bad text
    if not math.isfinite(value):
        raise ValueError(f"{column} {text!r} is not finite")
    return value


def _row(raw: dict, where: str) -> dict:
    """One checked row; ValueError (with the reason) for a row that must be left out."""
    out = {"_where": where}
    for key in ("participant", "condition", "task"):
        value = (raw.get(key) or "").strip()
        if not value:
            raise ValueError(f"{key} is empty")
        out[key] = value
    try:
        out["trial"] = int(float(raw["trial"]))
    except (TypeError, ValueError):
        raise ValueError(f"trial {raw.get('trial')!r} is not a number") from None
    success = (raw.get("success") or "").strip().lower()
    if success not in _TRUE | _FALSE:
        raise ValueError(f"success {raw.get('success')!r} is not 0/1 or true/false")
    out["success"] = int(success in _TRUE)
    try:
        out["time_s"] = _number(raw.get("time_s") or "", "time_s", optional=False)
    except ValueError:
        raise ValueError(f"time_s {raw.get('time_s')!r} is not a finite number") from None
    if out["time_s"] < 0:
        raise ValueError(f"time_s {out['time_s']:g} is negative")
    for column in OPTIONAL_NUMBERS:
        if column in raw:
            try:
                out[column] = _number(raw[column] or "", column, optional=True)
            except ValueError:
                raise ValueError(f"{column} {raw[column]!r} is not a number") from None
    return out


def _flag(raw: dict, key: str, default: bool) -> bool:
    text = (raw.get(key) or "").strip().lower()
    return default if text == "" else text in _TRUE


def read_trials(paths: list[Path], warn) -> pd.DataFrame:
    """Every readable row of every file as one DataFrame (`_where` names each row's file and line).
    `warn(message)` is called once per file or row left out, with the reason; DataError when nothing is left.
    Practice trials and trials a session marked incomplete (columns `practice`, `complete`) are not errors:
    they are left out and counted in the frame's attrs ("practice", "incomplete")."""
    rows: list[dict] = []
    skipped = {"practice": 0, "incomplete": 0}
    files = trial_files(paths)
    if not files:
        raise DataError("trials", f"no trial files found in {', '.join(str(p) for p in paths)}")
    for path in files:
        try:
            with open(path, newline="", encoding="utf-8") as fh:
                reader = csv.DictReader(fh)
                missing = [c for c in REQUIRED if c not in (reader.fieldnames or [])]
                if missing:
                    warn(f"{path}: left out, no column {', '.join(missing)} (expected {', '.join(REQUIRED)})")
                    continue
                for raw in reader:
                    where = f"{path} line {reader.line_num}"
                    if None in raw:  # more cells than header names: the row is shifted, no cell can be trusted
                        warn(f"{where}: left out, more cells than columns")
                        continue
                    if _flag(raw, "practice", False):
                        skipped["practice"] += 1
                        continue
                    if not _flag(raw, "complete", True):
                        skipped["incomplete"] += 1
                        continue
                    try:
                        rows.append(_row(raw, where))
                    except ValueError as exc:
                        warn(f"{where}: left out, {exc}")
        except (OSError, UnicodeDecodeError, csv.Error) as exc:
            warn(f"{path}: left out, unreadable ({type(exc).__name__}: {exc})")
            rows = [r for r in rows if not r["_where"].startswith(f"{path} line ")]  # none of a half-read file
    if not rows:
        raise DataError("trials", "no readable trial rows in " + ", ".join(str(p) for p in files))
    frame = pd.DataFrame(rows)
    dup = frame.duplicated(subset=["participant", "condition", "task", "trial"], keep="first")
    for where in frame.loc[dup, "_where"]:
        warn(f"{where}: left out, the same participant, condition, task and trial appear earlier")
    out = frame.loc[~dup].reset_index(drop=True)
    out.attrs.update(skipped)
    return out
