"""The release bundle in the tracking store: uploaded whole to the release run, and cached locally from there.

The store's copy is the release; a local `releases/<name>/v<version>/` folder is a cache of it. Every read
of the cache (promote, listing) checks it against the registry's manifest hash, and a missing cache is
downloaded from the store, verified in a staging folder beside it and renamed into place.
"""

from __future__ import annotations

import os
import re
import shutil
import tempfile
from pathlib import Path

from coreach.errors import CoreachError
from coreach.release.registry_client import client_for, get_model, get_version
from coreach.runtime.bundle import MANIFEST, BundleError, sha256_file, verify_bundle
from coreach.runtime.registry_tags import MODEL_NAME_RE, TAG_BUNDLE_URI, TAG_GATE_PASSED, TAG_MANIFEST, TAG_RELEASE_RUN

BUNDLE_ARTIFACT = "bundle"  # artifact path of the bundle inside its release run
PARTIAL = ".partial"  # suffix of every staging folder under a releases folder


def releases_root(configured: str | os.PathLike | None = None) -> Path:
    """The local releases folder: the option if given, else $COREACH_RELEASES_DIR, else ./releases."""
    return Path(configured or os.environ.get("COREACH_RELEASES_DIR") or "releases").expanduser()


def staging_prefix(version: str, release_run: str) -> str:
    """Name prefix of a staging folder, so a later clean-up can tell which release it belonged to."""
    return f".v{version}.{release_run[:12]}."


def bundle_uri(client, run_id: str) -> str:
    """Where the bundle of release run `run_id` lives (before or after the upload)."""
    return client.get_run(run_id).info.artifact_uri.rstrip("/") + "/" + BUNDLE_ARTIFACT


def upload(client, run_id: str, folder: Path) -> None:
    """Every file of the (verified) bundle folder, under the release run's `bundle/` artifact path."""
    client.log_artifacts(run_id, str(folder), BUNDLE_ARTIFACT)


def cached(client, mv, root: Path) -> Path:
    """The verified local copy of model version `mv`'s bundle, downloaded from the store when missing.

    Refuses (CoreachError) a version without a bundle in the store, a store copy that does not verify or
    whose manifest is not the one registered, and a cached copy that differs from the store's.
    """
    where = f"model {mv.name} version {mv.version}"
    tags = dict(mv.tags or {})
    expected = tags.get(TAG_MANIFEST)
    run_id = tags.get(TAG_RELEASE_RUN)
    if not tags.get(TAG_BUNDLE_URI) or not expected or not run_id:
        raise CoreachError(where, f"has no bundle in the tracking store (no {TAG_BUNDLE_URI} tag): released before "
                                  "bundles were stored, or not released by coreach release; release it again")  # fmt: skip
    folder = root / mv.name / f"v{mv.version}"
    if folder.is_dir():
        _check(folder, expected, f"{where}: cached copy {folder}",
               "; it is only a cache of the tracking store: delete the folder and it is downloaded again")
        return folder
    folder.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=staging_prefix(str(mv.version), run_id) + "fetch.", suffix=PARTIAL,
                                dir=folder.parent))  # fmt: skip
    try:
        try:
            got = Path(client.download_artifacts(run_id, BUNDLE_ARTIFACT, str(tmp)))
        except Exception as exc:  # noqa: BLE001 - the store's own words, in one line
            raise CoreachError(where, f"could not download its bundle from {tags[TAG_BUNDLE_URI]}: "
                                      f"{str(exc).splitlines()[0][:200]}") from None  # fmt: skip
        _check(got, expected, f"{where}: bundle in the tracking store", "; not used")
        os.chmod(got, 0o755)
        if folder.exists():
            raise CoreachError(str(folder), "appeared while the bundle was being downloaded; not overwritten")
        os.rename(got, folder)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return folder


_REF = re.compile(r"^(?:models:/)?(?P<name>" + MODEL_NAME_RE.pattern.strip("^$") +
                  r")(?:@(?P<alias>[A-Za-z0-9_-]+)|/(?P<version>\d+))$")  # fmt: skip


def bundle_folder(ref: str, where: str = "option bundle", uri: str | None = None) -> Path:
    """A bundle folder from `ref`: an existing folder, or a released version in the tracking store `uri`
    (None: coreach.tracking.resolve_uri's default) named as NAME@ALIAS or NAME/VERSION (also with a models:/
    prefix), verified and cached under releases/."""
    folder = Path(str(ref)).expanduser()
    if folder.is_dir():
        return folder
    m = _REF.match(str(ref))
    if not m or ".." in m["name"]:
        raise CoreachError(where, f"{ref!r} is neither a bundle folder nor a released model as NAME@ALIAS or "
                                  "NAME/VERSION (e.g. bedside-shelf-decoder@fielded)")  # fmt: skip
    client = client_for(uri)
    model = get_model(client, m["name"])
    if model is None:
        raise CoreachError(where, f"no registered model {m['name']!r} in the tracking store; see coreach bundles")
    if m["alias"]:
        aliases = dict(model.aliases or {})
        if m["alias"] not in aliases:
            raise CoreachError(where, f"model {m['name']} has no alias @{m['alias']} (it has "
                                      f"{', '.join('@' + a for a in sorted(aliases)) or 'none'})")  # fmt: skip
        mv = get_version(client, m["name"], str(aliases[m["alias"]]))
    else:
        mv = get_version(client, m["name"], m["version"])
    if (mv.tags or {}).get(TAG_GATE_PASSED) != "true":
        raise CoreachError(where, f"model {m['name']} version {mv.version} is not a finished release (no "
                                  f"{TAG_GATE_PASSED}=true)")  # fmt: skip
    return cached(client, mv, releases_root())


def _check(folder: Path, expected: str, where: str, advice: str) -> None:
    try:
        verify_bundle(folder)
    except BundleError as exc:
        raise CoreachError(where, f"does not verify ({exc}){advice}") from None
    digest = sha256_file(folder / MANIFEST)
    if digest != expected:
        raise CoreachError(where, f"has a manifest other than the one released (sha256 {digest[:16]}... vs "
                                  f"{expected[:16]}...){advice}")  # fmt: skip


__all__ = ["BUNDLE_ARTIFACT", "PARTIAL", "bundle_folder", "releases_root", "staging_prefix",
           "bundle_uri", "upload", "cached"]
