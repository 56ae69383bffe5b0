"""Finishing or rolling back publishes that an earlier process left unfinished (crash, SIGKILL, power cut).

The MLflow registry has no transactions, so publishing (coreach.release.publish) writes an intent first:
the release run, tagged `coreach.publish=pending` with its owner (host, pid, process start). Every later
write names that run (the model version's `coreach.release_run` tag, the staging folders' names), and the
version becomes usable only in its last step (tag `coreach.gate_passed=true`). So for any pending run whose
owner is gone there are two cases:
- its version is usable: everything else was written before, so the publish is finished (roll forward);
- otherwise nothing of it was usable yet: the version, its bundle folder and staging folders, the training
  run's release tag and finally the run itself are removed (roll back). The run goes last, so a crash during
  the roll-back leaves the intent for the next one to find.
Every `coreach release` settles first, and `coreach finish-releases` does it on demand; `coreach finish-releases
--leftovers` also removes what older versions of coreach left without an intent (unusable versions, RUNNING
release runs, stray folders).
"""

from __future__ import annotations

import os
import shutil
import socket
import tempfile
import time
from pathlib import Path
from typing import Callable

from mlflow.store.artifact.artifact_repository_registry import get_artifact_repository

from coreach.release.bundle_store import PARTIAL, releases_root
from coreach.release.registry_client import get_model
from coreach.runtime.registry_tags import (GATE_PASSED_ALIAS, MODEL_DESCRIPTION, TAG_CREATED_MODEL, TAG_GATE_PASSED,
                                           TAG_MODEL_NAME, TAG_OWNER, TAG_PUBLISH, TAG_RELEASE_RUN, TAG_ROOT,
                                           TAG_SOURCE_RUN, TAG_VERSION, release_tag)
# A publish takes seconds; one owned by another computer counts as abandoned after this long. On the
# owner's own computer the process table decides at once.
STALE_AFTER_S = 600.0

Say = Callable[[str], None]


def _start_ticks(pid: int) -> str | None:
    """Start time of process `pid` (clock ticks since boot; tells a reused pid apart), None if not running."""
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii") as f:
            return f.read().rsplit(")", 1)[1].split()[19]
    except (OSError, IndexError):
        return None


def owner() -> str:
    return f"{socket.gethostname()}:{os.getpid()}:{_start_ticks(os.getpid()) or '-'}"


def owner_alive(run) -> bool:
    host, _, rest = (run.data.tags.get(TAG_OWNER) or "").partition(":")
    pid, _, ticks = rest.partition(":")
    if host != socket.gethostname() or not pid.isdigit():
        return (time.time() - run.info.start_time / 1000) < STALE_AFTER_S
    if Path("/proc/self/stat").exists():
        return _start_ticks(int(pid)) == ticks
    return process_running(int(pid))


def process_running(pid: int) -> bool:
    """Whether process `pid` exists on this computer (a release's owner, a study session's server)."""
    if Path("/proc/self/stat").exists():
        return _start_ticks(pid) is not None
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _all_experiments(client) -> list[str]:
    return [e.experiment_id for e in client.search_experiments()]


def pending_runs(client) -> list:
    """Release runs whose publish has neither finished nor been rolled back."""
    exps = _all_experiments(client)
    return list(client.search_runs(exps, f"tags.`{TAG_PUBLISH}` = 'pending'")) if exps else []


def versions_of(client, run) -> list:
    name = run.data.tags.get(TAG_MODEL_NAME)
    if not name:
        return []
    return [mv for mv in client.search_model_versions(f"name='{name}'")
            if (mv.tags or {}).get(TAG_RELEASE_RUN) == run.info.run_id]  # fmt: skip


def settle_run(client, run, say: Say) -> str:
    """Finish (`finished`) or roll back (`rolled back`) the publish of release run `run`."""
    rid = run.info.run_id
    versions = versions_of(client, run)
    usable = [mv for mv in versions if (mv.tags or {}).get(TAG_GATE_PASSED) == "true"]
    name = run.data.tags.get(TAG_MODEL_NAME, "?")
    if usable:
        mv = usable[0]
        _point_gate_alias(client, name, str(mv.version))
        _record_on_training_run(client, run.data.tags.get(TAG_SOURCE_RUN), name, str(mv.version))
        client.set_tag(rid, TAG_PUBLISH, "done")
        client.set_terminated(rid, "FINISHED")
        say(f"finished the publish of {name} version {mv.version} (release run {rid})")
        return "finished"
    for mv in versions:
        client.delete_model_version(name, str(mv.version))
        say(f"removed model version {name} {mv.version}: its publish did not finish (release run {rid})")
    _remove_local(run, [str(mv.version) for mv in versions], say)
    source = run.data.tags.get(TAG_SOURCE_RUN)
    if source:  # written only once usable (so not by this publish), unless an older coreach wrote it earlier
        try:
            if client.get_run(source).data.tags.get(release_tag(name)) in {str(mv.version) for mv in versions}:
                client.delete_tag(source, release_tag(name))
        except Exception:  # noqa: BLE001 - the training run may be gone; nothing of ours to undo there
            pass
    if run.data.tags.get(TAG_CREATED_MODEL) == "true":
        model_versions = client.search_model_versions(f"name='{name}'") if get_model(client, name) else None
        if model_versions is not None and not model_versions:
            client.delete_registered_model(name)
            say(f"removed registered model {name}: the unfinished publish had created it and it holds no version")
    _remove_artifacts(client, run, say)
    client.set_tag(rid, TAG_PUBLISH, "rolled-back")
    client.set_terminated(rid, "FAILED")
    client.delete_run(rid)
    say(f"removed release run {rid} of {name}: its publish did not finish")
    return "rolled back"


def _remove_artifacts(client, run, say: Say) -> None:
    """The bundle files an unfinished publish uploaded (best effort: `mlflow gc` removes what is left)."""
    try:
        repo = get_artifact_repository(run.info.artifact_uri, tracking_uri=client.tracking_uri)
        if repo.list_artifacts():
            repo.delete_artifacts()
            say(f"removed the artifacts of release run {run.info.run_id}: an unfinished upload")
    except Exception as exc:  # noqa: BLE001 - the roll-back goes on; the run is deleted either way
        say(f"could not remove the artifacts of release run {run.info.run_id} ({str(exc).splitlines()[0][:120]}); "
            "`mlflow gc` removes them with the deleted run")


def _record_on_training_run(client, source: str | None, name: str, version: str) -> None:
    """The training run's release tag names the newest version released from it."""
    if not source:
        return
    try:
        current = client.get_run(source).data.tags.get(release_tag(name))
        if current is None or not current.isdigit() or int(current) < int(version):
            client.set_tag(source, release_tag(name), version)
    except Exception:  # noqa: BLE001 - the training run may be gone; the release itself is complete
        pass


def _point_gate_alias(client, name: str, version: str) -> None:
    """`gate-passed` names the newest usable version."""
    model = get_model(client, name)
    current = (model.aliases or {}).get(GATE_PASSED_ALIAS) if model else None
    if current is None or int(current) < int(version):
        client.set_registered_model_alias(name, GATE_PASSED_ALIAS, version)


def _remove_local(run, versions: list[str], say: Say) -> None:
    """Bundle and staging folders of `run` in its releases folder, when that folder is on this computer."""
    root = run.data.tags.get(TAG_ROOT)
    name = run.data.tags.get(TAG_MODEL_NAME)
    if not root or not name or not (Path(root) / name).is_dir():
        return
    folder = Path(root) / name
    marker = f".{run.info.run_id[:12]}."
    doomed = [folder / f"v{v}" for v in versions if (folder / f"v{v}").exists()]
    doomed += [p for p in folder.glob(f".v*{marker}*{PARTIAL}")]
    for path in doomed:
        shutil.rmtree(path, ignore_errors=True)
        say(f"removed {path}: part of an unfinished publish")
    _remove_if_empty(folder, say)


def _remove_if_empty(folder: Path, say: Say) -> None:
    if folder.is_dir() and not any(folder.iterdir()):
        folder.rmdir()
        if folder.parent.is_dir() and not any(folder.parent.iterdir()):
            folder.parent.rmdir()


TMP_PREFIX = "coreach-release-"  # + pid + "-": the gate's scratch folder in the system temp folder


def scratch_prefix() -> str:
    return f"{TMP_PREFIX}{os.getpid()}-"


def _clean_scratch(say: Say) -> None:
    """Scratch folders of release processes on this computer that no longer run (killed mid-gate)."""
    for path in Path(tempfile.gettempdir()).glob(f"{TMP_PREFIX}*-*"):
        pid = path.name[len(TMP_PREFIX):].split("-", 1)[0]
        if pid.isdigit() and path.is_dir() and not process_running(int(pid)):
            shutil.rmtree(path, ignore_errors=True)
            say(f"removed {path}: scratch folder of a release that was killed")


def settle(client, say: Say) -> list[str]:
    """Settle every pending publish whose owner is gone; the outcomes, one per run."""
    _clean_scratch(say)
    return [settle_run(client, run, say) for run in pending_runs(client) if not owner_alive(run)]


def _made_by_coreach(client, model, mv) -> bool:
    """A model version coreach created: it carries coreach tags, or (releases before crash-safe publishing
    tagged nothing until the end) it sits in a registered model coreach created and comes from a coreach run.
    Anything else (registered by hand or by another tool) is not ours to remove."""
    if any(key.startswith("coreach.") for key in (mv.tags or {})):
        return True
    if (model.description or "") != MODEL_DESCRIPTION or not mv.run_id:
        return False
    try:
        return "coreach.stage" in client.get_run(mv.run_id).data.tags
    except Exception:  # noqa: BLE001 - no such run: nothing says coreach made it
        return False


def repair(client, root: str | os.PathLike | None, say: Say) -> None:
    """`settle`, then what no intent covers: versions never made usable, RUNNING release runs, stray folders.

    Only what coreach made is touched (see _made_by_coreach): versions registered by hand or by another tool
    stay, and a registered model is removed only when this repair removed its last version.
    """
    settle(client, say)
    live_runs = pending_runs(client)  # still being published by a live process
    live = {run.info.run_id for run in live_runs}
    busy: dict[str, set[str]] = {}  # model name -> version numbers a live publish is writing
    for run in live_runs:
        name, version = run.data.tags.get(TAG_MODEL_NAME), run.data.tags.get(TAG_VERSION)
        if name and version:
            busy.setdefault(name, set()).add(version)
    usable: dict[str, set[str]] = {}
    for model in client.search_registered_models():
        removed = False
        for mv in client.search_model_versions(f"name='{model.name}'"):
            tags = mv.tags or {}
            if tags.get(TAG_GATE_PASSED) == "true":
                usable.setdefault(model.name, set()).add(str(mv.version))
            elif _made_by_coreach(client, model, mv) and tags.get(TAG_RELEASE_RUN) not in live:
                client.delete_model_version(model.name, str(mv.version))
                removed = True
                say(f"removed model version {model.name} {mv.version}: it never passed the release gate")
        if removed and not client.search_model_versions(f"name='{model.name}'"):
            client.delete_registered_model(model.name)
            say(f"removed registered model {model.name}: this repair removed its last version")
    exps = _all_experiments(client)
    for run in client.search_runs(exps, "tags.`coreach.stage` = 'release' and attributes.status = 'RUNNING'") if exps else []:
        if run.info.run_id not in live:
            client.set_terminated(run.info.run_id, "FAILED")
            client.delete_run(run.info.run_id)
            say(f"removed release run {run.info.run_id}: left RUNNING by an earlier release")
    _repair_folders(releases_root(root), usable, busy, live, say)


def _repair_folders(root: Path, usable: dict[str, set[str]], busy: dict[str, set[str]], live: set[str],
                    say: Say) -> None:
    if not root.is_dir():
        return
    markers = {f".{rid[:12]}." for rid in live}
    for folder in sorted(p for p in root.iterdir() if p.is_dir()):
        keep = usable.get(folder.name, set()) | busy.get(folder.name, set())
        for path in sorted(folder.iterdir()):
            staging = path.name.endswith(PARTIAL) and not any(m in path.name for m in markers)
            orphan = path.name.startswith("v") and path.name[1:] not in keep
            if path.is_dir() and (staging or orphan):
                shutil.rmtree(path, ignore_errors=True)
                why = "a staging folder of no running release" if staging else "its model version is not released in this store"
                say(f"removed {path}: {why}")
        _remove_if_empty(folder, say)


__all__ = ["STALE_AFTER_S", "scratch_prefix", "owner", "owner_alive", "pending_runs", "settle_run", "settle", "repair"]
