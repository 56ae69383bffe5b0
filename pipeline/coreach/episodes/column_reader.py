"""Reading Parquet columns into validated numpy arrays, with errors that name file, episode and column."""

from __future__ import annotations

import json

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from coreach.errors import DataError


class ColumnReader:
    """Turns a table into validated numpy columns, naming file, episode and column on any problem."""

    def __init__(self, table: pa.Table, where: str):
        self.table, self.where = table, where
        self.row_episode: np.ndarray | None = None  # file order
        self.row_step: np.ndarray | None = None

    def fail(self, column: str, problem: str, row: int | None = None) -> DataError:
        """Error at file row `row` (named by its episode and step) or at the whole column."""
        if row is not None and self.row_episode is not None:
            at_step = f" (step {self.row_step[row]})" if self.row_step is not None else ""
            return DataError(f"{self.where}: episode {self.row_episode[row]}, column {column}", problem + at_step)
        return DataError(f"{self.where}: column {column}", problem)

    def _no_nulls(self, name: str, arr: pa.Array | pa.ChunkedArray, per_row: int = 1) -> None:
        if arr.null_count:
            row = first_true(arr.is_null()) // per_row
            raise self.fail(name, "has missing (null) values; expected a value everywhere", row)

    def integers(self, name: str) -> np.ndarray:
        col = self.table.column(name)
        if not pa.types.is_integer(col.type):
            raise self.fail(name, f"expected integers, got type {col.type}")
        self._no_nulls(name, col)
        return col.to_numpy().astype(np.int64)

    def strings(self, name: str) -> np.ndarray:
        col = self.table.column(name)
        if pa.types.is_dictionary(col.type):
            col = col.cast(col.type.value_type)
        if not (pa.types.is_string(col.type) or pa.types.is_large_string(col.type)):
            raise self.fail(name, f"expected strings (goal names), got type {col.type}")
        self._no_nulls(name, col)
        return np.asarray(col.to_pylist(), dtype=object)

    def _flatten(self, name: str, arr: pa.Array, width: int, what: str, per_row: int = 1) -> pa.Array:
        """Values of a list column whose every entry has `width` items; entry i lies on file row i // per_row."""
        t = arr.type
        if not (pa.types.is_list(t) or pa.types.is_large_list(t) or pa.types.is_fixed_size_list(t)):
            raise self.fail(name, f"expected lists of {width} ({what}), got type {t}")
        self._no_nulls(name, arr, per_row)
        if pa.types.is_fixed_size_list(t):
            if t.list_size != width:
                raise self.fail(name, f"expected {width} per row ({what}), got {t.list_size}", 0)
        else:
            lens = pc.list_value_length(arr).to_numpy(zero_copy_only=False)
            bad = np.flatnonzero(lens != width)
            if bad.size:
                i = int(bad[0])
                raise self.fail(name, f"expected {width} per row ({what}), got {lens[i]}", i // per_row)
        return arr.flatten()

    def floats(self, name: str, width: int, what: str, goals: int | None = None) -> np.ndarray:
        """Finite float64 [rows, width], or [rows, goals, width] for the per-goal layout columns."""
        arr = self.table.column(name).combine_chunks()
        rows = len(arr)
        if goals is None:
            values, per_value = self._flatten(name, arr, width, what), width
        else:
            inner = self._flatten(name, arr, goals, f"one entry per goal, {goals} goals")
            values, per_value = self._flatten(name, inner, width, what, per_row=goals), goals * width
        if not (pa.types.is_floating(values.type) or pa.types.is_integer(values.type)):
            raise self.fail(name, f"expected numbers ({what}), got values of type {values.type}")
        self._no_nulls(name, values, per_value)
        out = values.to_numpy(zero_copy_only=False).astype(np.float64)
        out = out.reshape(rows, width) if goals is None else out.reshape(rows, goals, width)
        bad_rows = ~np.isfinite(out.reshape(rows, -1)).all(axis=1)
        if bad_rows.any():
            raise self.fail(name, f"contains NaN or Inf; expected finite numbers ({what})", int(np.flatnonzero(bad_rows)[0]))
        return out


def first_true(mask: pa.ChunkedArray | pa.Array) -> int:
    """Index of the first true entry of a boolean array."""
    return int(np.flatnonzero(np.asarray(mask.to_numpy(zero_copy_only=False)))[0])


def names_metadata(meta: dict[bytes, bytes], key: str, where: str) -> list[str] | None:
    raw = meta.get(key.encode())
    if raw is None:
        return None
    try:
        names = json.loads(raw.decode())
    except (UnicodeDecodeError, json.JSONDecodeError):
        names = None
    if not isinstance(names, list) or not names or not all(isinstance(x, str) for x in names):
        raise DataError(f"{where}: metadata {key}", "expected a JSON list of names, e.g. [\"a\", \"b\"]")
    if len(set(names)) != len(names):
        raise DataError(f"{where}: metadata {key}", "names must be unique")
    return names
