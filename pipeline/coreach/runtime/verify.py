"""Checking a bundle folder before use: every listed file present, inside the folder, unchanged (sha256), nothing
unlisted, and a well-formed manifest. Needs only numpy, json and hashlib."""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path, PurePosixPath, PureWindowsPath
from typing import Any

from coreach.runtime.manifest import CORE_FILES, MANIFEST, SCHEMA_VERSION, BundleError, Manifest

def sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def sha256_bytes(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _check_name(folder: Path, name: Any, where: str) -> Path:
    """A listed file name must be a canonical relative POSIX path that stays inside the folder."""
    if not isinstance(name, str) or not name:
        raise BundleError(where, f"file entry {name!r} is not a non-empty relative path")
    if "\\" in name or "\x00" in name:
        raise BundleError(where, f"file entry {name!r} contains a backslash or NUL; expected a POSIX path")
    posix, win = PurePosixPath(name), PureWindowsPath(name)
    if posix.is_absolute() or win.is_absolute() or win.drive:
        raise BundleError(where, f"file entry {name!r} is an absolute path; expected a path inside the bundle")
    if ".." in posix.parts:
        raise BundleError(where, f"file entry {name!r} leaves the bundle folder ('..')")
    if posix.as_posix() != name or "." in posix.parts:
        raise BundleError(where, f"file entry {name!r} is not in canonical form (e.g. {posix.as_posix()!r})")
    if name == MANIFEST:
        raise BundleError(where, f"file entry {name!r}: the manifest cannot list itself")
    full = folder / name
    root = os.path.realpath(folder)
    real = os.path.realpath(full)
    if os.path.commonpath([root, real]) != root:
        raise BundleError(str(full), f"resolves to {real}, outside the bundle folder (symlink?)")
    return full


def _unlisted(folder: Path, listed: set[str]) -> list[str]:
    """Files, links and folders under `folder` that the manifest does not account for."""
    parents = {p.as_posix() for name in listed for p in PurePosixPath(name).parents if p.as_posix() != "."}
    extra = []
    for dirpath, dirnames, filenames in os.walk(folder):
        rel_dir = Path(dirpath).relative_to(folder)
        for d in dirnames:
            rel = (rel_dir / d).as_posix()
            if rel not in parents:
                extra.append(rel + "/")
        for f in filenames:
            rel = (rel_dir / f).as_posix()
            if rel not in listed and rel != MANIFEST:
                extra.append(rel)
    return sorted(extra)


def verify_bundle(folder: str | Path) -> Manifest:
    """Check a bundle completely before use: schema version, every listed file present, inside the folder
    and matching its sha256, no unlisted file, and a well-formed manifest. Raises BundleError otherwise."""
    folder = Path(folder)
    if not folder.is_dir():
        raise BundleError(str(folder), "not a folder; expected a release bundle folder")
    mpath = folder / MANIFEST
    if not mpath.is_file():
        raise BundleError(str(mpath), "missing; every bundle has a manifest.json")
    try:
        data = json.loads(mpath.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise BundleError(str(mpath), f"not readable JSON ({exc})") from None
    if not isinstance(data, dict):
        raise BundleError(str(mpath), f"expected a JSON object, got {type(data).__name__}")
    version = data.get("schema_version")
    if version != SCHEMA_VERSION:
        shown = "missing" if version is None else repr(version)
        raise BundleError(str(mpath), f"schema_version {shown}; this runtime reads schema {SCHEMA_VERSION!r}")
    files = data.get("files")
    if not isinstance(files, dict) or not files:
        raise BundleError(str(mpath), "field 'files' must map every bundle file to its sha256")
    for name in CORE_FILES:
        if name not in files:
            raise BundleError(str(mpath), f"field 'files' does not list {name!r}; a bundle needs {list(CORE_FILES)}")
    paths = {name: _check_name(folder, name, str(mpath)) for name in files}
    for name, full in paths.items():
        digest = files[name]
        if not isinstance(digest, str) or len(digest) != 64 or any(c not in "0123456789abcdef" for c in digest):
            raise BundleError(str(mpath), f"files[{name!r}] must be a lowercase hex sha256, got {digest!r}")
        if not full.is_file():
            raise BundleError(str(full), "listed in the manifest but missing (or not a regular file)")
    extra = _unlisted(folder, set(files))
    if extra:
        raise BundleError(str(folder / extra[0]), f"not listed in {MANIFEST}; a bundle holds only listed files "
                                                   f"({len(extra)} unlisted: {', '.join(extra[:5])})")
    for name, full in paths.items():
        actual = sha256_file(full)
        if actual != files[name]:
            raise BundleError(str(full), f"sha256 {actual[:16]}... differs from the manifest's "
                                         f"{files[name][:16]}...; the file was changed after release")
    return Manifest.from_json(folder, data)
