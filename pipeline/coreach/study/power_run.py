"""`coreach study power`: coverage of the analysis' intervals and power by simulation, over a frozen plan's
structure and the study config's planted population; tables, a plot and an HTML page under the version's
folder."""

from __future__ import annotations

import math
import time
from pathlib import Path

import pandas as pd

from coreach.errors import ConfigError
from coreach.study.coverage import run_coverage
from coreach.study.files import private_folder, write_private
from coreach.study.plan import PLAN_FILE, compose_study, latest_folder, read_plan
from coreach.study.planted import population_from, structure_of
from coreach.study.power import run_power, smallest_n
from coreach.study.power_report import figure_png, power_figure, render

POWER_FOLDER = "power"


def default_counts(sequences: int, steps: int = 5) -> list[int]:
    """Multiples of the Williams design's sequence count (balanced orders): 1x to 5x; at least 2 people."""
    return sorted({max(2, sequences * k) for k in range(1, steps + 1)})


def check_request(studies: int, counts: list[int]) -> None:
    if studies < 1:
        raise ConfigError("--studies", f"{studies}: expected at least 1 simulated study")
    if not counts:
        raise ConfigError("--participants", "no participant count; expected e.g. 6,12,18")
    small = [n for n in counts if n < 2]
    if small:
        raise ConfigError("--participants", f"{small[0]}: expected counts of at least 2 participants (the "
                                            "mixed model and the paired tests need two)")  # fmt: skip


def records(frame: pd.DataFrame) -> list[dict]:
    """Rows for JSON: NaN becomes null."""
    return [{k: (None if isinstance(v, float) and math.isnan(v) else v) for k, v in row.items()}
            for row in frame.to_dict("records")]  # fmt: skip


def run_power_study(root: Path, name: str, version: int | None = None, studies: int = 200,
                    counts: list[int] | None = None, seed: int | None = None, out: Path | None = None,
                    overrides: list[str] | None = None, progress=None) -> dict:  # fmt: skip
    """Everything the command does; `progress(total)` returns a callable advancing by one study (or None)."""
    folder = latest_folder(root, name, version)
    document = read_plan(folder / PLAN_FILE)
    plan = document["plan"]
    structure = structure_of(plan)
    counts = sorted(set(counts)) if counts is not None else default_counts(structure.sequences)
    check_request(studies, counts)
    population = population_from(compose_study(name, list(overrides or []))["planted"], structure)
    seed = int(plan["config"]["seed"]) if seed is None else seed
    t0 = time.perf_counter()
    advance = progress(studies * (1 + len(counts))) if progress else None
    coverage = run_coverage(population, structure, structure.participants, studies, seed, advance)
    power = run_power(population, structure, counts, studies, seed, advance=advance)
    seconds = time.perf_counter() - t0
    out = private_folder(out or folder / POWER_FOLDER)
    png = figure_png(power_figure(power))
    summary = {
        "study": plan["name"], "version": document["version"], "plan_sha256": document["sha256"],
        "studies": studies, "seed": seed, "participants": structure.participants,
        "reference": coverage["reference"], "truth": coverage["truth"], "seconds": round(seconds, 2),
        "power_question": {"first": population.first, "second": population.second,
                           "difference_s": population.difference_s},
        "coverage": records(coverage["table"]), "power": records(power), "smallest_n": smallest_n(power),
        "balanced_counts": [n for n in counts if n % structure.sequences == 0],
    }
    files = {"coverage.csv": coverage["table"].to_csv(index=False), "power.csv": power.to_csv(index=False),
             "power.png": png, "power.html": render(summary, coverage["table"], power, png)}  # fmt: skip
    for file, data in files.items():
        write_private(out / file, data)
    summary["files"] = [str(out / f) for f in files]
    return summary
