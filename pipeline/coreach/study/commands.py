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
