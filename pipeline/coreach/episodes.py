"""Demonstration episodes in joint space, their fingerprint, and the validated Parquet format they are stored in.

Parquet schema (schema version 1): one row per time step, rows of an episode holding steps 0..T-1.

==========  =====================================  ==========================================================
column      type                                   meaning
==========  =====================================  ==========================================================
episode     int64                                  episode id (any integer, unique per episode)
step        int32                                  time step within the episode: 0, 1, ..., T-1, no gaps
goal        string                                 name of the goal demonstrated (one of coreach.goal_names)
q           fixed_size_list<float64>[n]            joint positions (rad) before the step, in joint_names order
qd          fixed_size_list<float64>[n]            commanded joint velocities (rad/s) for the step
ee_pos      fixed_size_list<float64>[3]            tool position (m, base frame) at q          (optional*)
ee_quat     fixed_size_list<float64>[4]            tool orientation (w, x, y, z) at q          (optional*)
goal_pos    list<fixed_size_list<float64>[3]>[G]   approach point of every goal in this episode's layout (m)
goal_quat   list<fixed_size_list<float64>[4]>[G]   approach orientation of every goal (w, x, y, z)
goal_fine   list<fixed_size_list<float64>[3]>[G]   fine-motion displacement of every goal (m, base frame)
==========  =====================================  ==========================================================

goal_pos/goal_quat/goal_fine are the episode's layout repeated on each of its rows, in coreach.goal_names order.
(*) Files may leave out ee_pos and ee_quat; they are then computed from q with the robot's forward kinematics.
Plain `list<double>` and float32 columns are accepted as long as every row has the expected length.

File key-value metadata:
    coreach.schema_version  "1"
    coreach.goal_names      JSON list of the G goal names (order of the goal_* lists)
    coreach.joint_names     JSON list of the n joint names (order of q/qd); optional when a robot is given
    coreach.dt              time between steps in seconds, as a decimal string

Loading checks every rule above and raises DataError naming the file, episode and column at fault.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import uuid
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Iterator

import numpy as np

from coreach.errors import DataError

if TYPE_CHECKING:
    import pyarrow as pa

    from coreach.protocols import Robot

__all__ = ["Episode", "EpisodeSet", "save_parquet", "load_parquet", "SCHEMA_VERSION", "REQUIRED_COLUMNS"]

SCHEMA_VERSION = "1"
REQUIRED_COLUMNS = ("episode", "step", "goal", "q", "qd", "goal_pos", "goal_quat", "goal_fine")
OPTIONAL_COLUMNS = ("ee_pos", "ee_quat")
_FLOAT_FIELDS = ("q", "qd", "ee_pos", "ee_quat", "goal_pos", "goal_quat", "goal_fine")


@dataclass
class Episode:
    """One demonstration of length T on an n-joint arm in a layout of G goals (float64 numpy)."""

    episode_id: int
    goal: int  # index into EpisodeSet.goal_names
    q: np.ndarray  # [T, n] joint positions before each step
    qd: np.ndarray  # [T, n] commanded joint velocities
    ee_pos: np.ndarray  # [T, 3]
    ee_quat: np.ndarray  # [T, 4] (w, x, y, z)
    goal_pos: np.ndarray  # [G, 3]
    goal_quat: np.ndarray  # [G, 4]
    goal_fine: np.ndarray  # [G, 3]

    def __len__(self) -> int:
        return self.q.shape[0]

    @property
    def goal_targets(self) -> np.ndarray:
        """Waypoints [G, 2, 3]: approach point and end of the fine motion of every goal."""
        return np.stack([self.goal_pos, self.goal_pos + self.goal_fine], axis=1)


@dataclass
class EpisodeSet:
    """Episodes sharing one robot, goal list and time step."""

    episodes: list[Episode]
    goal_names: list[str]
    joint_names: list[str]
    dt: float
    source: str = ""  # where the episodes came from; not part of the fingerprint
    arrival: dict | None = None  # per-goal arrival of the demonstrator that made them (coreach.arrival)

    def __len__(self) -> int:
        return len(self.episodes)

    def __iter__(self) -> Iterator[Episode]:
        return iter(self.episodes)

    def __getitem__(self, i: int) -> Episode:
        return self.episodes[i]

    @property
    def total_steps(self) -> int:
        return sum(len(e) for e in self.episodes)

    @property
    def goals(self) -> np.ndarray:
        """Goal index of every episode [N]."""
        return np.array([e.goal for e in self.episodes], dtype=np.int64)

    def fingerprint(self) -> str:
        """SHA-256 (hex) of a canonical serialisation: names, dt and every episode's ids and float64 arrays
        in little-endian order. Equal sets give equal fingerprints, also after a Parquet round trip.
        Not cached: the arrays are mutable."""
        h = hashlib.sha256()
        head = {"goal_names": list(self.goal_names), "joint_names": list(self.joint_names), "dt": repr(float(self.dt))}
        h.update(json.dumps(head, sort_keys=True).encode())
        for e in self.episodes:
            h.update(np.array([e.episode_id, e.goal, len(e)], dtype="<i8").tobytes())
            for name in _FLOAT_FIELDS:
                a = np.ascontiguousarray(getattr(e, name), dtype="<f8")
                h.update(np.array(a.shape, dtype="<i8").tobytes())
                h.update(a.tobytes())
        return h.hexdigest()


# ----------------------------------------------------------------------------------------------- writing


def _fixed(values: np.ndarray, width: int) -> pa.Array:
    import pyarrow as pa

    return pa.FixedSizeListArray.from_arrays(pa.array(np.ascontiguousarray(values, dtype=np.float64).ravel()), width)


def _per_row_layout(blocks: list[np.ndarray], lengths: np.ndarray, width: int) -> pa.Array:
    """list<fixed_size_list[width]> column: each episode's [G, width] block repeated on its rows."""
    import pyarrow as pa

    G = blocks[0].shape[0]
    rows = np.repeat(np.stack(blocks), lengths, axis=0)  # [rows, G, width]
    offsets = pa.array(np.arange(rows.shape[0] + 1, dtype=np.int32) * G)
    return pa.ListArray.from_arrays(offsets, _fixed(rows.reshape(-1, width), width))


def to_table(episode_set: EpisodeSet) -> pa.Table:
    """The Parquet table (schema version 1) of an episode set."""
    import pyarrow as pa

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
    import pyarrow.parquet as pq

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


# ----------------------------------------------------------------------------------------------- reading


class _Reader:
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
            row = _first(arr.is_null()) // per_row
            raise self.fail(name, "has missing (null) values; expected a value everywhere", row)

    def integers(self, name: str) -> np.ndarray:
        import pyarrow as pa

        col = self.table.column(name)
        if not pa.types.is_integer(col.type):
            raise self.fail(name, f"expected integers, got type {col.type}")
        self._no_nulls(name, col)
        return col.to_numpy().astype(np.int64)

    def strings(self, name: str) -> np.ndarray:
        import pyarrow as pa

        col = self.table.column(name)
        if pa.types.is_dictionary(col.type):
            col = col.cast(col.type.value_type)
        if not (pa.types.is_string(col.type) or pa.types.is_large_string(col.type)):
            raise self.fail(name, f"expected strings (goal names), got type {col.type}")
        self._no_nulls(name, col)
        return np.asarray(col.to_pylist(), dtype=object)

    def _flatten(self, name: str, arr: pa.Array, width: int, what: str, per_row: int = 1) -> pa.Array:
        """Values of a list column whose every entry has `width` items; entry i lies on file row i // per_row."""
        import pyarrow as pa
        import pyarrow.compute as pc

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
        import pyarrow as pa

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


def _first(mask: pa.ChunkedArray | pa.Array) -> int:
    """Index of the first true entry of a boolean array."""
    return int(np.flatnonzero(np.asarray(mask.to_numpy(zero_copy_only=False)))[0])


def _names_meta(meta: dict[bytes, bytes], key: str, where: str) -> list[str] | None:
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


def load_parquet(path: str | os.PathLike, robot: Robot | None = None, min_steps: int = 2) -> EpisodeSet:
    """Read and validate demonstrations (schema in this module's docstring); a lab's own recordings
    go through the same checks. With `robot`, joints must match it and missing ee_* columns are
    computed from q by forward kinematics."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    path = Path(path)
    where = str(path)
    if not path.is_file():
        raise DataError(where, "file not found; expected a Parquet file of demonstrations")
    try:
        table = pq.read_table(path)
    except (pa.ArrowException, OSError) as e:
        raise DataError(where, f"not a readable Parquet file ({str(e).splitlines()[0][:200]})") from None

    meta = table.schema.metadata or {}
    version = meta.get(b"coreach.schema_version")
    if version is not None and version.decode(errors="replace") != SCHEMA_VERSION:
        raise DataError(f"{where}: metadata coreach.schema_version", f"expected \"{SCHEMA_VERSION}\", got {version!r}")
    goal_names = _names_meta(meta, "coreach.goal_names", where)
    if goal_names is None:
        raise DataError(f"{where}: metadata coreach.goal_names", "missing; expected a JSON list of the goal names")
    joint_names = _names_meta(meta, "coreach.joint_names", where)
    raw_dt = meta.get(b"coreach.dt")
    try:
        dt = float(raw_dt.decode()) if raw_dt is not None else math.nan
    except (UnicodeDecodeError, ValueError):
        dt = math.nan
    if not (math.isfinite(dt) and dt > 0):
        raise DataError(f"{where}: metadata coreach.dt", f"expected the time step in seconds (> 0), got {raw_dt!r}")

    missing = [c for c in REQUIRED_COLUMNS if c not in table.column_names]
    if missing:
        raise DataError(f"{where}: column {missing[0]}", f"missing; required columns are {list(REQUIRED_COLUMNS)}")
    has_ee = [c in table.column_names for c in OPTIONAL_COLUMNS]
    if any(has_ee) and not all(has_ee):
        absent = OPTIONAL_COLUMNS[has_ee.index(False)]
        raise DataError(f"{where}: column {absent}", "missing; ee_pos and ee_quat come together (or both left out)")
    if not all(has_ee) and robot is None:
        raise DataError(f"{where}: column ee_pos", "missing; pass a robot to compute ee_pos/ee_quat from q")
    if table.num_rows == 0:
        raise DataError(where, "has no rows; expected at least one episode")
    if joint_names is None and robot is None:
        raise DataError(f"{where}: metadata coreach.joint_names", "missing; expected a JSON list (or pass a robot)")
    # The robot, when given, decides the joint count so a mismatch is reported at the q column.
    n = robot.dof if robot is not None else len(joint_names)
    G = len(goal_names)

    rd = _Reader(table, where)
    episode = rd.integers("episode")
    rd.row_episode = episode
    step = rd.integers("step")
    rd.row_step = step
    goal = rd.strings("goal")

    # Rows sorted by (episode, step), stable so a duplicated step is caught below.
    order = np.lexsort((step, episode))
    episode, step, goal = episode[order], step[order], goal[order]
    starts = np.flatnonzero(np.r_[True, episode[1:] != episode[:-1]])
    lengths = np.diff(np.r_[starts, len(episode)])
    expected_step = np.arange(len(episode)) - np.repeat(starts, lengths)
    bad = np.flatnonzero(step != expected_step)
    if bad.size:
        r = int(bad[0])
        raise DataError(
            f"{where}: episode {episode[r]}, column step",
            f"steps not contiguous: expected step {expected_step[r]}, found {step[r]} (steps must run 0, 1, ..., T-1)",
        )
    short = np.flatnonzero(lengths < min_steps)
    if short.size:
        s = int(short[0])
        raise DataError(
            f"{where}: episode {episode[starts[s]]}, column step",
            f"episode has {lengths[s]} steps; expected at least {min_steps}",
        )
    index = {g: i for i, g in enumerate(goal_names)}
    unknown = np.flatnonzero([g not in index for g in goal])
    if unknown.size:
        r = int(unknown[0])
        raise DataError(f"{where}: episode {episode[r]}, column goal", f"unknown goal {goal[r]!r}; expected one of {goal_names}")
    mixed = np.flatnonzero(goal[1:] != goal[:-1])
    mixed = mixed[episode[mixed + 1] == episode[mixed]]
    if mixed.size:
        r = int(mixed[0]) + 1
        raise DataError(f"{where}: episode {episode[r]}, column goal", "goal changes within the episode; expected one goal")

    # Floats are checked in file order so errors name the file row's episode and step.
    cols = {
        "q": rd.floats("q", n, f"{n} joint positions, rad")[order],
        "qd": rd.floats("qd", n, f"{n} joint velocities, rad/s")[order],
        "goal_pos": rd.floats("goal_pos", 3, "approach point x, y, z", goals=G)[order],
        "goal_quat": rd.floats("goal_quat", 4, "quaternion w, x, y, z", goals=G)[order],
        "goal_fine": rd.floats("goal_fine", 3, "displacement x, y, z", goals=G)[order],
    }
    if robot is not None:
        if joint_names is None:
            joint_names = list(robot.joint_names)
        elif list(joint_names) != list(robot.joint_names):
            raise DataError(
                f"{where}: metadata coreach.joint_names",
                f"expected the joints of robot {robot.name} {list(robot.joint_names)}, got {joint_names}",
            )
    if all(has_ee):
        cols["ee_pos"] = rd.floats("ee_pos", 3, "tool position x, y, z")[order]
        cols["ee_quat"] = rd.floats("ee_quat", 4, "quaternion w, x, y, z")[order]
    else:
        cols["ee_pos"], cols["ee_quat"] = _forward_kinematics(robot, cols["q"])

    for name in ("ee_quat", "goal_quat"):
        norms = np.linalg.norm(cols[name], axis=-1).reshape(len(episode), -1)
        bad = np.flatnonzero(np.abs(norms - 1).max(axis=1) > 1e-3)
        if bad.size:
            r = int(bad[0])
            raise DataError(f"{where}: episode {episode[r]}, column {name}", "expected unit quaternions (w, x, y, z)")
    for name in ("goal_pos", "goal_quat", "goal_fine"):
        first = np.repeat(cols[name][starts], lengths, axis=0)
        bad = np.flatnonzero((cols[name] != first).reshape(len(episode), -1).any(axis=1))
        if bad.size:
            r = int(bad[0])
            raise DataError(
                f"{where}: episode {episode[r]}, column {name}", "layout changes within the episode; expected the same on every row"
            )

    episodes = []
    for s, t in zip(starts.tolist(), lengths.tolist()):
        sl = slice(s, s + t)
        episodes.append(
            Episode(
                episode_id=int(episode[s]),
                goal=index[goal[s]],
                q=cols["q"][sl],
                qd=cols["qd"][sl],
                ee_pos=cols["ee_pos"][sl],
                ee_quat=cols["ee_quat"][sl],
                goal_pos=cols["goal_pos"][s],
                goal_quat=cols["goal_quat"][s],
                goal_fine=cols["goal_fine"][s],
            )
        )
    return EpisodeSet(episodes, list(goal_names), list(joint_names), dt, source=f"parquet:{where}")


def _forward_kinematics(robot: Robot, q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    import torch

    from coreach.geometry import matrix_to_quat

    with torch.no_grad():
        pos, rot = robot.fk(torch.as_tensor(q, dtype=torch.float64))
        quat = matrix_to_quat(rot.to(torch.float64))
    return pos.to(torch.float64).numpy().copy(), quat.numpy().copy()
