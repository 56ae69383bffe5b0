"""Loading a schema-v1 Parquet file of demonstrations (the schema is in coreach.episodes), checking every rule."""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from coreach.episodes.column_reader import ColumnReader, names_metadata
from coreach.episodes.episode_set import OPTIONAL_COLUMNS, REQUIRED_COLUMNS, SCHEMA_VERSION, Episode, EpisodeSet
from coreach.errors import DataError
from coreach.world.geometry import matrix_to_quat

if TYPE_CHECKING:
    from coreach.host.protocols import Robot


def load_parquet(path: str | os.PathLike, robot: Robot | None = None, min_steps: int = 2) -> EpisodeSet:
    """Read and validate demonstrations (schema in coreach.episodes); a lab's own recordings go through the
    same checks. With `robot`, joints must match it and missing ee_* columns are computed from q by
    forward kinematics."""
    table, where = _read_table(Path(path))
    goal_names, joint_names, dt = _file_metadata(table, where, robot)
    has_ee = _check_columns(table, where, robot, joint_names)
    # The robot, when given, decides the joint count so a mismatch is reported at the q column.
    n = robot.dof if robot is not None else len(joint_names)
    rd = ColumnReader(table, where)
    rows = _episode_rows(rd, goal_names, min_steps)
    cols = _float_columns(rd, rows.order, n, len(goal_names), has_ee, robot)
    if robot is not None:
        if joint_names is None:
            joint_names = list(robot.joint_names)
        elif list(joint_names) != list(robot.joint_names):
            raise DataError(
                f"{where}: metadata coreach.joint_names",
                f"expected the joints of robot {robot.name} {list(robot.joint_names)}, got {joint_names}",
            )
    _check_poses(cols, rows, where)
    if robot is not None:
        _check_speeds(cols["qd"], rows, robot, where, joint_names)
    index = {g: i for i, g in enumerate(goal_names)}
    episodes = []
    for s, t in zip(rows.starts.tolist(), rows.lengths.tolist()):
        sl = slice(s, s + t)
        episodes.append(Episode(
            episode_id=int(rows.episode[s]), goal=index[rows.goal[s]], q=cols["q"][sl], qd=cols["qd"][sl],
            ee_pos=cols["ee_pos"][sl], ee_quat=cols["ee_quat"][sl], goal_pos=cols["goal_pos"][s],
            goal_quat=cols["goal_quat"][s], goal_fine=cols["goal_fine"][s],
        ))  # fmt: skip
    return EpisodeSet(episodes, list(goal_names), list(joint_names), dt, source=f"parquet:{where}")


def _read_table(path: Path) -> tuple[pa.Table, str]:
    where = str(path)
    if not path.is_file():
        raise DataError(where, "file not found; expected a Parquet file of demonstrations")
    try:
        table = pq.read_table(path)
    except (pa.ArrowException, OSError) as e:
        raise DataError(where, f"not a readable Parquet file ({str(e).splitlines()[0][:200]})") from None
    return table, where


def _file_metadata(table: pa.Table, where: str, robot: Robot | None) -> tuple[list[str], list[str] | None, float]:
    """Goal names, joint names (None when absent) and dt from the file's key-value metadata."""
    meta = table.schema.metadata or {}
    version = meta.get(b"coreach.schema_version")
    if version is not None and version.decode(errors="replace") != SCHEMA_VERSION:
        raise DataError(f"{where}: metadata coreach.schema_version", f"expected \"{SCHEMA_VERSION}\", got {version!r}")
    goal_names = names_metadata(meta, "coreach.goal_names", where)
    if goal_names is None:
        raise DataError(f"{where}: metadata coreach.goal_names", "missing; expected a JSON list of the goal names")
    joint_names = names_metadata(meta, "coreach.joint_names", where)
    raw_dt = meta.get(b"coreach.dt")
    try:
        dt = float(raw_dt.decode()) if raw_dt is not None else math.nan
    except (UnicodeDecodeError, ValueError):
        dt = math.nan
    if not (math.isfinite(dt) and dt > 0):
        raise DataError(f"{where}: metadata coreach.dt", f"expected the time step in seconds (> 0), got {raw_dt!r}")
    return goal_names, joint_names, dt


def _check_columns(table: pa.Table, where: str, robot: Robot | None, joint_names: list[str] | None) -> bool:
    """Required columns present, ee_* both or neither; True when the file carries ee_pos/ee_quat."""
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
    return all(has_ee)


@dataclass
class _Rows:
    """Rows sorted by (episode, step): the sort order, and where each episode starts and how long it is."""

    order: np.ndarray
    episode: np.ndarray
    goal: np.ndarray
    starts: np.ndarray
    lengths: np.ndarray


def _episode_rows(rd: ColumnReader, goal_names: list[str], min_steps: int) -> _Rows:
    """Episode, step and goal columns: contiguous steps from 0, long enough episodes, one known goal each."""
    where = rd.where
    episode = rd.integers("episode")
    rd.row_episode = episode
    step = rd.integers("step")
    rd.row_step = step
    goal = rd.strings("goal")
    order = np.lexsort((step, episode))  # stable, so a duplicated step is caught below
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
        raise DataError(f"{where}: episode {episode[starts[s]]}, column step",
                        f"episode has {lengths[s]} steps; expected at least {min_steps}")  # fmt: skip
    known = set(goal_names)
    unknown = np.flatnonzero([g not in known for g in goal])
    if unknown.size:
        r = int(unknown[0])
        raise DataError(f"{where}: episode {episode[r]}, column goal", f"unknown goal {goal[r]!r}; expected one of {goal_names}")
    mixed = np.flatnonzero(goal[1:] != goal[:-1])
    mixed = mixed[episode[mixed + 1] == episode[mixed]]
    if mixed.size:
        r = int(mixed[0]) + 1
        raise DataError(f"{where}: episode {episode[r]}, column goal", "goal changes within the episode; expected one goal")
    return _Rows(order, episode, goal, starts, lengths)


def _float_columns(rd: ColumnReader, order: np.ndarray, n: int, G: int, has_ee: bool,
                   robot: Robot | None) -> dict[str, np.ndarray]:  # fmt: skip
    """Float columns in (episode, step) order; read in file order so errors name the file row."""
    cols = {
        "q": rd.floats("q", n, f"{n} joint positions, rad")[order],
        "qd": rd.floats("qd", n, f"{n} joint velocities, rad/s")[order],
        "goal_pos": rd.floats("goal_pos", 3, "approach point x, y, z", goals=G)[order],
        "goal_quat": rd.floats("goal_quat", 4, "quaternion w, x, y, z", goals=G)[order],
        "goal_fine": rd.floats("goal_fine", 3, "displacement x, y, z", goals=G)[order],
    }
    if has_ee:
        cols["ee_pos"] = rd.floats("ee_pos", 3, "tool position x, y, z")[order]
        cols["ee_quat"] = rd.floats("ee_quat", 4, "quaternion w, x, y, z")[order]
    else:
        cols["ee_pos"], cols["ee_quat"] = _forward_kinematics(robot, cols["q"])
    return cols


def _check_poses(cols: dict[str, np.ndarray], rows: _Rows, where: str) -> None:
    """Unit quaternions, and one layout per episode (the same goal columns on every row)."""
    episode = rows.episode
    for name in ("ee_quat", "goal_quat"):
        norms = np.linalg.norm(cols[name], axis=-1).reshape(len(episode), -1)
        bad = np.flatnonzero(np.abs(norms - 1).max(axis=1) > 1e-3)
        if bad.size:
            r = int(bad[0])
            raise DataError(f"{where}: episode {episode[r]}, column {name}", "expected unit quaternions (w, x, y, z)")
    for name in ("goal_pos", "goal_quat", "goal_fine"):
        first = np.repeat(cols[name][rows.starts], rows.lengths, axis=0)
        bad = np.flatnonzero((cols[name] != first).reshape(len(episode), -1).any(axis=1))
        if bad.size:
            r = int(bad[0])
            raise DataError(f"{where}: episode {episode[r]}, column {name}",
                            "layout changes within the episode; expected the same on every row")  # fmt: skip


# A recording may overshoot a velocity limit a little (controller noise, finite differences); half again
# the limit is not noise but a unit mistake (deg/s for rad/s) or another arm's data.
SPEED_LIMIT_MARGIN = 1.5


def _check_speeds(qd: np.ndarray, rows: _Rows, robot: Robot, where: str, joint_names: list[str]) -> None:
    limit = np.asarray(robot.qd_max, dtype=np.float64) * SPEED_LIMIT_MARGIN  # [n]
    over = np.abs(qd) > limit
    if over.any():
        r, j = (int(i) for i in np.argwhere(over)[0])
        step = r - int(rows.starts[np.searchsorted(rows.starts, r, side="right") - 1])
        raise DataError(f"{where}: episode {rows.episode[r]}, column qd",
                        f"joint {joint_names[j]} at {qd[r, j]:.3g} rad/s (step {step}); expected at most "
                        f"{SPEED_LIMIT_MARGIN} x its velocity limit {limit[j] / SPEED_LIMIT_MARGIN:.3g} rad/s")  # fmt: skip


def _forward_kinematics(robot: Robot, q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    import torch  # late: only for missing ee_* columns; test drives read files without torch

    with torch.no_grad():
        pos, rot = robot.fk(torch.as_tensor(q, dtype=torch.float64))
        quat = matrix_to_quat(rot.to(torch.float64))
    return pos.to(torch.float64).numpy().copy(), quat.numpy().copy()
