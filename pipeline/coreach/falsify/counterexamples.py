"""Counterexample suites: the failures a search found, as a suite file `coreach vet` and the release gate run,
kept per registered model name so that every later version meets all of them."""

from __future__ import annotations

import time
from pathlib import Path

import yaml

from coreach.vetting.report import write_text
from coreach.vetting.suite import Suite

__all__ = ["suite_data", "write_suite", "store_for_model", "model_name", "COUNTEREXAMPLES_DIR"]

COUNTEREXAMPLES_DIR = Path(".coreach") / "counterexamples"


def model_name(reference: str) -> str | None:
    """The registered model's name for models:/NAME@ALIAS, models:/NAME/VERSION or NAME@ALIAS; None otherwise."""
    rest = reference[len("models:/"):] if reference.startswith("models:/") else reference
    if "@" in rest:
        return rest.split("@", 1)[0] or None
    if reference.startswith("models:/") and "/" in rest:
        return rest.rsplit("/", 1)[0] or None
    return None


def suite_data(base: Suite, name: str, cases: list[dict], repeats: int, found_by: dict) -> dict:
    """A flat suite file (what coreach.vetting.suite.suite_from_dict and `coreach vet suite=<file>` read): the
    base suite's scene, operator, horizon and tolerances, no layout or start jitter of its own (each case
    carries its shift), `repeats` episodes per case (the operator's own randomness still varies)."""
    return {
        "name": name,
        "scenario": base.scenario,
        "operator": dict(base.operator),
        "goals": None,
        "layout_offset": list(base.layout_offset),
        "layout_jitter": 0.0,
        "start": base.start,
        "start_jitter": 0.0,
        "episodes": int(repeats),
        "seed": int(base.seed),
        "horizon_s": float(base.horizon_s),
        "dt": base.dt,
        "tolerances": base.tolerances,
        "candidates_per_axis": int(base.candidates_per_axis),
        "cases": [dict(c) for c in cases],
        "found_by": found_by,
    }


def write_suite(path: Path, data: dict) -> Path:
    """Write the suite file atomically (temp file, then rename); `found_by` goes into the header comment, since
    the suite schema has no such key."""
    found = data.pop("found_by", {})
    header = "# A counterexample suite written by coreach falsify: run it with coreach vet suite=<this file>.\n"
    header += "".join(f"# {k}: {v}\n" for k, v in found.items())
    return write_text(path, header + yaml.safe_dump(data, sort_keys=False))


def store_for_model(model: str, source: Path, root: Path | None = None) -> Path:
    """Copy a counterexample suite into the model's collection (.coreach/counterexamples/<model>/)."""
    target = (root or COUNTEREXAMPLES_DIR) / model / f"{time.strftime('%Y%m%d-%H%M%S')}-{source.stem}.yaml"
    return write_text(target, source.read_text())
