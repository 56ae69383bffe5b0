"""What a command prints when it is done: a table for people, or JSON alone on stdout for programs."""

from __future__ import annotations

import json
import sys

from rich.console import Console
from rich.table import Table


def print_summary(command: str, summaries: list[dict], as_json: bool) -> None:
    if as_json:
        single = command in ("demo", "vet") and len(summaries) == 1
        payload = summaries[0] if single else {"runs": summaries}
        print(json.dumps(payload, indent=2, default=str))
        return
    console = Console(width=None if sys.stdout.isatty() else 160)
    if command == "train":
        console.print(training_table(summaries))
        if summaries:
            console.print(f"MLflow: {mlflow_hint()}")
    elif command == "vet":
        for s in summaries:
            print_vetting(console, s)
    elif command.startswith("bench"):
        for s in summaries:
            table = Table(title=command)
            table.add_column("measure")
            table.add_column("value")
            for k, v in s.items():
                table.add_row(k, f"{v:.4g}" if isinstance(v, float) else str(v))
            console.print(table)
    elif command == "demo":
        for s in summaries:
            console.print(training_table(s.get("runs", [])))
            if s.get("vetting"):
                print_vetting(console, s["vetting"])
            for line in s.get("next_steps", []):
                console.print(line)


def training_table(runs: list[dict]) -> Table:
    """One row per run; validation values at the best epoch. Totals mix different loss recipes, so the
    reconstruction column is the one to compare across decoders."""
    terms = sorted({k for r in runs for k in r.get("metrics", {}) if k.startswith("val/") and k != "val/loss"})
    table = Table(title="trained decoders: validation losses at the best epoch (compare reconstruction across recipes)")
    table.add_column("decoder")
    for t in terms:
        table.add_column(t.split("/", 1)[1], justify="right")
    for col in ("total", "epochs", "seconds", "MLflow run id"):
        table.add_column(col, justify="right" if col != "MLflow run id" else "left", no_wrap=True)
    for r in runs:
        metrics = r.get("metrics", {})
        cells = [f"{metrics[t]:.4g}" if t in metrics else "-" for t in terms]
        table.add_row(
            str(r.get("label")),
            *cells,
            f"{r.get('val_loss', float('nan')):.4g}",
            str(r.get("epochs")),
            f"{r.get('seconds', 0):.1f}",
            str(r.get("run_id")),
        )
    return table


def mlflow_hint() -> str:
    from coreach.tracking import resolve_uri

    uri = resolve_uri(None)
    if uri.startswith("sqlite:"):
        return f"runs are in {uri}; browse them with: .venv/bin/mlflow ui --backend-store-uri {uri}"
    return f"runs are on {uri}"


def print_vetting(console, result: dict) -> None:
    from coreach.vetting.report import terminal_table

    console.print(terminal_table(result["summaries"]))
    console.print(f"report: {result['report']}")
    if result.get("vet_runs"):
        console.print("vetting runs in MLflow: " + ", ".join(f"{k}={v}" for k, v in result["vet_runs"].items()))
