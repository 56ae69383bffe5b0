"""Registry side of releases: model versions that passed the release gate, fielding (`coreach promote`) and listing (`coreach releases`).

Names of our own: a released version carries the tag coreach.gate_passed=true and, while it is the newest
release, the alias `gate-passed`; the version on the robots carries the alias `fielded`. The fielding history
is a JSON list of {version, at} in the registered model's tag coreach.fielded_history, newest last, so
`coreach promote NAME --back` can restore the version fielded before the current one.
"""

from __future__ import annotations

import datetime as _dt
import json
import re
import sys
from pathlib import Path

from coreach.errors import ConfigError, CoreachError
from coreach.runtime.bundle import MANIFEST, BundleError, sha256_file, verify_bundle

GATE_PASSED_ALIAS = "gate-passed"
FIELDED_ALIAS = "fielded"
TAG_GATE_PASSED = "coreach.gate_passed"
TAG_BUNDLE = "coreach.bundle"
TAG_MANIFEST = "coreach.manifest_sha256"
TAG_GATE = "coreach.gate"
TAG_RELEASE_RUN = "coreach.release_run"
TAG_HISTORY = "coreach.fielded_history"
HISTORY_KEEP = 40  # entries kept in the history tag (tag values are limited to a few thousand characters)
NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,99}$")  # also a folder name under releases/


def check_name(name) -> str:
    if not isinstance(name, str) or not NAME_RE.match(name) or ".." in name:
        raise ConfigError("option name", f"expected a model name of letters, digits, '-', '_' or '.' (it is also a "
                                         f"folder name), got {name!r}")  # fmt: skip
    return name


def client_for(uri: str | None = None):
    from mlflow.tracking import MlflowClient

    from coreach.tracking import resolve_uri

    return MlflowClient(tracking_uri=resolve_uri(uri))


def _missing(exc: Exception) -> bool:
    from mlflow.exceptions import MlflowException

    return isinstance(exc, MlflowException) and "RESOURCE_DOES_NOT_EXIST" in str(getattr(exc, "error_code", ""))


def get_model(client, name: str):
    """The registered model `name`, or None."""
    from mlflow.exceptions import MlflowException

    try:
        return client.get_registered_model(name)
    except MlflowException as exc:
        if _missing(exc):
            return None
        raise


def get_version(client, name: str, version: str):
    from mlflow.exceptions import MlflowException

    try:
        return client.get_model_version(name, str(version))
    except MlflowException as exc:
        if _missing(exc):
            raise ConfigError(f"model {name}", f"has no version {version!r}; see coreach releases {name}") from None
        raise


# ------------------------------------------------------------------------------------- release side
def register(client, name: str, run_id: str, description: str) -> tuple[object, bool]:
    """A new model version of `name` from the training run's decoder artifact; (version, model was created)."""
    created = get_model(client, name) is None
    if created:
        client.create_registered_model(name, description="coreach latent-action decoders that passed the release "
                                                          "gate")  # fmt: skip
    version = client.create_model_version(name, source=f"runs:/{run_id}/decoder", run_id=run_id,
                                          description=description)  # fmt: skip
    return version, created


def mark_gate_passed(client, name: str, version: str, bundle: Path, gate: dict, release_run: str) -> None:
    """Tags that tie the version to its bundle (path and manifest hash), then the gate-passed alias."""
    tags = {
        TAG_BUNDLE: str(Path(bundle).resolve()),
        TAG_MANIFEST: sha256_file(Path(bundle) / MANIFEST),
        TAG_GATE: json.dumps(_compact(gate), separators=(",", ":")),
        TAG_RELEASE_RUN: release_run,
        TAG_GATE_PASSED: "true",  # last: a version has passed the gate only once everything above is in place
    }
    for k, v in tags.items():
        client.set_model_version_tag(name, version, k, v)
    client.set_registered_model_alias(name, GATE_PASSED_ALIAS, version)


def unregister(client, name: str, version: str | None, created_model: bool) -> None:
    """Undo `register` after a failed release (best effort: the original error is what the user needs)."""
    try:
        if created_model:
            client.delete_registered_model(name)
        elif version is not None:
            client.delete_model_version(name, version)
    except Exception as exc:  # noqa: BLE001 - reported, not raised over the first failure
        print(f"coreach: warning: could not remove model version {name}/{version}: {exc}", file=sys.stderr)


def _compact(gate: dict) -> dict:
    """Gate results small enough for a tag: value, threshold, passed."""
    return {k: {"value": v["value"], "threshold": v["threshold"], "op": v["op"], "passed": v["passed"]}
            for k, v in gate.items()}  # fmt: skip


# ------------------------------------------------------------------------------------- fielding
def check_fieldable(client, name: str, version: str) -> dict:
    """Refuse (CoreachError) unless `version` passed the release gate and its bundle verifies and is the one registered."""
    mv = get_version(client, name, version)
    where = f"model {name} version {version}"
    tags = dict(mv.tags or {})
    if tags.get(TAG_GATE_PASSED) != "true":
        raise CoreachError(where, f"has not passed the release gate (no {TAG_GATE_PASSED}=true tag); only versions made by coreach release "
                                  "can be fielded")  # fmt: skip
    bundle = tags.get(TAG_BUNDLE)
    if not bundle:
        raise CoreachError(where, f"has no {TAG_BUNDLE} tag naming its bundle folder")
    try:
        manifest = verify_bundle(bundle)
    except BundleError as exc:
        raise CoreachError(where, f"bundle does not verify ({exc}); not fielded") from None
    digest = sha256_file(Path(bundle) / MANIFEST)
    if digest != tags.get(TAG_MANIFEST):
        raise CoreachError(where, f"bundle {bundle} has a manifest other than the one released (sha256 {digest[:16]}"
                                  f"... vs {str(tags.get(TAG_MANIFEST))[:16]}...); not fielded")  # fmt: skip
    if mv.run_id and manifest.training_run_id != mv.run_id:
        raise CoreachError(where, f"bundle names training run {manifest.training_run_id}, the version {mv.run_id}")
    return {"version": str(mv.version), "bundle": bundle, "run_id": mv.run_id}


def _history(model) -> list[dict]:
    raw = (model.tags or {}).get(TAG_HISTORY, "[]")
    try:
        items = json.loads(raw)
    except json.JSONDecodeError:
        raise CoreachError(f"model {model.name} tag {TAG_HISTORY}", "is not JSON; fix or delete the tag") from None
    return [dict(i) for i in items if isinstance(i, dict) and "version" in i]


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def promote(client, name: str, version: str) -> dict:
    """Field `version` of `name` (alias `fielded`) after `check_fieldable`; push it on the history."""
    model = get_model(client, name)
    if model is None:
        raise ConfigError(f"model {name}", "no such registered model; see coreach releases")
    info = check_fieldable(client, name, str(version))
    history = _history(model)
    current = (model.aliases or {}).get(FIELDED_ALIAS)
    if current is not None and (not history or history[-1]["version"] != str(current)):
        history.append({"version": str(current), "at": None})  # fielded by hand: keep it restorable
    previous = history[-1]["version"] if history else None
    if previous != info["version"]:
        history.append({"version": info["version"], "at": _now()})
    client.set_registered_model_alias(name, FIELDED_ALIAS, info["version"])
    client.set_registered_model_tag(name, TAG_HISTORY, json.dumps(history[-HISTORY_KEEP:], separators=(",", ":")))
    return {"name": name, "fielded": info["version"], "previous": previous, "bundle": info["bundle"],
            "history": [h["version"] for h in history[-HISTORY_KEEP:]]}  # fmt: skip


def promote_back(client, name: str) -> dict:
    """Restore the version fielded before the current one (it must still pass `check_fieldable`)."""
    model = get_model(client, name)
    if model is None:
        raise ConfigError(f"model {name}", "no such registered model; see coreach releases")
    history = _history(model)
    if len(history) < 2:
        raise CoreachError(f"model {name}", f"no earlier fielded version to go back to (history: "
                                            f"{[h['version'] for h in history]})")  # fmt: skip
    current, earlier = history[-1]["version"], history[-2]["version"]
    info = check_fieldable(client, name, earlier)
    client.set_registered_model_alias(name, FIELDED_ALIAS, earlier)
    history = history[:-1]
    client.set_registered_model_tag(name, TAG_HISTORY, json.dumps(history, separators=(",", ":")))
    return {"name": name, "fielded": earlier, "previous": current, "bundle": info["bundle"],
            "history": [h["version"] for h in history]}  # fmt: skip


# ------------------------------------------------------------------------------------- listing
def _bundle_status(tags: dict) -> str:
    bundle = tags.get(TAG_BUNDLE)
    if not bundle:
        return "none"
    try:
        verify_bundle(bundle)
    except BundleError as exc:
        return f"FAILS: {exc.problem[:60]}"
    return "ok" if sha256_file(Path(bundle) / MANIFEST) == tags.get(TAG_MANIFEST) else "FAILS: manifest replaced"


def list_releases(client, name: str | None = None) -> list[dict]:
    """Every version of `name` (or of every registered model): aliases, gate-passed tag, gates, bundle status."""
    models = [get_model(client, name)] if name else list(client.search_registered_models())
    if name and models[0] is None:
        raise ConfigError(f"model {name}", "no such registered model")
    rows = []
    for model in models:
        by_version: dict[str, list[str]] = {}
        for alias, v in (model.aliases or {}).items():
            by_version.setdefault(str(v), []).append(alias)
        for mv in client.search_model_versions(f"name='{model.name}'"):
            tags = dict(mv.tags or {})
            try:
                gate = json.loads(tags.get(TAG_GATE, "{}"))
            except json.JSONDecodeError:
                gate = {}
            rows.append({
                "name": model.name,
                "version": str(mv.version),
                "aliases": sorted(by_version.get(str(mv.version), [])),
                "gate_passed": tags.get(TAG_GATE_PASSED) == "true",
                "gates_passed": sum(bool(g.get("passed")) for g in gate.values()),
                "gates": gate,
                "bundle": tags.get(TAG_BUNDLE),
                "bundle_status": _bundle_status(tags),
                "run_id": mv.run_id,
                "created": _dt.datetime.fromtimestamp(mv.creation_timestamp / 1000, _dt.timezone.utc)
                .isoformat(timespec="seconds"),
            })  # fmt: skip
    return sorted(rows, key=lambda r: (r["name"], -int(r["version"])))


# ------------------------------------------------------------------------------------- commands
PROMOTE_USAGE = "coreach promote NAME VERSION | coreach promote NAME --back"


def promote_command(args: list[str], as_json: bool) -> int:
    back = "--back" in args
    rest = [a for a in args if a != "--back"]
    if any(a.startswith("-") for a in rest) or len(rest) != (1 if back else 2):
        raise ConfigError("coreach promote", f"usage: {PROMOTE_USAGE}; got {' '.join(args) or 'no arguments'}")
    name = check_name(rest[0])
    client = client_for()
    result = promote_back(client, name) if back else promote(client, name, rest[1])
    if as_json:
        print(json.dumps(result, indent=2))
    else:
        verb = "restored" if back else "fielded"
        was = f" (was {result['previous']})" if result["previous"] else ""
        print(f"{name}: version {result['fielded']} {verb} as @{FIELDED_ALIAS}{was}; bundle {result['bundle']}")
        print(f"fielding history (oldest first): {', '.join(result['history'])}")
    return 0


def releases_command(args: list[str], as_json: bool) -> int:
    rest = [a for a in args if not a.startswith("-")]
    if len(rest) > 1 or len(rest) != len(args):
        raise ConfigError("coreach releases", f"usage: coreach releases [NAME] [--json]; got {' '.join(args)}")
    rows = list_releases(client_for(), check_name(rest[0]) if rest else None)
    if as_json:
        print(json.dumps(rows, indent=2))
        return 0
    from rich.console import Console
    from rich.table import Table

    table = Table(title="released decoders (coreach release; field with coreach promote NAME VERSION)")
    for col in ("model", "version", "aliases", "gate passed", "gates", "key values", "bundle", "created"):
        table.add_column(col, no_wrap=col in ("model", "version", "created"))
    for r in rows:
        g = r["gates"]
        key = "; ".join(f"{k} {v['value']:.3g}" for k, v in g.items()
                        if k.startswith(("success", "recovery", "latency")) and v["value"] is not None)  # fmt: skip
        table.add_row(r["name"], r["version"], ", ".join("@" + a for a in r["aliases"]) or "-",
                      "yes" if r["gate_passed"] else "no", f"{r['gates_passed']}/{len(g)} passed", key or "-",
                      f"{r['bundle'] or '-'} ({r['bundle_status']})", r["created"])  # fmt: skip
    Console(width=None if sys.stdout.isatty() else 200).print(table)
    if not rows:
        print("no registered models yet; release one with: coreach release run=<training run id>")
    return 0


__all__ = ["GATE_PASSED_ALIAS", "FIELDED_ALIAS", "register", "mark_gate_passed", "unregister", "promote", "promote_back",
           "list_releases", "check_fieldable", "promote_command", "releases_command", "check_name", "client_for"]
