"""`coreach study plan` and `coreach study analyze`: argument parsing, output, the cautions."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from coreach.errors import ConfigError
from coreach.runtime.cautions import cautions
from coreach.study.analyze import run_analysis
from coreach.study.plan import DEFAULT_ROOT, build_plan, compose_study, freeze

PLAN_USAGE = "coreach [--json] study plan NAME [--new-version] [--root DIR] [study.KEY=VALUE ...]"
ANALYZE_USAGE = ("coreach [--json] study analyze NAME [--trials PATH ...] [--version N] [--root DIR] [--out DIR] "
                 "[--reference CONDITION] [--bootstrap N] [--uri URI]")  # fmt: skip


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # argparse would print its usage and exit; coreach reports one line
        raise ConfigError(self.prog, f"{message} (usage: {self.usage})")


def _print_cautions() -> None:
    print("Cautions")
    for text in cautions(recording=True, study=True):
        print(f"  - {text}")


def plan_command(args: list[str], as_json: bool) -> int:
    p = _Parser(prog="coreach study plan", usage=PLAN_USAGE, add_help=False)
    p.add_argument("name")
    p.add_argument("--new-version", action="store_true")
    p.add_argument("--root", type=Path, default=DEFAULT_ROOT)
    ns, overrides = p.parse_known_args(args)
    unknown = [o for o in overrides if o.startswith("-")]
    if unknown:
        p.error(f"unrecognized arguments: {' '.join(unknown)}")
    study = compose_study(ns.name, overrides)
    plan = build_plan(study, base=Path.cwd())
    result = freeze(plan, ns.root, new_version=ns.new_version)
    summary = {"study": plan["name"], **result, "participants": len(plan["participants"]),
               "conditions": [{"letter": c["letter"], "name": c["name"], "ref_checked": c["ref_checked"]}
                              for c in plan["conditions"]],
               "design": plan["design"], "pilot": plan["pilot"]}  # fmt: skip
    if as_json:
        print(json.dumps({**summary, "cautions": cautions(recording=True, study=True)}, indent=2))
        return 0
    d = plan["design"]
    print(f"study {plan['name']} v{result['version']}: {result['status']} -> {result['path']}")
    print(f"  sha256 {result['sha256']}")
    print(f"  {len(plan['participants'])} participants, {len(plan['conditions'])} conditions, {len(plan['tasks'])} "
          f"tasks; Williams design with {d['sequences']} sequences"
          + ("" if d["balanced"] else f" (NOT balanced: the number of participants is not a multiple of "
                                      f"{d['sequences']})"))  # fmt: skip
    for c in plan["conditions"]:
        ref = f" {c['ref']} ({c['ref_checked']})" if c["ref"] else ""
        print(f"  {c['letter']} = {c['name']}: {c['kind']}{ref}   (the key is for the experimenter only)")
    if plan["pilot"]:
        print("  a pilot: its analysis will say so")
    _print_cautions()
    return 0


def analyze_command(args: list[str], as_json: bool) -> int:
    p = _Parser(prog="coreach study analyze", usage=ANALYZE_USAGE, add_help=False)
    p.add_argument("name")
    p.add_argument("--trials", type=Path, action="append", default=None)
    p.add_argument("--version", type=int, default=None)
    p.add_argument("--root", type=Path, default=DEFAULT_ROOT)
    p.add_argument("--out", type=Path, default=None)
    p.add_argument("--reference", default=None)
    p.add_argument("--bootstrap", type=int, default=2000)
    p.add_argument("--uri", default=None)
    ns = p.parse_args(args)
    if ns.bootstrap < 0:
        p.error(f"--bootstrap {ns.bootstrap}: expected 0 or more resamples")

    def warn(message: str) -> None:  # stderr: stdout belongs to --json
        print(f"coreach: warning: {message}", file=sys.stderr)

    summary = run_analysis(ns.root, ns.name, version=ns.version, trials=ns.trials, out=ns.out,
                           reference=ns.reference, resamples=ns.bootstrap, uri=ns.uri, warn=warn)  # fmt: skip
    if as_json:
        print(json.dumps({**summary, "cautions": cautions(recording=True, study=True)}, indent=2, default=str))
        return 0
    print(f"study {summary['study']} v{summary['version']}: {summary['rows']} trials of {summary['participants']} "
          f"participants analysed ({summary['left_out']} rows or files left out, named above)")  # fmt: skip
    for outcome, f in summary["friedman"].items():
        if f["p"] is None:
            print(f"  {outcome}: Friedman not computed ({f['note']})")
            continue
        print(f"  {outcome}: Friedman chi2 = {f['statistic']:.3f}, p = {f['p']:.4g} (n = {f['n']})")
    for e in summary["time_effects"]:
        print(f"  time vs {summary['reference']}: {e['condition']} {e['effect']:+.2f} s [{e['lo']:+.2f}, {e['hi']:+.2f}]")
    for e in summary["success_effects"]:
        print(f"  success vs {summary['reference']}: {e['condition']} odds ratio {e['odds_ratio']:.2f} "
              f"[{e['odds_ratio_lo']:.2f}, {e['odds_ratio_hi']:.2f}]")  # fmt: skip
    print(f"  report: {summary['report']}")
    if summary.get("mlflow_run"):
        print(f"  aggregates logged to MLflow run {summary['mlflow_run']}")
    _print_cautions()
    return 0


SIMULATE_USAGE = ("coreach [--json] study simulate NAME [--participants N] [--fresh] [--rate HZ] [--version N] "
                  "[--root DIR] [--uri URI]")  # fmt: skip
WITHDRAW_USAGE = "coreach [--json] study withdraw NAME CODE [--root DIR]"
EXPORT_USAGE = "coreach [--json] study export NAME [--version N] [--root DIR] [--out DIR] [--drives]"


def _warn(message: str) -> None:  # stderr: stdout belongs to --json
    print(f"coreach: warning: {message}", file=sys.stderr)


def simulate_command(args: list[str], as_json: bool) -> int:
    from coreach.study.simulate import simulate_study  # late: torch and the vetting loop, not for --help

    p = _Parser(prog="coreach study simulate", usage=SIMULATE_USAGE, add_help=False)
    p.add_argument("name")
    p.add_argument("--participants", type=int, default=None)
    p.add_argument("--fresh", action="store_true")
    p.add_argument("--rate", type=float, default=None)
    p.add_argument("--version", type=int, default=None)
    p.add_argument("--root", type=Path, default=DEFAULT_ROOT)
    p.add_argument("--uri", default=None)
    ns = p.parse_args(args)
    if ns.participants is not None and ns.participants < 1:
        p.error(f"--participants {ns.participants}: expected at least 1")
    if ns.rate is not None and not 5.0 <= ns.rate <= 1000.0:
        p.error(f"--rate {ns.rate}: expected a control rate in 5..1000 Hz")
    from coreach.progress import progress_bar  # late: rich, not for --help

    bar, progress = (None, None) if as_json else progress_bar(ns.participants or 0, "simulated participants")
    try:
        summary = simulate_study(ns.root, ns.name, ns.version, ns.participants, ns.fresh, ns.rate, ns.uri,
                                 progress=progress, warn=_warn)  # fmt: skip
    finally:
        if bar is not None:
            bar.stop()
    if as_json:
        print(json.dumps({**summary, "cautions": cautions(recording=True, study=True)}, indent=2, default=str))
        return 0
    print(f"study {summary['study']} v{summary['version']}: {summary['simulated']} simulated participants in "
          f"{summary['seconds_total']:.0f} s ({summary['seconds_driving']:.0f} s driving at {summary['rate_hz']:g} Hz) "
          f"-> {summary['folder']}")  # fmt: skip
    print("  simulated operators, not people: a check of the protocol, its timing and its analysis; no robot moved")
    _print_analysis(summary)
    _print_cautions()
    return 0


def _print_analysis(summary: dict) -> None:
    print(f"  {summary['rows']} measured trials analysed ({summary['incomplete_trials']} incomplete and "
          f"{summary['practice_rows']} practice left out; {summary['left_out']} rows or files left out, named above)")
    for outcome, f in summary["friedman"].items():
        if f["p"] is not None:
            print(f"  {outcome}: Friedman chi2 = {f['statistic']:.3f}, p = {f['p']:.4g} (n = {f['n']})")
    print(f"  report: {summary['report']}")


def withdraw_command(args: list[str], as_json: bool) -> int:
    from coreach.study.withdraw import withdraw  # late: the analysis stack only when it runs

    p = _Parser(prog="coreach study withdraw", usage=WITHDRAW_USAGE, add_help=False)
    p.add_argument("name")
    p.add_argument("code")
    p.add_argument("--root", type=Path, default=DEFAULT_ROOT)
    ns = p.parse_args(args)
    summary = withdraw(ns.root, ns.name, ns.code, warn=_warn)
    if as_json:
        print(json.dumps({**summary, "cautions": cautions(recording=True, study=True)}, indent=2))
        return 0
    print(f"participant {ns.code} withdrawn from study {ns.name} ({', '.join(summary['versions'])}); the code is "
          "recorded as withdrawn (code and time only) and will not be used again")  # fmt: skip
    for path in summary["removed"]:
        print(f"  deleted {path}")
    for path in summary["rebuilt"]:
        print(f"  rebuilt {path} without them")
    print("  copies made outside this folder (shared exports, backups) must be deleted by hand; analyses logged to "
          "a tracking server held aggregates only")  # fmt: skip
    _print_cautions()
    return 0


def export_command(args: list[str], as_json: bool) -> int:
    from coreach.study.export import export_study  # late: only when it runs

    p = _Parser(prog="coreach study export", usage=EXPORT_USAGE, add_help=False)
    p.add_argument("name")
    p.add_argument("--version", type=int, default=None)
    p.add_argument("--root", type=Path, default=DEFAULT_ROOT)
    p.add_argument("--out", type=Path, default=None)
    p.add_argument("--drives", action="store_true")
    ns = p.parse_args(args)
    summary = export_study(ns.root, ns.name, ns.version, ns.out, ns.drives)
    if as_json:
        print(json.dumps({**summary, "cautions": cautions(recording=True, study=True)}, indent=2))
        return 0
    print(f"study {ns.name} v{summary['version']}: {summary['participants']} participants, {summary['trial_rows']} "
          f"trial rows -> {summary['folder']}")  # fmt: skip
    print("  left out: comments (free text) and every date and time; pseudonymous codes stay. Share it only as "
          "your ethics approval and data-protection rules allow.")  # fmt: skip
    _print_cautions()
    return 0
