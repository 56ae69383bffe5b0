"""Registry side of releases: fielding (`coreach promote`, `coreach rollback`), listing (`coreach bundles`) and
finishing interrupted publishes (`coreach finish-releases`).

Names of our own: a released version carries the tag coreach.gate_passed=true and, while it is the newest
release, the alias `gate-passed`; the version on the robots carries the alias `fielded`. The fielding history
is a JSON list of {version, at} in the registered model's tag coreach.fielded_history, newest last, so
`coreach rollback NAME` can restore the version fielded before the current one.
"""

from __future__ import annotations

import datetime as _dt
import json
import sys
from pathlib import Path

from rich.console import Console
from rich.table import Table

from coreach.errors import ConfigError, CoreachError
from coreach.release.bundle_store import cached, releases_root
from coreach.release.registry_client import client_for, get_model, get_version
from coreach.release.settle import owner_alive, pending_runs, repair, settle
from coreach.runtime.bundle import MANIFEST, BundleError, sha256_file, verify_bundle
from coreach.runtime.cautions import cautions
from coreach.runtime.model_card import relaxed_warning
from coreach.runtime.registry_tags import (FIELDED_ALIAS, GATE_PASSED_ALIAS, MODEL_NAME_RE, TAG_BUNDLE_URI,
                                           TAG_GATE, TAG_GATE_PASSED, TAG_GATE_RELAXED, TAG_HISTORY, TAG_MANIFEST,
                                           TAG_RELEASE_RUN, TAG_SOURCE_RUN)

HISTORY_KEEP = 40  # entries kept in the history tag (tag values are limited to a few thousand characters)


def check_name(name) -> str:
    if not isinstance(name, str) or not MODEL_NAME_RE.match(name) or ".." in name:
        raise ConfigError("option name", f"expected a model name of letters, digits, '-', '_' or '.' (it is also a "
                                         f"folder name), got {name!r}")  # fmt: skip
    return name


def compact_gate(gate: dict) -> dict:
    """Gate results small enough for a tag: value, threshold, passed."""
    return {k: {"value": v["value"], "threshold": v["threshold"], "op": v["op"], "passed": v["passed"]}
            for k, v in gate.items()}  # fmt: skip


# ------------------------------------------------------------------------------------- fielding
def check_fieldable(client, name: str, version: str, root: Path | None = None) -> dict:
    """Refuse (CoreachError) unless `version` passed the release gate and its bundle, from the store or the
    local cache under `root`, verifies and is the one registered."""
    mv = get_version(client, name, version)
    where = f"model {name} version {version}"
    tags = dict(mv.tags or {})
    if tags.get(TAG_GATE_PASSED) != "true":
        raise CoreachError(where, f"has not passed the release gate (no {TAG_GATE_PASSED}=true tag); only versions made by coreach release "
                                  "can be fielded")  # fmt: skip
    folder = cached(client, mv, releases_root(root))
    manifest = verify_bundle(folder)
    source = client.get_run(tags[TAG_RELEASE_RUN]).data.tags.get(TAG_SOURCE_RUN)
    if source and manifest.training_run_id != source:
        raise CoreachError(where, f"bundle names training run {manifest.training_run_id}, its release run names {source}")
    return {"version": str(mv.version), "bundle": str(folder.resolve()), "bundle_uri": tags[TAG_BUNDLE_URI],
            "run_id": source, "gate_relaxed": tags.get(TAG_GATE_RELAXED)}  # fmt: skip


def _history(model) -> list[dict]:
    raw = (model.tags or {}).get(TAG_HISTORY, "[]")
    try:
        items = json.loads(raw)
    except json.JSONDecodeError:
        raise CoreachError(f"model {model.name} tag {TAG_HISTORY}", "is not JSON; fix or delete the tag") from None
    return [dict(i) for i in items if isinstance(i, dict) and "version" in i]


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def promote(client, name: str, version: str, root: Path | None = None) -> dict:
    """Field `version` of `name` (alias `fielded`) after `check_fieldable`; push it on the history."""
    model = get_model(client, name)
    if model is None:
        raise ConfigError(f"model {name}", "no such registered model; see coreach bundles")
    info = check_fieldable(client, name, str(version), root)
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
            "history": [h["version"] for h in history[-HISTORY_KEEP:]], "gate_relaxed": info["gate_relaxed"]}  # fmt: skip


def promote_back(client, name: str, root: Path | None = None) -> dict:
    """Restore the version fielded before the current one (it must still pass `check_fieldable`)."""
    model = get_model(client, name)
    if model is None:
        raise ConfigError(f"model {name}", "no such registered model; see coreach bundles")
    history = _history(model)
    if len(history) < 2:
        raise CoreachError(f"model {name}", f"no earlier fielded version to go back to (history: "
                                            f"{[h['version'] for h in history]})")  # fmt: skip
    current, earlier = history[-1]["version"], history[-2]["version"]
    info = check_fieldable(client, name, earlier, root)
    client.set_registered_model_alias(name, FIELDED_ALIAS, earlier)
    history = history[:-1]
    client.set_registered_model_tag(name, TAG_HISTORY, json.dumps(history, separators=(",", ":")))
    return {"name": name, "fielded": earlier, "previous": current, "bundle": info["bundle"],
            "history": [h["version"] for h in history], "gate_relaxed": info["gate_relaxed"]}  # fmt: skip


# ------------------------------------------------------------------------------------- listing
def _bundle_status(name: str, version: str, tags: dict, root: Path) -> tuple[str, str]:
    """Where the bundle is (local cache folder, else its place in the store) and whether it checks out."""
    folder = root / name / f"v{version}"
    if not folder.is_dir():
        return (tags.get(TAG_BUNDLE_URI) or "-", "in store" if tags.get(TAG_BUNDLE_URI) else "none")
    try:
        verify_bundle(folder)
    except BundleError as exc:
        return str(folder), f"FAILS: {exc.problem[:60]}"
    ok = sha256_file(folder / MANIFEST) == tags.get(TAG_MANIFEST)
    return str(folder), "ok" if ok else "FAILS: manifest replaced"


def list_releases(client, name: str | None = None, root: Path | None = None) -> list[dict]:
    """Every version of `name` (or of every registered model): aliases, gate-passed tag, gates, bundle status."""
    models = [get_model(client, name)] if name else list(client.search_registered_models())
    if name and models[0] is None:
        raise ConfigError(f"model {name}", "no such registered model")
    rows, root = [], releases_root(root)
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
            bundle, status = _bundle_status(model.name, str(mv.version), tags, root)
            rows.append({
                "name": model.name,
                "version": str(mv.version),
                "aliases": sorted(by_version.get(str(mv.version), [])),
                "gate_passed": tags.get(TAG_GATE_PASSED) == "true",
                "gates_passed": sum(bool(g.get("passed")) for g in gate.values()),
                "gates": gate,
                "bundle": bundle,
                "bundle_status": status,
                "release_run": tags.get(TAG_RELEASE_RUN),
                "gate_relaxed": tags.get(TAG_GATE_RELAXED),
                "created": _dt.datetime.fromtimestamp(mv.creation_timestamp / 1000, _dt.timezone.utc)
                .isoformat(timespec="seconds"),
            })  # fmt: skip
    return sorted(rows, key=lambda r: (r["name"], -int(r["version"])))


# ------------------------------------------------------------------------------------- commands
def _fielding_command(command: str, usage: str, args: list[str], count: int) -> list[str]:
    """promote's and rollback's positional arguments, or one line with the usage."""
    if any(a.startswith("-") for a in args) or len(args) != count:
        raise ConfigError(f"coreach {command}", f"usage: {usage}; got {' '.join(args) or 'no arguments'}")
    return args


def _print_fielded(command: str, result: dict, verb: str, as_json: bool) -> None:
    if as_json:
        # what is fielded reaches a robot: the JSON carries the cautions a person reading it must see
        print(json.dumps({**result, "cautions": cautions()}, indent=2))
    else:
        was = f" (was {result['previous']})" if result["previous"] else ""
        print(f"{result['name']}: version {result['fielded']} {verb} as @{FIELDED_ALIAS}{was}; bundle {result['bundle']}")
        print(f"fielding history (oldest first): {', '.join(result['history'])}")
    if result["gate_relaxed"]:
        print(f"coreach {command}: warning: version {result['fielded']} was {relaxed_warning(result['gate_relaxed'])}",
              file=sys.stderr)


def promote_command(args: list[str], as_json: bool) -> int:
    """`coreach promote NAME VERSION`: field a gate-passed version."""
    name, version = _fielding_command("promote", "coreach promote NAME VERSION", args, 2)
    result = promote(client_for(), check_name(name), version)
    _print_fielded("promote", result, "fielded", as_json)
    return 0


def rollback_command(args: list[str], as_json: bool) -> int:
    """`coreach rollback NAME`: field again the version fielded before the current one."""
    (name,) = _fielding_command("rollback", "coreach rollback NAME", args, 1)
    result = promote_back(client_for(), check_name(name))
    _print_fielded("rollback", result, "restored", as_json)
    return 0


def bundles_command(args: list[str], as_json: bool) -> int:
    """`coreach bundles [NAME]`: the registered versions; it reads only (the repair is finish-releases)."""
    if len(args) > 1 or any(a.startswith("-") for a in args):
        raise ConfigError("coreach bundles", f"usage: coreach bundles [NAME]; got {' '.join(args)}")
    client = client_for()
    rows = list_releases(client, check_name(args[0]) if args else None)
    # a half-published version shows as not gate-passed; say why, and what finishes it, without touching it
    stalled = [run for run in pending_runs(client) if not owner_alive(run)]
    if stalled:
        print(f"coreach bundles: {len(stalled)} release(s) were interrupted while publishing; coreach "
              "finish-releases finishes or removes them", file=sys.stderr)
    if as_json:
        print(json.dumps(rows, indent=2))
        return 0
    table = Table(title="released decoders (coreach release; field with coreach promote NAME VERSION)")
    for col in ("model", "version", "aliases", "gate passed", "gates", "key values", "bundle", "created"):
        table.add_column(col, no_wrap=col in ("model", "version", "created"))
    for r in rows:
        g = r["gates"]
        key = "; ".join(f"{k} {v['value']:.3g}" for k, v in g.items()
                        if k.startswith(("success", "recovery", "latency")) and v["value"] is not None)  # fmt: skip
        table.add_row(r["name"], r["version"], ", ".join("@" + a for a in r["aliases"]) or "-",
                      "yes" if r["gate_passed"] else "no",
                      f"{r['gates_passed']}/{len(g)} passed" + (" (RELAXED gates)" if r["gate_relaxed"] else ""),
                      key or "-",
                      f"{r['bundle'] or '-'} ({r['bundle_status']})", r["created"])  # fmt: skip
    Console(width=None if sys.stdout.isatty() else 200).print(table)
    if not rows:
        print("no registered models yet; release one with: coreach release run=<training run id>")
    return 0


def finish_releases_command(args: list[str], as_json: bool) -> int:
    """`coreach finish-releases [--leftovers]`: settle interrupted publishes (and older leftovers), saying what."""
    leftovers = "--leftovers" in args
    if [a for a in args if a != "--leftovers"]:
        raise ConfigError("coreach finish-releases", f"usage: coreach finish-releases [--leftovers]; got {' '.join(args)}")
    client = client_for()
    said: list[str] = []

    def say(line: str) -> None:
        said.append(line)
        if not as_json:
            print(line)

    if leftovers:
        repair(client, None, say)
    else:
        settle(client, say)
    if as_json:
        print(json.dumps({"leftovers": leftovers, "done": said}, indent=2))
    elif not said:
        print("nothing was half-done" + ("" if leftovers else " (--leftovers also looks for what older coreach left)"))
    return 0


__all__ = ["GATE_PASSED_ALIAS", "FIELDED_ALIAS", "compact_gate", "promote", "promote_back", "list_releases",
           "check_fieldable", "promote_command", "rollback_command", "bundles_command", "finish_releases_command",
           "check_name", "client_for", "get_model", "get_version"]
