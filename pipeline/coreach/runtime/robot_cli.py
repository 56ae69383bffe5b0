"""`coreach-robot`: the robot computer's command (numpy + onnxruntime, no torch, no mlflow).

    coreach-robot fetch NAME[@ALIAS] [--server URL] [--cache DIR] [--timeout S] [--json] [--debug]
    coreach-robot status [NAME] [--cache DIR] [--json] [--debug]

Both print the cautions (coreach.runtime.cautions) after their result, and --json carries them as `cautions`.

Exit codes: 0 done; 2 bad input or nothing could be fetched (unknown model or alias, server silent, bundle not
reachable); 3 the store's bundle was refused (hashes do not match the release). Either way the `current`
bundle is left as it was. The full CLI runs the same fetch as `coreach fetch ...`.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import traceback
from typing import Any

from coreach.errors import CoreachError
from coreach.runtime.fetch import FIELDED_ALIAS, Fetched, default_cache, fetch, status
from coreach.runtime.cautions import caution_lines, caution_text, cautions
from coreach.runtime.model_card import relaxed_warning
from coreach.runtime.store_client import RefusedBundle

PROG = "coreach-robot"
REFUSED = 3


class _Parser(argparse.ArgumentParser):
    """argparse that reports a usage mistake in one line (exit 2) instead of the usage block plus a line."""

    def error(self, message: str):  # type: ignore[override]
        raise CoreachError(self.prog, f"{message}; see {PROG} --help")


def _fetch_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("ref", metavar="NAME[@ALIAS]", help=f"registered model, and its alias (default @{FIELDED_ALIAS})")
    p.add_argument("--server", help="tracking server URL (default: COREACH_TRACKING_URI, else MLFLOW_TRACKING_URI)")
    p.add_argument("--cache", help="local bundle cache (default: COREACH_ROBOT_CACHE, else ~/.cache/coreach/bundles)")
    p.add_argument("--timeout", type=float, default=10.0, help="seconds to wait for the server per request (10)")


def parser() -> argparse.ArgumentParser:
    # every help text ends with the cautions: whoever reads it is about to put a decoder on a robot
    top = _Parser(prog=PROG, description="Fetch, verify and show the fielded decoder bundle on the robot computer.",
                  epilog=caution_text(), formatter_class=argparse.RawDescriptionHelpFormatter)
    top.add_argument("--json", action="store_true", help="print the result as JSON")
    top.add_argument("--debug", action="store_true", help="show tracebacks")
    sub = top.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    extra = {"epilog": caution_text(), "formatter_class": argparse.RawDescriptionHelpFormatter}
    f = sub.add_parser("fetch", help="bring NAME@ALIAS from the tracking server, verified, and make it current",
                       **extra)  # fmt: skip
    _fetch_options(f)
    s = sub.add_parser("status", help="the current bundle of each model in the cache, checked again", **extra)
    s.add_argument("name", nargs="?", metavar="NAME", help="one model (default: every model in the cache)")
    s.add_argument("--cache", help="local bundle cache (default: COREACH_ROBOT_CACHE, else ~/.cache/coreach/bundles)")
    for p in (f, s):  # also accepted after the command
        p.add_argument("--json", action="store_true", default=argparse.SUPPRESS, help=argparse.SUPPRESS)
        p.add_argument("--debug", action="store_true", default=argparse.SUPPRESS, help=argparse.SUPPRESS)
    return top


# ------------------------------------------------------------------------------------------ printing
def _gate_lines(gate: dict[str, Any]) -> list[str]:
    rows = []
    for check, r in gate.items():
        if isinstance(r, dict):
            verdict = "passed" if r.get("passed") else "FAILED"
            rows.append(f"    {check}: {_fmt(r.get('value'))} {r.get('op', '')} {_fmt(r.get('threshold'))}  {verdict}")
        else:
            rows.append(f"    {check}: {_fmt(r)}")
    passed = sum(bool(r.get("passed")) for r in gate.values() if isinstance(r, dict))
    return [f"  gate          {passed} of {len(gate)} passed", *rows]


def _fmt(v: Any) -> str:
    return f"{v:.4g}" if isinstance(v, float) else str(v)


def fetched_lines(r: Fetched) -> list[str]:
    how = "downloaded and verified" if r.downloaded else "already in the cache, verified again"
    was = "" if r.previous is None else "unchanged" if r.previous == r.version else f"was version {r.previous}"
    rec = r.record
    return [
        f"{r.name}@{r.alias}: version {r.version} is current ({how}{'; ' + was if was else ''})",
        f"  bundle        {r.bundle}",
        f"  training run  {rec['training_run'] or 'n/a'} (code {r.manifest.git_commit})",
        f"  release run   {rec['release_run'] or 'n/a'}",
        f"  manifest      sha256 {rec['manifest_sha256']} (as the registry records it)",
        f"  from          {rec['bundle_uri']}",
        *_gate_lines(rec["gate"]),
        *([f"  WARNING       this version was {relaxed_warning(rec['gate_relaxed'])}"] if rec.get("gate_relaxed") else []),
    ]  # fmt: skip


def status_lines(rows: list[dict[str, Any]], cache: str) -> list[str]:
    if not rows:
        return [f"no bundles fetched in {cache}; fetch one with {PROG} fetch NAME"]
    out = []
    for row in rows:
        if row["current"] is None:
            out.append(f"{row['name']}: no current bundle (cached versions: {', '.join(row['cached']) or 'none'})")
            continue
        state = "verified" if row["verified"] else f"FAILS verification: {row['problem']}"
        rec = row["record"] or {}
        out += [f"{row['name']}: version {row['current']} is current ({state})",
                f"  bundle        {row['bundle']}",
                f"  fetched       {rec.get('fetched_at', 'n/a')} as @{rec.get('alias', '?')} from {rec.get('server', '?')}",
                f"  training run  {rec.get('training_run', 'n/a')}",
                f"  cached        versions {', '.join(row['cached'])} (an older one becomes current by moving the "
                "alias back and fetching again)"]  # fmt: skip
        if rec.get("gate"):
            out += _gate_lines(rec["gate"])
        if rec.get("gate_relaxed"):
            out.append(f"  WARNING       this version was {relaxed_warning(rec['gate_relaxed'])}")
    return out


# ------------------------------------------------------------------------------------------ commands
def _run_fetch(ns: argparse.Namespace, as_json: bool) -> int:
    result = fetch(ns.ref, server=ns.server, cache=ns.cache, timeout=ns.timeout)
    if as_json:
        print(json.dumps({**result.as_json(), "cautions": cautions()}, indent=2))
    else:
        print("\n".join([*fetched_lines(result), *caution_lines()]))
    return 0


def _run_status(ns: argparse.Namespace, as_json: bool) -> int:
    rows = status(ns.cache, ns.name)
    if as_json:
        print(json.dumps({"bundles": rows, "cautions": cautions()}, indent=2))
    else:
        print("\n".join([*status_lines(rows, str(ns.cache or default_cache())), *caution_lines()]))
    return REFUSED if any(r["verified"] is False for r in rows) else 0


def main(argv: list[str] | None = None) -> int:
    args = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in args
    try:
        ns = parser().parse_args(args)
        if ns.command is None:
            parser().print_help()
            return 0
        run = _run_fetch if ns.command == "fetch" else _run_status
        return run(ns, bool(getattr(ns, "json", False)))
    except RefusedBundle as exc:
        return _fail(exc, REFUSED, debug)
    except CoreachError as exc:
        return _fail(exc, 2, debug)
    except BrokenPipeError:  # the reader of stdout went away (`| head`): nothing more to say
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
    except KeyboardInterrupt:
        print(f"{PROG}: error: interrupted; the current bundle is unchanged", file=sys.stderr)
        return 130
    except OSError as exc:  # this computer's disk or cache folder, not a bug
        if debug:
            traceback.print_exc()
        print(f"{PROG}: error: {_disk_problem(exc)}", file=sys.stderr)
        return 2
    except Exception as exc:  # a bug, not bad input
        if debug:
            traceback.print_exc()
        print(f"{PROG}: error: internal error: {type(exc).__name__}: {exc} (rerun with --debug for the traceback)",
              file=sys.stderr)  # fmt: skip
        return 1


def _disk_problem(exc: OSError) -> str:
    return f"{exc.filename or 'the bundle cache'}: {exc.strerror or exc}; the current bundle is unchanged"


def _fail(exc: CoreachError, code: int, debug: bool) -> int:
    if debug:
        traceback.print_exc()
    print(f"{PROG}: error: {exc}", file=sys.stderr)
    return code


def fetch_command(args: list[str], as_json: bool) -> int:
    """`coreach fetch NAME[@ALIAS] ...` in the full CLI: the same fetch; a refused bundle exits 3 there too."""
    p = _Parser(prog="coreach fetch", add_help=False)  # `coreach fetch --help` is the command table's
    _fetch_options(p)
    ns = p.parse_args(args)
    try:
        return _run_fetch(ns, as_json)
    except RefusedBundle as exc:
        print(f"coreach: error: {exc}", file=sys.stderr)
        return REFUSED
    except OSError as exc:  # this computer's disk or cache folder, not a bug
        print(f"coreach: error: {_disk_problem(exc)}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
