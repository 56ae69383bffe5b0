"""Statistics for `coreach recipes`: per-seed cells, table columns and the spread across training seeds."""

from __future__ import annotations

import math
import statistics
from datetime import datetime, timezone

from coreach.commands.recipes.plan import Plan
from coreach.vetting.diagnosis import without_episodes


def _rate(value) -> dict | None:
    """A rate dict {value, lo, hi, n} from a summary entry (a bare number has no interval)."""
    if isinstance(value, bool):
        return None
    if isinstance(value, (int, float)):
        return {"value": float(value), "lo": None, "hi": None, "n": None}
    if isinstance(value, dict):
        if "value" in value:
            return {k: value.get(k) for k in ("value", "lo", "hi", "n")}
        if "success" in value:
            return _rate(value["success"])
    return None


def per_goal(summary: dict) -> dict[str, dict]:
    """Success per goal from the summary's diagnosis section, if it has one ({} otherwise)."""
    diag = summary.get("diagnosis")
    found = diag.get("per_goal") if isinstance(diag, dict) else None
    if isinstance(found, list):
        found = {str(e.get("goal", e.get("name"))): e for e in found if isinstance(e, dict)}
    if not isinstance(found, dict):
        return {}
    return {str(g): r for g, r in ((g, _rate(v)) for g, v in found.items()) if r is not None}


def latest_switch(recovery: dict) -> str | None:
    """The recovery cell of the latest goal switch ("0.8" of none/0.2/0.5/0.8); None without switches."""
    cells = [k for k in recovery if k != "none"]
    return max(cells, key=float) if cells else None


def _cell(summary: dict, vet_run: str | None) -> dict:
    out = {"success": _rate(summary["success"]), "recovery": summary.get("recovery", {}),
           "per_goal": per_goal(summary), "vetting_run": vet_run}  # fmt: skip
    if summary.get("diagnosis") is not None:
        out["diagnosis"] = without_episodes(summary["diagnosis"])  # cause shares, per goal and cell, advice
    if summary.get("separation"):
        out["separation"] = summary["separation"]["all"]  # contacts, keep-out, closest approaches, held share
    return out


def columns(rows: list[dict], suites: list[str]) -> list[dict]:
    """Table columns: per suite success, recovery at its latest switch, and success per goal (no-switch suites)."""
    cols = []
    for s in suites:
        cells = [r["suites"][s] for r in rows if s in r["suites"]]
        n = next((c["success"]["n"] for c in cells if c["success"]), None)
        cols.append({"id": f"{s}/success", "suite": s, "metric": "success", "key": None,
                     "header": f"{s} success" + (f" (n={n})" if n else "")})  # fmt: skip
        switch = next((latest_switch(c["recovery"]) for c in cells if latest_switch(c["recovery"])), None)
        if switch is not None:
            n = next((c["recovery"][switch].get("n") for c in cells if switch in c["recovery"]), None)
            cols.append({"id": f"{s}/recovery@{switch}", "suite": s, "metric": "recovery", "key": switch,
                         "header": f"{s} recovery @{switch}" + (f" (n={n})" if n else "")})  # fmt: skip
        else:
            goals = list(dict.fromkeys(g for c in cells for g in c["per_goal"]))
            cols += [{"id": f"{s}/goal:{g}", "suite": s, "metric": "goal", "key": g, "header": f"{s} {g}"}
                     for g in goals]  # fmt: skip
    return cols


def rate_at(row: dict, col: dict) -> dict | None:
    cell = row["suites"].get(col["suite"])
    if cell is None:
        return None
    if col["metric"] == "success":
        return cell["success"]
    if col["metric"] == "recovery":
        return _rate(cell["recovery"].get(col["key"]))
    return cell["per_goal"].get(col["key"])


def _finite(x) -> bool:
    return isinstance(x, (int, float)) and math.isfinite(x)


def spread(rates: list[dict | None]) -> dict | None:
    """Across training seeds: min / median / max of the point values and the worst lower bound."""
    values = [r["value"] for r in rates if r and _finite(r["value"])]
    if not values:
        return None
    los = [r["lo"] for r in rates if r and _finite(r.get("lo"))]
    return {"min": min(values), "median": statistics.median(values), "max": max(values),
            "worst_lo": min(los) if los else None, "seeds": len(values)}  # fmt: skip


def assemble(plan: Plan, trained: list[dict], vetted: dict[str, dict], cmd: str, given: list[str],
             commit: str | None = None) -> dict:
    """Rows per recipe-seed and baseline, a spread row per recipe, and the columns to show them in."""
    suites = list(vetted)
    rows = [{"kind": "seed", "recipe": t["recipe"], "seed": t["seed"], "training_run": t["run_id"], "suites": {}}
            for t in trained]  # fmt: skip
    rows += [{"kind": "baseline", "recipe": b, "seed": None, "training_run": None, "suites": {}}
             for b in plan.baselines]
    for name, v in vetted.items():
        # vet keeps the candidates' order in its summaries, whatever labels it gave them
        for row, (label, summary) in zip(rows, v["summaries"].items()):
            row["suites"][name] = _cell(summary, v.get("vet_runs", {}).get(label))
    cols = columns(rows, suites)
    spreads = []
    for r in plan.recipes:
        mine = [row for row in rows if row["kind"] == "seed" and row["recipe"] == r.label]
        spreads.append({"kind": "spread", "recipe": r.label, "seeds": [row["seed"] for row in mine],
                        "columns": {c["id"]: spread([rate_at(row, c) for row in mine]) for c in cols}})  # fmt: skip
    return {
        "command": cmd,
        "overrides": given,
        "date": datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
        "commit": commit,
        "recipes": {r.label: {"command": r.command, "overrides": list(r.overrides)} for r in plan.recipes},
        "seeds": list(plan.seeds),
        "suites": suites,
        "episodes": plan.episodes,
        "columns": cols,
        "rows": rows,
        "spread": spreads,
        "trainings": trained,
        "vettings": {s: {"report": v.get("report"), "vet_runs": v.get("vet_runs", {})} for s, v in vetted.items()},
        "out": str(plan.out),
    }
