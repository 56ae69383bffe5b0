"""Writing an episode set as a schema-v1 Parquet file (the schema is in coreach.episodes), atomically."""

from __future__ import annotations

import json
import os
import uuid
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from coreach.episodes.episode_set import SCHEMA_VERSION, EpisodeSet
from coreach.errors import DataError


def _fixed(values: np.ndarray, width: int) -> pa.Array:
    return pa.FixedSizeListArray.from_arrays(pa.array(np.ascontiguousarray(values, dtype=np.float64).ravel()), width)


def _per_row_layout(blocks: list[np.ndarray], lengths: np.ndarray, width: int) -> pa.Array:
    """list<fixed_size_list[width]> column: each episode's [G, width] block repeated on its rows."""
    G = blocks[0].shape[0]
    rows = np.repeat(np.stack(blocks), lengths, axis=0)  # [rows, G, width]
    offsets = pa.array(np.arange(rows.shape[0] + 1, dtype=np.int32) * G)
    return pa.ListArray.from_arrays(offsets, _fixed(rows.reshape(-1, width), width))


def to_table(episode_set: EpisodeSet) -> pa.Table:
    """The Parquet table (schema version 1) of an episode set."""
    eps = episode_set.episodes
    if not eps:
        raise DataError("episode set", "no episodes to save")
    n = len(episode_set.joint_names)
    lengths = np.array([len(e) for e in eps], dtype=np.int64)
    names = np.array(episode_set.goal_names, dtype=object)
    cols = {
        "episode": pa.array(np.repeat([e.episode_id for e in eps], lengths).astype(np.int64)),
        "step": pa.array(np.concatenate([np.arange(t, dtype=np.int32) for t in lengths])),
        "goal": pa.array(np.repeat(names[[e.goal for e in eps]], lengths).tolist(), type=pa.string()),
        "q": _fixed(np.concatenate([e.q for e in eps]), n),
        "qd": _fixed(np.concatenate([e.qd for e in eps]), n),
        "ee_pos": _fixed(np.concatenate([e.ee_pos for e in eps]), 3),
        "ee_quat": _fixed(np.concatenate([e.ee_quat for e in eps]), 4),
        "goal_pos": _per_row_layout([e.goal_pos for e in eps], lengths, 3),
        "goal_quat": _per_row_layout([e.goal_quat for e in eps], lengths, 4),
        "goal_fine": _per_row_layout([e.goal_fine for e in eps], lengths, 3),
    }
    meta = {
        "coreach.schema_version": SCHEMA_VERSION,
        "coreach.goal_names": json.dumps(list(episode_set.goal_names)),
        "coreach.joint_names": json.dumps(list(episode_set.joint_names)),
        "coreach.dt": repr(float(episode_set.dt)),
        "coreach.source": episode_set.source,
    }
    return pa.table(cols).replace_schema_metadata(meta)


def save_parquet(episode_set: EpisodeSet, path: str | os.PathLike) -> Path:
    """Write the set to `path` atomically: a temporary file in the same folder, then os.replace."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    table = to_table(episode_set)
    # A fresh name in the same folder (so os.replace is atomic); created by the writer, so it gets the
    # usual permissions rather than mkstemp's private 0600.
    tmp = path.parent / f".{path.name}.{uuid.uuid4().hex}.tmp"
    try:
        pq.write_table(table, tmp)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path
