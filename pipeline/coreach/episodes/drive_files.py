"""Recorded test drives on disk: their file metadata keys, and the files a list of files and folders names."""

from __future__ import annotations

from pathlib import Path

import pyarrow.parquet as pq

from coreach.errors import ConfigError, DataError

META_MANIFEST = "coreach.bundle_manifest_sha256"  # sha256 of the bundle's manifest.json the drive ran
META_SESSION = "coreach.testdrive_session"  # the test-drive session id
META_TOLERANCES = "coreach.testdrive_tolerances"  # JSON: the arrival tolerances the drive was judged with
DRIVE_COLUMNS = ("arrived", "phase")  # written by every test-drive recording, absent from demonstrations


def check_drive_file(path: Path) -> None:
    """DataError unless `path` is a recorded test drive (its metadata and columns, read from the schema only)."""
    schema = pq.read_schema(path)
    missing = [f"column {c}" for c in DRIVE_COLUMNS if c not in schema.names]
    if META_MANIFEST.encode() not in (schema.metadata or {}):
        missing.insert(0, f"metadata {META_MANIFEST}")
    if missing:
        raise DataError(str(path), f"not a recorded test drive (missing {', '.join(missing)}); drives are written "
                                   "by coreach test-drive")  # fmt: skip


def drive_files(entries, option: str) -> list[Path]:
    """The .parquet files named by `entries` (files, or folders whose .parquet files are taken in name order);
    ConfigError naming `option` for a missing entry or when no file is found."""
    if isinstance(entries, str):  # `drives=one.parquet` on the command line: one entry, not its characters
        entries = [entries]
    paths: list[Path] = []
    for entry in entries:
        p = Path(str(entry)).expanduser()
        if p.is_dir():
            paths += sorted(p.glob("*.parquet"))
        elif p.is_file():
            paths.append(p)
        else:
            raise ConfigError(f"option {option}", f"{p}: no such file or folder; expected recorded drives (.parquet)")
    if not paths:
        raise ConfigError(f"option {option}", f"no .parquet files in {[str(e) for e in entries]}")
    return paths
