"""`coreach compare`: a leaderboard of an experiment's training runs as a terminal table, a CSV and a PNG."""

from __future__ import annotations

import argparse
import csv
import io
import json
import math
import os
import sys
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

from matplotlib.figure import Figure
from mlflow.tracking import MlflowClient
from rich.console import Console
from rich.table import Table

from coreach.errors import ConfigError, CoreachError
from coreach.tracking import resolve_uri, sqlite_path

USAGE = "coreach compare [--experiment NAME] [--sweep TAG] [--out DIR] [--uri URI] [--sort METRIC] [--limit N]"
DEFAULT_SORT = ("best/val/reconstruction", "best/val/loss")


@dataclass
class Interval:
    """A vetting metric: value with its interval where vetting logged one (lo/hi may be missing)."""

    value: float | None = None
    lo: float | None = None
    hi: float | None = None

    def text(self) -> str:
        if self.value is None:
            return "-"
        if self.lo is None or self.hi is None:
            return f"{self.value:.3g}"
        return f"{self.value:.3g} [{self.lo:.3g}, {self.hi:.3g}]"


@dataclass
class Row:
    run_id: str
    label: str
    status: str
    model: str
    losses: str
    seed: str
    sweep: str
    best: dict[str, float] = field(default_factory=dict)  # best/val/* metrics
    vet: dict[str, Interval] = field(default_factory=dict)  # vet/<suite>/<metric> -> value [lo, hi]

    def metric(self, key: str) -> float | None:
        if key in self.best:
            return self.best[key]
        iv = self.vet.get(key)
        return iv.value if iv else None


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # argparse would print usage and exit; we report one line
        raise ConfigError("coreach compare", f"{message} (usage: {USAGE})")


def _parser() -> argparse.ArgumentParser:
    p = _Parser(prog="coreach compare", add_help=False)
    p.add_argument("--experiment", default="coreach", help="MLflow experiment name (default: coreach)")
    p.add_argument("--sweep", default=None, help="only runs of this sweep (their coreach.sweep tag)")
    p.add_argument("--out", default="reports/compare", help="folder for leaderboard.csv and leaderboard.png")
    p.add_argument("--uri", default=None, help="tracking URI or sqlite file (default: COREACH_TRACKING_URI, else "
                                               "MLFLOW_TRACKING_URI, else ./mlflow.db)")
    p.add_argument("--sort", default=None, help="metric to rank by, lowest first (default: best val reconstruction)")
    p.add_argument("--limit", type=int, default=None, help="show only the best N runs")
    p.add_argument("-h", "--help", action="store_true")
    return p


def vet_key(metric: str) -> tuple[str, str] | None:
    """`vet/<suite>/<metric>` names -> (metric stem, part). Accepts both ways of naming an interval:
    `..._lo`/`..._hi` beside the value, or `.../value`, `.../lo`, `.../hi` under the stem."""
    if not metric.startswith("vet/"):
        return None
    for suffix, part in (("_lo", "lo"), ("_hi", "hi"), ("/lo", "lo"), ("/hi", "hi"), ("/value", "value")):
        if metric.endswith(suffix):
            return metric[: -len(suffix)], part
    if metric.endswith("/n"):  # sample counts: not a column of their own
        return None
    return metric, "value"


def _short(target: str | None) -> str:
    return target.rsplit(".", 1)[-1] if target else "-"


def row_of(run) -> Row:
    params, tags, metrics = run.data.params, run.data.tags, run.data.metrics
    losses = sorted({k.split(".")[1] for k in params if k.startswith("loss.") and k.endswith("._target_")})
    row = Row(
        run_id=run.info.run_id,
        label=tags.get("coreach.label") or run.info.run_name or run.info.run_id[:8],
        status=run.info.status,
        model=_short(params.get("model._target_")),
        losses="+".join(losses) or "-",
        seed=params.get("seed", "-"),
        sweep=tags.get("coreach.sweep", "-"),
        best={k: v for k, v in metrics.items() if k.startswith("best/val/")},
    )
    for name, value in metrics.items():
        key = vet_key(name)
        if key is not None:
            stem, part = key
            setattr(row.vet.setdefault(stem, Interval()), part, value)
    return row


def fetch_runs(uri: str, experiment: str, sweep: str | None) -> list:
    """Every training run of the experiment (optionally of one sweep), across result pages."""
    db = sqlite_path(uri)
    if db is not None and not db.exists():  # reading must not create an empty store
        raise CoreachError(f"tracking store {db}", "does not exist (train first, or pass --uri / set COREACH_TRACKING_URI)")
    client = MlflowClient(tracking_uri=uri)
    try:
        exp = client.get_experiment_by_name(experiment)
    except Exception as exc:  # an unreachable server or a broken store: say where
        raise CoreachError(f"tracking store {uri}", f"could not be read ({type(exc).__name__}: {exc})") from None
    if exp is None:
        raise CoreachError(f"experiment {experiment!r}", f"not found in {uri}")
    filters = ["tags.`coreach.stage` = 'train'"]
    if sweep:
        filters.append(f"tags.`coreach.sweep` = '{sweep}'")
    runs, token = [], None
    while True:
        page = client.search_runs([exp.experiment_id], " and ".join(filters), max_results=1000, page_token=token)
        runs.extend(page)
        token = page.token
        if not token:
            return runs


def _sort_key(rows: list[Row], requested: str | None) -> str:
    if requested:
        if not any(r.metric(requested) is not None for r in rows):
            known = sorted({k for r in rows for k in [*r.best, *r.vet]})
            raise ConfigError("option --sort", f"no run has metric {requested!r}; known: {known}")
        return requested
    for key in DEFAULT_SORT:
        if any(key in r.best for r in rows):
            return key
    return DEFAULT_SORT[-1]


def leaderboard(rows: list[Row], sort: str) -> list[Row]:
    """Best first by `sort` (lower is better); runs without that metric last, in their given order."""
    def key(r: Row):
        v = r.metric(sort)
        return (v is None or (isinstance(v, float) and math.isnan(v)), v if v is not None else 0.0)

    return sorted(rows, key=key)


def _columns(rows: list[Row]) -> tuple[list[str], list[str]]:
    best = sorted({k for r in rows for k in r.best})
    vet = sorted({k for r in rows for k in r.vet})
    return best, vet


def csv_text(rows: list[Row]) -> str:
    best, vet = _columns(rows)
    out = io.StringIO()
    w = csv.writer(out)
    head = ["rank", "label", "run_id", "status", "model", "losses", "seed", "sweep", *best]
    for k in vet:
        head += [k, f"{k}_lo", f"{k}_hi"]
    w.writerow(head)
    for i, r in enumerate(rows, 1):
        cells = [i, r.label, r.run_id, r.status, r.model, r.losses, r.seed, r.sweep]
        cells += [_num(r.best.get(k)) for k in best]
        for k in vet:
            iv = r.vet.get(k, Interval())
            cells += [_num(iv.value), _num(iv.lo), _num(iv.hi)]
        w.writerow(cells)
    return out.getvalue()


def _num(v: float | None) -> str:
    return "" if v is None else repr(float(v))


def _atomic_write(path: Path, data: bytes) -> None:
    """Write to a temporary file beside `path`, then rename: a reader never sees half a file."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes it private; the report is an ordinary file
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def png_bytes(rows: list[Row], sort: str, title: str) -> bytes:
    """Bars of the ranking metric per run; a second panel with the first vetting metric and its interval."""
    _, vet = _columns(rows)
    shown = [r for r in rows if r.metric(sort) is not None]
    vet_key_shown = next((k for k in vet if any(r.vet.get(k) and r.vet[k].lo is not None for r in rows)), None)
    panels = 2 if vet_key_shown else 1
    height = max(2.5, 0.35 * len(rows) + 1.2)
    fig = Figure(figsize=(7 * panels, height), layout="constrained")
    axes = fig.subplots(1, panels, squeeze=False)[0]
    labels = [f"{r.label} {r.run_id[:6]}" for r in shown]
    ax = axes[0]
    ax.barh(range(len(shown)), [r.metric(sort) for r in shown], color="#4c72b0")
    ax.set_yticks(range(len(shown)), labels)
    ax.invert_yaxis()  # best at the top
    ax.set_xlabel(f"{sort} (lower is better)")
    ax.set_title(title)
    if vet_key_shown:
        ax2 = axes[1]
        ivs = [r.vet.get(vet_key_shown, Interval()) for r in rows]
        vals = [iv.value if iv.value is not None else 0.0 for iv in ivs]
        err = [[max(0.0, v - iv.lo) if iv.lo is not None else 0.0 for v, iv in zip(vals, ivs)],
               [max(0.0, iv.hi - v) if iv.hi is not None else 0.0 for v, iv in zip(vals, ivs)]]  # fmt: skip
        ax2.barh(range(len(rows)), vals, xerr=err, color="#55a868", capsize=3)
        ax2.set_yticks(range(len(rows)), [f"{r.label} {r.run_id[:6]}" for r in rows])
        ax2.invert_yaxis()
        ax2.set_xlabel(f"{vet_key_shown} (interval from vetting)")
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110)
    return buf.getvalue()


def table(rows: list[Row], sort: str, title: str):
    best, vet = _columns(rows)
    t = Table(title=title)
    for col in ("#", "label", "model", "losses", "seed", "status"):
        t.add_column(col, justify="right" if col in ("#", "seed") else "left")
    for k in best:
        t.add_column(k.removeprefix("best/val/") + (" *" if k == sort else ""), justify="right")
    for k in vet:
        t.add_column(k.removeprefix("vet/") + (" *" if k == sort else ""), justify="right")
    t.add_column("run id", no_wrap=True)
    for i, r in enumerate(rows, 1):
        t.add_row(
            str(i), r.label, r.model, r.losses, r.seed, r.status,
            *[f"{r.best[k]:.4g}" if k in r.best else "-" for k in best],
            *[r.vet[k].text() if k in r.vet else "-" for k in vet],
            r.run_id,
        )  # fmt: skip
    return t


def compare(uri: str, experiment: str, sweep: str | None, out: Path, sort: str | None = None,
            limit: int | None = None) -> dict:  # fmt: skip
    """Build the leaderboard; writes leaderboard.csv and leaderboard.png into `out`. Returns a summary."""
    runs = fetch_runs(uri, experiment, sweep)
    if not runs:
        where = f"experiment {experiment!r}" + (f", sweep {sweep!r}" if sweep else "")
        raise CoreachError(where, f"has no training runs in {uri}")
    rows = [row_of(r) for r in runs]
    key = _sort_key(rows, sort)
    rows = leaderboard(rows, key)
    if limit is not None:
        if limit < 1:
            raise ConfigError("option --limit", f"expected a positive number of runs, got {limit}")
        rows = rows[:limit]
    title = f"{experiment}" + (f" / sweep {sweep}" if sweep else "") + f": ranked by {key}"
    csv_path, png_path = out / "leaderboard.csv", out / "leaderboard.png"
    # both rendered before either is written: a failure leaves the previous pair as it was
    csv_data, png_data = csv_text(rows).encode(), png_bytes(rows, key, title)
    _atomic_write(csv_path, csv_data)
    _atomic_write(png_path, png_data)
    return {"rows": rows, "sort": key, "title": title, "csv": str(csv_path), "png": str(png_path)}


def compare_command(args: list[str], as_json: bool) -> int:
    """Entry point of `coreach compare` (options as in USAGE); CoreachError for bad options or stores."""
    opts = _parser().parse_args(args)
    if opts.help:
        print(USAGE)
        return 0

    os.environ.setdefault("MLFLOW_SUPPRESS_PRINTING_URL_TO_STDOUT", "true")
    result = compare(resolve_uri(opts.uri), opts.experiment, opts.sweep, Path(opts.out), opts.sort, opts.limit)
    if as_json:
        payload = {
            "sort": result["sort"],
            "csv": result["csv"],
            "png": result["png"],
            "runs": [
                {**{k: v for k, v in r.__dict__.items() if k != "vet"},
                 "vet": {k: iv.__dict__ for k, iv in r.vet.items()}}
                for r in result["rows"]
            ],
        }  # fmt: skip
        print(json.dumps(payload, indent=2))
        return 0

    console = Console(width=None if sys.stdout.isatty() else 200)
    console.print(table(result["rows"], result["sort"], result["title"]))
    console.print(f"written: {result['csv']} and {result['png']}")
    return 0
