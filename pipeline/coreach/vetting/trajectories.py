"""Joint trajectories of vetting episodes as one Parquet file: a row per interface, episode and step.

Columns: interface, episode, step, t (s), q_0..q_{n-1} (rad), qd_0..qd_{n-1} (rad/s, the applied command from
this step to the next; nan on the last row, which has no command), tool_x, tool_y, tool_z (m), goal_initial and
goal_final (names), sep_furniture, sep_person, sep_self (m, the closest link surface; inf where there is
nothing to measure), person_excess and separation_held (the command from this step: a link approached the
person faster than allowed; the separation step scaled the command; null on the last row).
"""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import torch

from coreach.control.safety_filter import SEPARATION
from coreach.errors import ConfigError

__all__ = ["trajectory_table", "write_trajectories", "UNITS"]

UNITS = {"t": "s", "q_*": "rad", "qd_*": "rad/s", "tool_*": "m", "sep_*": "m"}


def _per_step(x, E: int, T: int, fill) -> np.ndarray:
    """[E, T] per-command values -> [E * (T + 1)] per row, `fill` on every episode's last row."""
    x = torch.as_tensor(x).cpu().numpy()
    out = np.full((E, T + 1) + x.shape[2:], fill, dtype=np.result_type(x.dtype, type(fill)))
    out[:, :T] = x
    return out.reshape(E * (T + 1), *x.shape[2:])


def _record_table(label: str, record) -> pa.Table:
    ex = record.extras if isinstance(record.extras, dict) else {}
    if ex.get("q") is None:
        raise ConfigError(f"record {label}", "extras lack q [E, T+1, n]; only the vetting loop's records have "
                                             "joint trajectories")  # fmt: skip
    q = torch.as_tensor(ex["q"]).to(torch.float64).cpu().numpy()  # [E, T+1, n]
    E, T1, n = q.shape
    T = T1 - 1
    rows = E * T1
    names = list(record.goal_names)
    cols: dict[str, pa.Array] = {
        "interface": pa.array([label] * rows, pa.string()),
        "episode": pa.array(np.repeat(np.arange(E, dtype=np.int32), T1)),
        "step": pa.array(np.tile(np.arange(T1, dtype=np.int32), E)),
        "t": pa.array(np.tile(np.arange(T1, dtype=np.float64) * float(record.dt), E)),
    }
    flat_q = q.reshape(rows, n)
    for j in range(n):
        cols[f"q_{j}"] = pa.array(flat_q[:, j])
    qd = ex.get("qd")
    flat_qd = _per_step(torch.as_tensor(qd).to(torch.float64), E, T, np.nan) if qd is not None else \
        np.full((rows, n), np.nan)  # fmt: skip
    for j in range(n):
        cols[f"qd_{j}"] = pa.array(flat_qd[:, j])
    tool = record.ee_path.to(torch.float64).cpu().numpy().reshape(rows, 3)
    for j, axis in enumerate("xyz"):
        cols[f"tool_{axis}"] = pa.array(tool[:, j])
    for key in ("goal_initial", "goal_final"):
        per_episode = [names[int(g)] for g in getattr(record, key)]
        cols[key] = pa.array(np.repeat(np.array(per_episode, dtype=object), T1).tolist(), pa.string())
    for key in ("sep_furniture", "sep_person", "sep_self"):
        v = ex.get(key)
        cols[key] = pa.array(np.full(rows, np.inf) if v is None else
                             torch.as_tensor(v).to(torch.float64).cpu().numpy().reshape(rows))  # fmt: skip
    last = np.zeros((E, T1), dtype=bool)
    last[:, T] = True
    last = last.reshape(rows)  # the last row of every episode has no command: null
    excess = ex.get("person_excess")
    excess = np.zeros((E, T), dtype=bool) if excess is None else torch.as_tensor(excess).cpu().numpy()
    cols["person_excess"] = pa.array(_per_step(excess, E, T, False), mask=last)
    bits = ex.get("limits")
    held = np.zeros((E, T), dtype=bool) if bits is None else \
        ((torch.as_tensor(bits).to(torch.int64) & SEPARATION) > 0).cpu().numpy()  # fmt: skip
    cols["separation_held"] = pa.array(_per_step(held, E, T, False), mask=last)
    return pa.table(cols)


def trajectory_table(records: dict) -> pa.Table:
    """One table of every interface's episodes (label -> RolloutRecord), interfaces in the given order, with
    the units in the schema's metadata."""
    if not records:
        raise ConfigError("trajectories", "no records to write")
    table = pa.concat_tables([_record_table(label, rec) for label, rec in records.items()])
    return table.replace_schema_metadata({"coreach.units": json.dumps(UNITS)})


def write_trajectories(records: dict, path: Path) -> Path:
    """`trajectory_table(records)` to Parquet at `path`, written under a temporary name in the same folder and
    then renamed, so a reader never sees half a file."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    table = trajectory_table(records)
    fd, tmp = tempfile.mkstemp(dir=path.parent, suffix=".parquet.tmp")
    os.close(fd)
    try:
        pq.write_table(table, tmp)
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.remove(tmp)
    return path
