"""Writing imported episodes as schema-v1 Parquet with the operator's stick as an extra column, atomically."""

from __future__ import annotations

import os
import uuid
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from coreach.episodes import EpisodeSet, to_table

# The loader reads the schema's columns by name and leaves any other column alone, so `stick` rides along
# for later analysis without a schema change: fixed_size_list<float64>[k], the axes held at each step.
STICK_COLUMN = "stick"


def save_with_stick(episode_set: EpisodeSet, sticks: list[np.ndarray] | None, path: str | os.PathLike) -> Path:
    """The set as coreach.episodes.to_table writes it, plus `stick` when given (one [T, k] array per
    episode); a temporary file in the same folder, then os.replace."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    table = to_table(episode_set)
    if sticks is not None:
        width = sticks[0].shape[1]
        flat = pa.array(np.ascontiguousarray(np.concatenate(sticks), dtype=np.float64).ravel())
        meta = table.schema.metadata
        table = table.append_column(STICK_COLUMN, pa.FixedSizeListArray.from_arrays(flat, width))
        table = table.replace_schema_metadata(meta)
    tmp = path.parent / f".{path.name}.{uuid.uuid4().hex}.tmp"
    try:
        pq.write_table(table, tmp)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path
