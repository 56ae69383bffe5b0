"""Power by simulation: for a stated difference in completion time between two conditions, the share of
simulated studies in which the analysis' tests reject at alpha 0.05, per number of participants."""

from __future__ import annotations

import numpy as np
import pandas as pd

from coreach.study import models, paired
from coreach.study.coverage import share_interval
from coreach.study.planted import POWER_STREAM, Population, Structure, generate, study_rng, with_difference

ALPHA = 0.05
TARGET = 0.80  # common practice (Cohen 1988): plan for at least 80% power
TESTS = {"mixed": "mixed model, the time effect's Wald p (two-sided)",
         "wilcoxon_holm": "Wilcoxon signed-rank on participant means, Holm over every pair (two-sided)"}  # fmt: skip


def pvalues(frame: pd.DataFrame, conditions: list[str], first: str, second: str) -> dict:
    """The two tests' p-values for `first` against `second` in one study, from the analysis' own functions:
    the mixed model's condition effect with `second` as reference, and the Holm-adjusted Wilcoxon p of the
    pair among all pairs of conditions (what the report shows)."""
    tm = models.time_model(frame, conditions, second)
    mixed = next((e["p"] for e in tm["effects"] if e["condition"] == first), np.nan)
    wide = paired.per_participant(frame[frame["success"] == 1], "time_s", conditions)
    table = paired.pairwise(wide, np.random.default_rng(0), resamples=0) if len(wide) else pd.DataFrame()
    holm = np.nan
    for _, row in table.iterrows():
        if {row["first"], row["second"]} == {first, second}:
            holm = row["p_holm"]
    return {"mixed": float(mixed), "wilcoxon_holm": float(holm)}


def run_power(pop: Population, structure: Structure, counts: list[int], studies: int, seed: int,
              differences: list[float] | None = None, advance=None) -> pd.DataFrame:  # fmt: skip
    """One row per (difference, participant count, test): rejections, power and its Wilson interval. A study
    in which a test could not be computed counts as not rejecting (and is counted in `not_computed`)."""
    conditions = list(structure.conditions)
    rows = []
    for k, difference in enumerate(differences if differences is not None else [pop.difference_s]):
        population = with_difference(pop, difference)
        for n in counts:
            p = {test: [] for test in TESTS}
            for i in range(studies):
                frame = generate(population, structure, n, study_rng(seed, (POWER_STREAM, k, n), i))
                for test, value in pvalues(frame, conditions, pop.first, pop.second).items():
                    p[test].append(value)
                if advance:
                    advance()
            for test, values in p.items():
                values = np.asarray(values, float)
                hits = int(np.sum(values < ALPHA))  # nan < alpha is False: not computed, not rejected
                lo, hi = share_interval(hits, studies)
                rows.append({"first": pop.first, "second": pop.second, "difference_s": difference,
                             "participants": n, "test": test, "studies": studies, "rejections": hits,
                             "power": hits / studies, "power_lo": lo, "power_hi": hi,
                             "not_computed": int(np.isnan(values).sum())})  # fmt: skip
    return pd.DataFrame(rows)


def smallest_n(table: pd.DataFrame, target: float = TARGET) -> dict:
    """Per difference and test, the smallest participant count whose simulated power reaches `target` (None
    when no count tried does)."""
    out = {}
    for (difference, test), g in table.groupby(["difference_s", "test"], sort=False):
        reached = g[g["power"] >= target]["participants"]
        out.setdefault(float(difference), {})[test] = int(reached.min()) if len(reached) else None
    return out
