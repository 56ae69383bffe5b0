"""The robot computer's fetch: NAME@ALIAS from the tracking server's registry into a local cache, verified, then
switched to atomically.

Cache layout (one folder per registered model):

    <cache>/<name>/v<version>/         a complete bundle, exactly as released (verify_bundle passes)
    <cache>/<name>/v<version>.json     what the registry said when it was fetched (alias, tags, gate, server)
    <cache>/<name>/current             symlink -> v<version>: the bundle the robot runs
    <cache>/<name>/.partial-*          a fetch in progress (removed when it ends; a killed fetch's is removed
                                       by the next one)

Order of a fetch, so that a failing, cut-off or tampered one changes nothing the robot uses:
1. resolve NAME@ALIAS over REST (store_client); the version must be fully published (tag
   coreach.gate_passed=true, set last by the release) and name its bundle (coreach.bundle_uri);
2. if v<version> is already cached, verifies, and its manifest hash is the registry's tag: reuse it (a
   rollback is a pointer switch, no download);
3. else download manifest.json, check its sha256 against the tag coreach.manifest_sha256, download every file
   it lists into a staging folder, checking each file's sha256 as it arrives, `verify_bundle` the whole
   folder, then rename it to v<version>;
4. write the fetch record, then replace `current` by a symlink made beside it (rename is atomic).
Earlier versions stay in the cache: a session running from one keeps its files.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import errno
import fcntl
import hashlib
import json
import os
import re
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterator

from coreach.runtime.manifest import MANIFEST, BundleError, Manifest
from coreach.runtime.store_client import (PROXIED_SCHEME, FetchError, ModelVersion, RefusedBundle, StoreClient,
                                          copy_stream)
# registry tags and aliases a release writes: the contract with `coreach release` / `coreach promote`
from coreach.runtime.registry_tags import (FIELDED_ALIAS, MODEL_NAME_RE, TAG_BUNDLE_URI, TAG_GATE, TAG_GATE_PASSED,
                                           TAG_GATE_RELAXED, TAG_MANIFEST, TAG_RELEASE_RUN)
from coreach.runtime.verify import _check_name, sha256_bytes, sha256_file, verify_bundle

CURRENT = "current"
PARTIAL = ".partial-"
LOCK = ".lock"
ALIAS_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_-]{0,254}$")
HEX64 = re.compile(r"^[0-9a-f]{64}$")


def default_cache() -> Path:
    """COREACH_ROBOT_CACHE, else $XDG_CACHE_HOME/coreach/bundles (~/.cache/coreach/bundles)."""
    if os.environ.get("COREACH_ROBOT_CACHE"):
        return Path(os.environ["COREACH_ROBOT_CACHE"]).expanduser()
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "coreach" / "bundles"


def parse_ref(ref: str) -> tuple[str, str]:
    """`NAME` or `NAME@ALIAS` -> (name, alias); the alias defaults to `fielded`."""
    name, sep, alias = str(ref).partition("@")
    alias = alias if sep else FIELDED_ALIAS
    if not MODEL_NAME_RE.match(name) or ".." in name:
        raise FetchError(f"model {ref!r}", "expected NAME or NAME@ALIAS, NAME of letters, digits, '-', '_' or '.' "
                                           "(it is also a folder name in the cache)")  # fmt: skip
    if not ALIAS_RE.match(alias):
        raise FetchError(f"model {ref!r}", f"alias {alias!r}: expected letters, digits, '-' or '_'")
    return name, alias


# ------------------------------------------------------------------------------------------ bundle sources
class _ProxiedSource:
    """A bundle folder in the server's artifact store, read through its proxied artifact API."""

    def __init__(self, client: StoreClient, path: str):
        self.client, self.path = client, path.strip("/")

    def read(self, name: str) -> bytes:
        return self.client.read_artifact(f"{self.path}/{name}")

    def download(self, name: str, dest: Path) -> str:
        return self.client.download_artifact(f"{self.path}/{name}", dest)


class _LocalSource:
    """A bundle folder on this computer's disk (an embedded store, or a server on the same machine without proxy)."""

    def __init__(self, folder: Path):
        self.folder = folder

    def read(self, name: str) -> bytes:
        return self._file(name).read_bytes()

    def download(self, name: str, dest: Path) -> str:
        h = hashlib.sha256()
        with open(self._file(name), "rb") as src, open(dest, "wb") as out:
            copy_stream(src, lambda b: (h.update(b), out.write(b)), None, str(self.folder / name))
            out.flush()
            os.fsync(out.fileno())
        return h.hexdigest()

    def _file(self, name: str) -> Path:
        path = self.folder / name
        if not path.is_file():
            raise RefusedBundle(str(path), "missing from the bundle folder the registry names")
        return path


def bundle_source(uri: str, client: StoreClient):
    """Where the bundle's files are read from; FetchError for storage this computer cannot read by itself."""
    if uri.startswith(PROXIED_SCHEME):
        rest = uri[len(PROXIED_SCHEME):]
        if rest.startswith("//"):  # mlflow-artifacts://host:port/path: the path is what the server knows
            rest = "/" + rest[2:].partition("/")[2]
        return _ProxiedSource(client, rest)
    local = uri[len("file://"):] if uri.startswith("file://") else uri if uri.startswith("/") else None
    if local is not None:
        folder = Path(local)
        if folder.is_dir():
            return _LocalSource(folder)
        raise FetchError(f"bundle {uri}", "is a folder on another computer's disk, which this one cannot read; run "
                                          "the tracking server with proxied artifact access (mlflow server "
                                          "--artifacts-destination ... --serve-artifacts) and release again")  # fmt: skip
    scheme = uri.split(":", 1)[0] if ":" in uri else "?"
    raise FetchError(f"bundle {uri}", f"is in {scheme} storage, which this computer cannot read without storage "
                                      "credentials; run the tracking server with proxied artifact access (mlflow "
                                      "server --artifacts-destination ... --serve-artifacts) and release again")  # fmt: skip


class _Busy(FetchError):
    """Another fetch holds the model folder's lock: the folder is theirs, not ours to clean up."""


# ------------------------------------------------------------------------------------------ the cache
@contextlib.contextmanager
def _locked(folder: Path) -> Iterator[None]:
    """One fetch per model folder at a time (a second one says so instead of racing the first)."""
    with open(folder / LOCK, "a+") as fh:
        try:
            fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            if exc.errno in (errno.EAGAIN, errno.EACCES):
                raise _Busy(str(folder), "another fetch of this model is running; try again when it ends") from None
            raise
        try:
            yield
        finally:
            fcntl.flock(fh, fcntl.LOCK_UN)


def _fsync_dir(folder: Path) -> None:
    fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _write_json(path: Path, data: dict) -> None:
    """Write beside, fsync, rename: the file is either the old one or the new one."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(data, fh, indent=2, sort_keys=True)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def current_version(folder: Path) -> str | None:
    """The `v<version>` folder name `current` points to, or None."""
    try:
        target = os.readlink(folder / CURRENT)
    except (FileNotFoundError, OSError):
        return None
    return target if re.fullmatch(r"v\d+", target) else None


def switch_current(folder: Path, target: str) -> None:
    """Point `current` at `target` (a v<version> folder beside it): symlink made beside it, then renamed over it."""
    tmp = folder / f".{CURRENT}.{os.getpid()}.tmp"
    with contextlib.suppress(FileNotFoundError):
        tmp.unlink()
    os.symlink(target, tmp)
    os.replace(tmp, folder / CURRENT)
    _fsync_dir(folder)


def current_bundle(cache: str | Path, name: str) -> Path:
    """The bundle folder the robot should run for `name` (what `current` points to), for `Session.open`."""
    name, _ = parse_ref(name)
    folder = Path(cache) / name
    version = current_version(folder)
    if version is None:
        raise FetchError(str(folder / CURRENT), f"no fetched bundle of {name}; run coreach-robot fetch {name}")
    return folder / version


def _clean_partials(folder: Path) -> None:
    for p in folder.glob(PARTIAL + "*"):
        shutil.rmtree(p, ignore_errors=True)


def _cached_ok(bundle: Path, manifest_sha: str) -> bool:
    if not bundle.is_dir():
        return False
    try:
        verify_bundle(bundle)
    except BundleError:
        return False
    return sha256_file(bundle / MANIFEST) == manifest_sha


# ------------------------------------------------------------------------------------------ fetch
@dataclass
class Fetched:
    """What a fetch did: the version now current, where, what it replaced, and what the release recorded."""

    name: str
    alias: str
    version: str
    bundle: Path
    previous: str | None  # the version current pointed to before, or None
    downloaded: bool  # False: the version was already in the cache (e.g. a rollback)
    record: dict[str, Any]
    manifest: Manifest

    def as_json(self) -> dict[str, Any]:
        return {"name": self.name, "alias": self.alias, "version": self.version, "bundle": str(self.bundle),
                "current": str(self.bundle.parent / CURRENT), "previous": self.previous,
                "downloaded": self.downloaded, **{k: self.record[k] for k in (
                    "training_run", "release_run", "manifest_sha256", "bundle_uri", "gate", "server", "fetched_at")},
                "gate_relaxed": self.record.get("gate_relaxed")}


def _published(mv: ModelVersion) -> tuple[str, str]:
    """The version's bundle URI and manifest hash; FetchError if it is not a fully published release."""
    where = f"model {mv.name} version {mv.version}"
    if mv.tags.get(TAG_GATE_PASSED) != "true":
        raise FetchError(where, f"is not fully published (no {TAG_GATE_PASSED}=true tag): not a release that "
                                "passed the gate, or its release did not finish")  # fmt: skip
    uri = mv.tags.get(TAG_BUNDLE_URI, "").strip()
    if not uri:
        raise FetchError(where, f"has no bundle in the tracking store (no {TAG_BUNDLE_URI} tag): released before "
                                "bundles were stored there; release it again with coreach release")  # fmt: skip
    digest = mv.tags.get(TAG_MANIFEST, "")
    if not HEX64.match(digest):
        raise FetchError(where, f"tag {TAG_MANIFEST} is {digest[:80]!r}, expected a lowercase hex sha256")
    return uri, digest


def _download(source, staging: Path, uri: str, manifest_sha: str, where: str) -> None:
    """manifest.json, checked against the registry's hash, then every file it lists, each checked on arrival."""
    raw = source.read(MANIFEST)
    got = sha256_bytes(raw)
    if got != manifest_sha:
        raise RefusedBundle(f"{uri}/{MANIFEST}", f"sha256 {got[:16]}... differs from the registry's {TAG_MANIFEST} "
                                                 f"{manifest_sha[:16]}... of {where}: the manifest in the store is "
                                                 "not the one released")  # fmt: skip
    try:
        files = json.loads(raw.decode("utf-8")).get("files")
    except (UnicodeDecodeError, ValueError, AttributeError):
        files = None
    if not isinstance(files, dict) or not files:
        raise RefusedBundle(f"{uri}/{MANIFEST}", "has no 'files' mapping; not a bundle manifest")
    (staging / MANIFEST).write_bytes(raw)
    for fname, digest in files.items():
        dest = _check_name(staging, fname, f"{uri}/{MANIFEST}")  # a canonical path inside the folder
        dest.parent.mkdir(parents=True, exist_ok=True)
        got = source.download(fname, dest)
        if got != digest:
            raise RefusedBundle(f"{uri}/{fname}", f"sha256 {got[:16]}... differs from the manifest's "
                                                  f"{str(digest)[:16]}...: the file was changed in the store after "
                                                  "release")  # fmt: skip


def fetch(ref: str, server: str | None = None, cache: str | Path | None = None, timeout: float = 10.0) -> Fetched:
    """Resolve `ref` (NAME[@ALIAS], alias `fielded` by default), bring its bundle into the cache verified, and
    make it current. Raises FetchError / RefusedBundle (one line) with the cache's `current` unchanged."""
    name, alias = parse_ref(ref)
    client = StoreClient(server, timeout)
    root = Path(cache) if cache is not None else default_cache()
    folder = root / name
    mv = client.version_by_alias(name, alias)  # before touching the cache: an unknown model leaves no folder
    uri, manifest_sha = _published(mv)
    created = not folder.exists()
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise FetchError(f"cache {root}", f"cannot create {folder} ({exc.strerror})") from None
    try:
        return _fetch_into(folder, client, mv, alias, uri, manifest_sha)
    except _Busy:
        raise
    except BaseException:
        if created and current_version(folder) is None:  # the first fetch of this model failed: leave no trace
            shutil.rmtree(folder, ignore_errors=True)
        raise


def _fetch_into(folder: Path, client: StoreClient, mv: ModelVersion, alias: str, uri: str, manifest_sha: str) -> Fetched:
    name = mv.name
    with _locked(folder):
        _clean_partials(folder)
        where = f"model {name} version {mv.version}"
        target = folder / f"v{mv.version}"
        downloaded = not _cached_ok(target, manifest_sha)
        if downloaded:
            source = bundle_source(uri, client)
            staging = Path(tempfile.mkdtemp(prefix=f"{PARTIAL}v{mv.version}-", dir=folder))
            try:
                try:
                    _download(source, staging, uri, manifest_sha, where)
                    verify_bundle(staging)
                except BundleError as exc:  # a listed name leaving the folder, a malformed manifest, ...
                    raise RefusedBundle(uri, f"does not verify as a bundle: {exc.problem}") from None
                os.chmod(staging, 0o755)  # mkdtemp made it private; the robot's control program may be another user
                _fsync_dir(staging)
                if target.exists():  # a damaged copy from before: never the folder `current` may still use
                    shutil.move(str(target), str(Path(tempfile.mkdtemp(prefix=f"{PARTIAL}old-", dir=folder)) / "old"))
                os.rename(staging, target)
            finally:
                if staging.exists():
                    shutil.rmtree(staging, ignore_errors=True)
                _clean_partials(folder)
        manifest = verify_bundle(target)
        record = {
            "name": name, "alias": alias, "version": mv.version, "server": client.server, "bundle_uri": uri,
            "manifest_sha256": manifest_sha, "release_run": mv.tags.get(TAG_RELEASE_RUN, ""),
            "training_run": manifest.training_run_id, "registry_run": mv.run_id, "gate": _gate(mv, manifest),
            "gate_relaxed": mv.tags.get(TAG_GATE_RELAXED),
            "fetched_at": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        }  # fmt: skip
        _write_json(folder / f"v{mv.version}.json", record)
        previous = current_version(folder)
        switch_current(folder, target.name)
    return Fetched(name, alias, mv.version, target, previous[1:] if previous else None, downloaded, record, manifest)


def _gate(mv: ModelVersion, manifest: Manifest) -> dict[str, Any]:
    """The gate results the registry tag holds (compact), else the manifest's."""
    try:
        gate = json.loads(mv.tags.get(TAG_GATE, ""))
    except ValueError:
        gate = None
    return gate if isinstance(gate, dict) and gate else dict(manifest.gate)


# ------------------------------------------------------------------------------------------ status
def status(cache: str | Path | None = None, name: str | None = None) -> list[dict[str, Any]]:
    """Per model in the cache (or just `name`): the current version, whether it still verifies, the fetch record,
    and the other versions kept."""
    root = Path(cache) if cache is not None else default_cache()
    if name is not None:
        name, _ = parse_ref(name)
        if not (root / name).is_dir():
            raise FetchError(str(root / name), f"nothing fetched for {name} in this cache")
        names = [name]
    else:
        names = sorted(p.name for p in root.iterdir() if p.is_dir() and MODEL_NAME_RE.match(p.name)) if root.is_dir() else []
    rows = []
    for n in names:
        folder = root / n
        version = current_version(folder)
        row: dict[str, Any] = {"name": n, "current": version[1:] if version else None, "bundle": None,
                               "verified": None, "problem": None, "record": None,
                               "cached": sorted((p.name[1:] for p in folder.glob("v*") if p.is_dir()), key=_num)}
        if version:
            bundle = folder / version
            row["bundle"] = str(bundle)
            with contextlib.suppress(OSError, ValueError):
                row["record"] = json.loads((folder / f"{version}.json").read_text(encoding="utf-8"))
            try:
                verify_bundle(bundle)
                row["verified"] = True
            except BundleError as exc:
                row["verified"], row["problem"] = False, str(exc)
            released = row["record"].get("manifest_sha256") if isinstance(row["record"], dict) else None
            if row["verified"] and released and sha256_file(bundle / MANIFEST) != released:
                # every file matches its manifest, but the manifest is not the one the registry named at fetch
                row["verified"] = False
                row["problem"] = (f"{bundle / MANIFEST}: sha256 differs from the fetch record's manifest_sha256 "
                                  f"{released[:16]}... (the registry's); the bundle was replaced after the fetch")
        rows.append(row)
    return rows


def _num(v: str) -> int:
    return int(v) if v.isdigit() else -1
