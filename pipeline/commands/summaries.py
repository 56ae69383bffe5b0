"""What a command prints when it is done: a table for people, or JSON alone on stdout for programs."""

from __future__ import annotations

import json

from rich.console import Console
from rich.table import Table


def print_summary(command: str, summaries: list[dict], as_json: bool) -> None:
    if as_json:
        payload = summaries[0] if (command == "demo" and len(summaries) == 1) else {"runs": summaries}
        print(json.dumps(payload, indent=2, default=str))
        return
    console = Console()
    if command == "train":
        console.print(training_table(summaries))
        if summaries:
            console.print(f"MLflow: {mlflow_hint()}")
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
            for line in s.get("next_steps", []):
                console.print(line)


def training_table(runs: list[dict]) -> Table:
    table = Table(title="trained decoders (lower validation loss is better within a loss recipe)")
    for col in ("decoder", "val loss", "per term (val, best epoch)", "epochs", "seconds", "MLflow run id"):
        table.add_column(col)
    for r in runs:
        metrics = r.get("metrics", {})
        terms = ", ".join(
            f"{k.split('/', 1)[1]}={v:.4g}" for k, v in sorted(metrics.items()) if k.startswith("val/") and k != "val/loss"
        )
        table.add_row(
            str(r.get("label")),
            f"{r.get('val_loss', float('nan')):.4f}",
            terms,
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
