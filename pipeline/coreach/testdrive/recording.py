"""A recorded drive as one schema-v1 episode (coreach.episodes) plus the stick input and filter events.

The required columns come from the episodes writer (`to_table`); the extra columns sit next to them (the
loader ignores columns it does not know). File metadata adds the bundle's manifest hash and the session id.
"""

from __future__ import annotations

import json
import os
import uuid
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from coreach.episodes import Episode, EpisodeSet, to_table
from coreach.episodes.drive_files import META_MANIFEST, META_SESSION, META_TOLERANCES
from coreach.world.geometry import matrix_to_quat

SOURCE = "coreach test-drive"
FLAG_COLUMNS = ("stale", "deadband", "stick_clipped", "position_limited", "speed_capped", "separation_held")


def save_drive(drive, rows: list[dict], goal: int, episode: int, path: Path, extra_meta: dict | None = None) -> Path:
    """Write rows recorded by `Drive.tick` to `path` atomically (temp file in the same folder, os.replace).
    `extra_meta` adds file metadata (a study's trial: study, plan, participant code, condition letter, task)."""
    m = drive.manifest
    ep = Episode(
        episode_id=episode, goal=goal, q=np.stack([r["q"] for r in rows]), qd=np.stack([r["qd"] for r in rows]),
        ee_pos=np.stack([r["pos"] for r in rows]), ee_quat=matrix_to_quat(np.stack([r["rot"] for r in rows])),
        goal_pos=m.goal_pos.copy(), goal_quat=m.goal_quat.copy(), goal_fine=m.goal_fine.copy(),
    )  # fmt: skip
    table = to_table(EpisodeSet([ep], list(m.goal_names), list(m.joint_names), drive.dt, source=SOURCE))
    d, g = m.latent_dim, m.n_goals
    extra = {
        "t_s": pa.array([r["t"] for r in rows], type=pa.float64()),
        "stick_input": _fixed([r["stick_in"] for r in rows], d),  # as received from the page
        "stick": _fixed([r["stick"] for r in rows], d),  # as the Session used it (box, deadband)
        "input_age_s": pa.array([r["age"] for r in rows], type=pa.float64()),
        "qd_decoder": _fixed([r["qd_decoder"] for r in rows], m.action_dim),
        **{k: pa.array([r["flags"].get(k, False) for r in rows], type=pa.bool_()) for k in FLAG_COLUMNS},
        "workspace_scale": pa.array([r["workspace_scale"] for r in rows], type=pa.float64()),
        "fault": pa.array([r["fault"] for r in rows], type=pa.string()),
        "belief": _fixed([r["belief"] for r in rows], g),
        "target": pa.array([m.goal_names[r["target"]] for r in rows], type=pa.string()),
        "arrived": _fixed([[p == 2 for p in r["phase"]] for r in rows], g, pa.bool_()),
        # per goal: 0 seeking the approach pose, 1 seeking the end of the fine motion, 2 arrived
        "phase": _fixed([r["phase"] for r in rows], g, pa.int8()),
    }
    for name, col in extra.items():
        table = table.append_column(name, col)
    meta = dict(table.schema.metadata or {})
    meta.update({
        META_MANIFEST.encode(): drive.manifest_sha256.encode(), META_SESSION.encode(): drive.session_id.encode(),
        META_TOLERANCES.encode(): json.dumps({"position_m": drive.position_tol,
                                              "orientation_rad": drive.orientation_tol}).encode(),
    })  # fmt: skip
    meta.update({f"coreach.{k}".encode(): json.dumps(v).encode() for k, v in (extra_meta or {}).items()})
    table = table.replace_schema_metadata(meta)
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.parent / f".{path.name}.{uuid.uuid4().hex}.tmp"
    try:
        pq.write_table(table, tmp)
        os.chmod(tmp, 0o600)  # a person's drive: the owner's only
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


def _fixed(values, width: int, kind=None):
    kind = kind or pa.float64()
    dtype = {pa.bool_(): bool, pa.int8(): np.int8}.get(kind, np.float64)
    flat = np.asarray(values, dtype=dtype).reshape(-1)
    return pa.FixedSizeListArray.from_arrays(pa.array(flat, type=kind), width)
