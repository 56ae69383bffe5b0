"""`coreach study power`: argument parsing, the progress bar, the terminal summary, the cautions."""

from __future__ import annotations

import json
from pathlib import Path

from coreach.errors import ConfigError
from coreach.runtime.cautions import caution_lines, cautions
from coreach.study.commands import _Parser
from coreach.study.plan import DEFAULT_ROOT
from coreach.study.power import TARGET

POWER_USAGE = ("coreach [--json] study power NAME [--studies R] [--participants 6,12,18,...] [--seed S] "
               "[--version N] [--root DIR] [--out DIR] [study.planted.KEY=VALUE ...]")  # fmt: skip


def _counts(text: str) -> list[int]:
    try:
        return [int(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise ConfigError("--participants", f"{text!r}: expected whole numbers separated by commas, "
                                            "e.g. 6,12,18") from None  # fmt: skip


class _Bar:
    """The shared progress bar (coreach.progress), made once the run knows its total of simulated studies."""

    def __init__(self):
        self.bar = None

    def __call__(self, total: int):
        from coreach.progress import progress_bar  # late: rich only when a bar is shown

        self.bar, update = progress_bar(total, "simulated studies")
        if update is None:  # CI or a pipe: quiet
            return None
        done = iter(range(1, total + 1))
        return lambda: update(next(done))

    def stop(self):
        if self.bar is not None:
            self.bar.stop()


def power_command(args: list[str], as_json: bool) -> int:
    from coreach.study.power_run import run_power_study  # late: statsmodels and matplotlib; --help stays fast

    p = _Parser(prog="coreach study power", usage=POWER_USAGE, add_help=False)
    p.add_argument("name")
    p.add_argument("--studies", type=int, default=200)
    p.add_argument("--participants", type=_counts, default=None)
    p.add_argument("--seed", type=int, default=None)
    p.add_argument("--version", type=int, default=None)
    p.add_argument("--root", type=Path, default=DEFAULT_ROOT)
    p.add_argument("--out", type=Path, default=None)
    ns, overrides = p.parse_known_args(args)
    unknown = [o for o in overrides if not o.startswith("study.planted.") or "=" not in o]
    if unknown:
        p.error(f"unrecognized argument {unknown[0]!r}; only study.planted.KEY=VALUE overrides are taken")
    bar = _Bar()
    try:
        summary = run_power_study(ns.root, ns.name, version=ns.version, studies=ns.studies, counts=ns.participants,
                                  seed=ns.seed, out=ns.out, overrides=overrides, progress=bar)  # fmt: skip
    finally:
        bar.stop()
    if as_json:
        print(json.dumps({**summary, "cautions": cautions(recording=False, study=True)}, indent=2, default=str))
        return 0
    print(f"study {summary['study']} v{summary['version']}: {summary['studies']} simulated studies per cell, seed "
          f"{summary['seed']}, {summary['seconds']:.1f} s (a statistical model with planted effects; no person's "
          "data)")  # fmt: skip
    print(f"  coverage of the 95% intervals, {summary['participants']} participants, against "
          f"{summary['reference']} (target 93-97%):")  # fmt: skip
    for row in summary["coverage"]:
        unit = "s" if row["scale"] == "time_s" else "log-odds (population-averaged)"
        print(f"    {row['scale']:8s} {row['condition']}: true {row['true']:+.3f} {unit}, coverage "
              f"{row['coverage']:.1%} [{row['coverage_lo']:.1%}, {row['coverage_hi']:.1%}] of "
              f"{row['fitted']}")  # fmt: skip
    q = summary["power_question"]
    print(f"  power, time of {q['first']} minus {q['second']} = {q['difference_s']:+g} s, alpha 0.05:")
    for row in summary["power"]:
        print(f"    n = {row['participants']:3d} {row['test']:14s} {row['power']:.0%} "
              f"[{row['power_lo']:.0%}, {row['power_hi']:.0%}]")  # fmt: skip
    for test, n in summary["smallest_n"][float(q["difference_s"])].items():
        print(f"  smallest n reaching {TARGET:.0%} with {test}: {n if n is not None else 'not reached'}")
    unbalanced = [r["participants"] for r in summary["power"] if r["participants"] not in summary["balanced_counts"]]
    if unbalanced:
        print(f"  not a multiple of the design's sequences (a real study's order would be unbalanced): "
              f"{', '.join(str(n) for n in sorted(set(unbalanced)))}")  # fmt: skip
    print(f"  files: {', '.join(summary['files'])}")
    print("\n".join(caution_lines(recording=False, study=True)))  # no person is recorded: the study's cautions
    return 0
