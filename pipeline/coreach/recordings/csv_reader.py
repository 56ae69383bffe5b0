"""Reading a plain CSV recording: one row per sample, columns time_s, goal, q_<joint>, [qd_<joint>], [stick_<i>]."""

from __future__ import annotations

import csv
import math
import re
from pathlib import Path

import numpy as np

from coreach.errors import DataError
from coreach.recordings.recording import Recording, Stream

_STICK = re.compile(r"stick_(\d+)$")


def read_csv(path: str | Path, joint_names: list[str]) -> Recording:
    """The streams of one CSV file. Columns (any order, a header row first):
    time_s (seconds, any origin), goal (goal name), q_<joint> for every joint of the robot (rad),
    optionally qd_<joint> for every joint (commanded velocities, rad/s: the action) and stick_0 .. stick_<k-1>
    (the operator's stick axes). Other columns are ignored. DataError names file, line and column."""
    path = Path(path)
    where = f"csv {path}"
    if not path.is_file():
        raise DataError(where, "file not found; expected a CSV file with a header row")
    with path.open(newline="", encoding="utf-8") as f:
        rows = list(csv.reader(f))
    if not rows or not any(cell.strip() for cell in rows[0]):
        raise DataError(where, "is empty; expected a header row (time_s, goal, q_<joint> ...)")
    header = [h.strip() for h in rows[0]]
    col = {name: i for i, name in enumerate(header)}
    q_cols = [f"q_{j}" for j in joint_names]
    for name in ("time_s", "goal", *q_cols):
        if name not in col:
            raise DataError(f"{where}: column {name}", f"missing; expected time_s, goal and q_<joint> for the "
                                                       f"robot's joints {list(joint_names)}")  # fmt: skip
    qd_cols = [f"qd_{j}" for j in joint_names]
    has_qd = [c in col for c in qd_cols]
    if any(has_qd) and not all(has_qd):
        raise DataError(f"{where}: column {qd_cols[has_qd.index(False)]}",
                        "missing; qd_<joint> columns come for every joint or for none")
    sticks = sorted((int(m.group(1)), h) for h in header if (m := _STICK.match(h)))
    if [i for i, _ in sticks] != list(range(len(sticks))):
        raise DataError(f"{where}: columns stick_*", f"expected stick_0 .. stick_{len(sticks) - 1} without gaps, "
                                                     f"got {[h for _, h in sticks]}")  # fmt: skip
    body = [(n, r) for n, r in enumerate(rows[1:], start=2) if any(cell.strip() for cell in r)]
    if len(body) < 2:
        raise DataError(where, f"has {len(body)} data row(s); expected at least 2 to resample")

    def numbers(names: list[str], what: str) -> np.ndarray:
        out = np.empty((len(body), len(names)), dtype=np.float64)
        for k, (line, r) in enumerate(body):
            for j, name in enumerate(names):
                cell = r[col[name]].strip() if col[name] < len(r) else ""
                try:
                    value = float(cell)
                except ValueError:
                    value = math.nan
                if not math.isfinite(value):
                    raise DataError(f"{where}: line {line}, column {name}", f"expected a finite number ({what}), "
                                                                            f"got {cell!r}")  # fmt: skip
                out[k, j] = value
        return out

    t = numbers(["time_s"], "seconds")[:, 0]
    goals, previous = [], None
    for k, (line, r) in enumerate(body):
        name = r[col["goal"]].strip() if col["goal"] < len(r) else ""
        if not name:
            raise DataError(f"{where}: line {line}, column goal", "empty; expected a goal name on every row")
        if name != previous:
            goals.append((float(t[k]), name))
            previous = name
    return Recording(
        source=where,
        joints=Stream("columns q_*", t, numbers(q_cols, "joint position, rad")),
        command=Stream("columns qd_*", t, numbers(qd_cols, "joint velocity, rad/s")) if all(has_qd) else None,
        stick=Stream("columns stick_*", t, numbers([h for _, h in sticks], "stick axis")) if sticks else None,
        goals=goals, goal_origin="column goal",
    )  # fmt: skip
