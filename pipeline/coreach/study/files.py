"""Owner-only, crash-safe writes for a study's files (plans and analyses concern people)."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

FILE_MODE = 0o600  # plans hold the condition key and participant codes: the experimenter's only
FOLDER_MODE = 0o700


def private_folder(path: Path) -> Path:
    """Create `path` (and its parents) owner-only; an existing folder is narrowed to owner-only too."""
    missing = [p for p in (path, *path.parents) if not p.exists()]
    path.mkdir(parents=True, exist_ok=True, mode=FOLDER_MODE)
    for p in [path, *missing]:  # the parents this call made are the study's too (sessions/, v<N>/)
        os.chmod(p, FOLDER_MODE)  # mkdir's mode is masked by the umask, and an existing folder keeps its own
    return path


def write_private(path: Path, data: str | bytes) -> Path:
    """Write `path` through a temporary file in the same folder and a rename: a killed command leaves the old
    file or the new one, never half of one. The file is 0o600 before it holds anything."""
    private_folder(path.parent)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        os.fchmod(fd, FILE_MODE)
        with os.fdopen(fd, "wb") as fh:
            fh.write(data.encode("utf-8") if isinstance(data, str) else data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path
