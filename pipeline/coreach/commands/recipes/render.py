"""Output formats for `coreach recipes`: the terminal table, results.md, results.csv and results.json."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

from rich.markup import escape
from rich.table import Table

from coreach.commands.compare import _atomic_write
from coreach.commands.recipes.stats import _finite, rate_at


def _num(v) -> str:
    return f"{v:.2f}" if _finite(v) else "–"


def rate_text(r: dict | None) -> str:
    if not r or not _finite(r.get("value")):
        return "–"
    if _finite(r.get("lo")) and _finite(r.get("hi")):
        return f"{r['value']:.2f} [{r['lo']:.2f}, {r['hi']:.2f}]"
    return _num(r["value"])


def spread_text(s: dict | None) -> str:
    if not s:
        return "–"
    text = f"{_num(s['min'])} / {_num(s['median'])} / {_num(s['max'])}"
    return text + (f" (lo {_num(s['worst_lo'])})" if s["worst_lo"] is not None else "")


def table_rows(result: dict) -> list[tuple[str, str, list[str], bool]]:
    """(recipe, seed column, cells, ends a group) in display order: each recipe's seeds, its spread, baselines."""
    out = []
    spreads = {s["recipe"]: s for s in result["spread"]}
    rows = result["rows"]
    for label, sp in spreads.items():
        for row in (r for r in rows if r["kind"] == "seed" and r["recipe"] == label):
            out.append((label, str(row["seed"]), [rate_text(rate_at(row, c)) for c in result["columns"]], False))
        out.append((label, f"spread ({len(sp['seeds'])} seeds)",
                    [spread_text(sp["columns"].get(c["id"])) for c in result["columns"]], True))  # fmt: skip
    for row in (r for r in rows if r["kind"] == "baseline"):
        out.append((row["recipe"], "baseline", [rate_text(rate_at(row, c)) for c in result["columns"]], False))
    return out


LEGEND = ("Simulated operators in simulation. Per seed and baseline: point value [95% Wilson interval]; "
          "n = episodes. Spread rows: min / median / max of the per-seed point values, and (lo) the worst lower "
          "bound across seeds. Recovery: success among episodes whose goal switched at that fraction of the "
          "horizon (the latest switch of the suite).")  # fmt: skip


SEPARATION_LEGEND = ("Separation, per suite: steps with a link touching furniture or another link / steps with a "
                     "link inside the person's keep-out zone / closest link to furniture (m) / closest link to the "
                     "person (m) / share of steps the filter's separation step scaled the command.")


def separation_cell(cell: dict | None) -> str:
    sep = (cell or {}).get("separation")
    if not sep:
        return "–"
    return (f"{sep['contact_steps']} / {sep['keep_out_steps']} / {_num3(sep['min_furniture_m'])} / "
            f"{_num3(sep['min_person_m'])} / {100 * sep['held_share']:.1f}%")


def _num3(v) -> str:
    return f"{v:.3f}" if _finite(v) else "–"


def separation_rows(result: dict) -> list[tuple[str, str, list[str]]]:
    """(recipe, seed column, one cell per suite) for every seed and baseline row that has separation figures."""
    out = []
    for row in result["rows"]:
        cells = [separation_cell(row["suites"].get(s)) for s in result["suites"]]
        if any(c != "–" for c in cells):
            out.append((row["recipe"], "baseline" if row["kind"] == "baseline" else str(row["seed"]), cells))
    return out


def markdown(result: dict) -> str:
    """For the results page (docs/results.md): the command that reproduces the table, the date, the table, how to read it."""
    esc = lambda s: str(s).replace("|", "\\|")  # noqa: E731
    head = ["recipe", "seed", *(c["header"] for c in result["columns"])]
    lines = ["```sh", result["command"], "```", ""]
    commit = f", commit {result['commit'][:10]}" if result.get("commit") else ""
    lines += [f"Run {result['date']}{commit}; seeds {', '.join(map(str, result['seeds']))}.", ""]
    lines += ["| " + " | ".join(map(esc, head)) + " |", "|" + "---|" * 2 + "---:|" * len(result["columns"])]
    for recipe, seed, cells, _ in table_rows(result):
        lines.append("| " + " | ".join(esc(x) for x in (recipe, seed, *cells)) + " |")
    lines += ["", LEGEND]
    sep = separation_rows(result)
    if sep:
        lines += ["", "| recipe | seed | " + " | ".join(f"{esc(s)} separation" for s in result["suites"]) + " |",
                  "|---|---|" + "---:|" * len(result["suites"])]
        lines += ["| " + " | ".join(esc(x) for x in (recipe, seed, *cells)) + " |" for recipe, seed, cells in sep]
        lines += ["", SEPARATION_LEGEND]
    if result.get("parent_run"):
        lines += ["", f"Run ids of every training and vetting: results.json, MLflow run {result['parent_run']}."]
    return "\n".join(lines) + "\n"


CSV_HEAD = ["kind", "recipe", "seed", "suite", "metric", "value", "lo", "hi", "n", "min", "median", "max",
            "worst_lo", "seeds", "training_run", "vetting_run"]  # fmt: skip


def csv_text(result: dict) -> str:
    """Long format: one line per row and column (per-seed and baseline values, then the spreads)."""
    buf = io.StringIO()
    w = csv.writer(buf)
    w.writerow(CSV_HEAD)
    blank = lambda v: "" if v is None else v  # noqa: E731
    for row in result["rows"]:
        for c in result["columns"]:
            r = rate_at(row, c)
            if r is None:
                continue
            vet_run = row["suites"][c["suite"]]["vetting_run"]
            w.writerow([row["kind"], row["recipe"], blank(row["seed"]), c["suite"], c["id"].split("/", 1)[1],
                        *(blank(r.get(k)) for k in ("value", "lo", "hi", "n")), "", "", "", "", "",
                        blank(row["training_run"]), blank(vet_run)])  # fmt: skip
    for sp in result["spread"]:
        for c in result["columns"]:
            s = sp["columns"].get(c["id"])
            if s is None:
                continue
            w.writerow(["spread", sp["recipe"], "", c["suite"], c["id"].split("/", 1)[1], "", "", "", "",
                        *(blank(s[k]) for k in ("min", "median", "max", "worst_lo", "seeds")), "", ""])  # fmt: skip
    return buf.getvalue()


def write_results(result: dict, out: Path) -> dict[str, str]:
    """results.md, results.csv and results.json, all rendered before any is written."""
    paths = {"markdown": out / "results.md", "csv": out / "results.csv", "json": out / "results.json"}
    result["files"] = {k: str(p) for k, p in paths.items()}
    data = {"markdown": markdown(result), "csv": csv_text(result),
            "json": json.dumps(result, indent=2, default=str)}  # fmt: skip
    for key, path in paths.items():
        _atomic_write(path, data[key].encode())
    return result["files"]


def terminal_table(result: dict):
    table = Table(title="Recipes across training seeds (simulated operators; 95% Wilson intervals; "
                        "spread: min / median / max, worst lower bound)")  # fmt: skip
    table.add_column("recipe")
    table.add_column("seed")
    for c in result["columns"]:
        table.add_column(escape(c["header"]), justify="right")
    for recipe, seed, cells, ends in table_rows(result):
        style = "bold" if ends else ("dim" if seed == "baseline" else None)
        table.add_row(*(escape(x) for x in (recipe, seed, *cells)), style=style, end_section=ends)
    return table


def show_recipes(console, summaries: list[dict], name: str) -> None:
    """The terminal summary of `coreach recipes` (the command table's `show`): the table, where its files
    went, and the MLflow run that holds them. It lives here, not in coreach.commands.summaries, so the other
    commands' summaries do not import the recipes package (training and vetting)."""
    for s in summaries:
        console.print(terminal_table(s))
        # paths and overrides are full of [brackets], which rich would read as markup
        console.print(f"written: {', '.join(s['files'].values())}", markup=False)
        console.print(f"recipes run in MLflow: {s['parent_run']} ({s['tracking']})", markup=False)
        console.print(f"reproduce with: {s['command']}", markup=False, soft_wrap=True)
