"""Coverage of the analysis' condition-effect intervals: repeated simulated studies with planted effects,
each analysed by the same model functions `coreach study analyze` uses (coreach.study.models)."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from statsmodels.stats.proportion import proportion_confint

from coreach.study import models
from coreach.study.analysis import default_reference
from coreach.study.planted import (COVERAGE_STREAM, Population, Structure, generate, study_rng,
                                   true_log_odds_effects, true_time_effects)  # fmt: skip

LEVEL = 0.95  # the analysis reports 95% intervals
# Wilson's score interval for a share: it keeps its nominal level better than the Wald interval near 0 or 1
# and at a few hundred draws (Brown, Cai & DasGupta 2001)
SHARE_METHOD = "wilson"


def share_interval(hits: int, total: int) -> tuple[float, float]:
    """The 95% interval of a share of `total` draws (statsmodels' Wilson interval); nan without draws."""
    if total == 0:
        return math.nan, math.nan
    lo, hi = proportion_confint(hits, total, alpha=1 - LEVEL, method=SHARE_METHOD)
    return float(lo), float(hi)


def analyse_one(frame: pd.DataFrame, conditions: list[str], reference: str, truth: dict) -> list[dict]:
    """One simulated study through the analysis' two models: a row per condition effect, with the true value
    and whether the interval covers it (or a row per model saying it could not be fitted)."""
    rows = []
    for scale, result in (("time_s", models.time_model(frame, conditions, reference)),
                          ("log_odds", models.success_model(frame, conditions, reference))):  # fmt: skip
        if not result["fitted"]:
            rows.append({"scale": scale, "condition": None, "fitted": False, "note": result.get("note", "")})
            continue
        for e in result["effects"]:
            true = truth[scale][e["condition"]]
            rows.append({"scale": scale, "condition": e["condition"], "fitted": True,
                         "converged": bool(result.get("converged", True)), "true": true,
                         "estimate": e["effect"], "lo": e["lo"], "hi": e["hi"], "p": e["p"],
                         "covered": bool(e["lo"] <= true <= e["hi"])})  # fmt: skip
    return rows


def truths(pop: Population, structure: Structure, reference: str) -> dict:
    """The values the two models aim at: planted seconds; population-averaged log-odds."""
    pa = true_log_odds_effects(pop, structure, reference)
    return {"time_s": true_time_effects(pop, structure.conditions, reference), "log_odds": pa["effects"],
            "nonadditivity": pa["nonadditivity"]}  # fmt: skip


def run_coverage(pop: Population, structure: Structure, participants: int, studies: int, seed: int,
                 advance=None) -> dict:  # fmt: skip
    """`studies` simulated studies of `participants` participants; the per-study rows and the summary."""
    conditions = list(structure.conditions)
    reference = default_reference(conditions)
    truth = truths(pop, structure, reference)
    rows = []
    for i in range(studies):
        frame = generate(pop, structure, participants, study_rng(seed, (COVERAGE_STREAM,), i))
        rows += [{"study": i, **row} for row in analyse_one(frame, conditions, reference, truth)]
        if advance:
            advance()
    per_study = pd.DataFrame(rows)
    return {"reference": reference, "truth": truth, "per_study": per_study,
            "table": coverage_table(per_study, studies)}  # fmt: skip


def coverage_table(per_study: pd.DataFrame, studies: int) -> pd.DataFrame:
    """Per model scale and condition: how many studies were fitted, the share whose 95% interval covers the
    true value (with its Wilson interval), the share with the right sign (undefined for a true zero; the share
    of positive estimates is given for every effect), the share significant at 0.05, the mean estimate and
    its bias."""
    out = []
    fitted = per_study[per_study["fitted"]] if len(per_study) else per_study
    for (scale, condition), g in fitted.groupby(["scale", "condition"], sort=False):
        n, covered = len(g), int(g["covered"].sum())
        true = float(g["true"].iloc[0])
        right = int((np.sign(g["estimate"]) == np.sign(true)).sum()) if true != 0 else None
        lo, hi = share_interval(covered, n)
        out.append({"scale": scale, "condition": condition, "true": true, "studies": studies, "fitted": n,
                    "not_converged": int((~g["converged"]).sum()), "coverage": covered / n,
                    "coverage_lo": lo, "coverage_hi": hi,
                    "right_sign": math.nan if right is None else right / n,
                    "positive": float((g["estimate"] > 0).mean()), "significant": float((g["p"] < 0.05).mean()),
                    "mean_estimate": float(g["estimate"].mean()), "bias": float(g["estimate"].mean() - true),
                    "mean_width": float((g["hi"] - g["lo"]).mean())})  # fmt: skip
    return pd.DataFrame(out)
