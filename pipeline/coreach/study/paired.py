"""Paired comparisons of conditions over participants: Friedman, Wilcoxon signed-rank, effect sizes."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pandas as pd
from scipy import stats

from coreach.study.holm import holm


def per_participant(frame: pd.DataFrame, outcome: str, conditions: list[str]) -> pd.DataFrame:
    """Participants x conditions: each participant's mean `outcome` per condition, only participants with a
    value in every condition (the paired tests need complete blocks; who was left out is reported)."""
    wide = frame.pivot_table(index="participant", columns="condition", values=outcome, aggfunc="mean")
    wide = wide.reindex(columns=[c for c in conditions if c in wide.columns])
    return wide.dropna(axis=0, how="any")


def friedman(wide: pd.DataFrame) -> dict:
    """Friedman's test over the rows (participants) of a participants x conditions table."""
    k, n = wide.shape[1], wide.shape[0]
    if k < 3 or n < 2:  # scipy needs three conditions; two are the Wilcoxon test alone
        return {"statistic": math.nan, "p": math.nan, "n": n, "k": k, "note": "needs >= 3 conditions, >= 2 people"}
    res = stats.friedmanchisquare(*[wide[c].to_numpy() for c in wide.columns])
    return {"statistic": float(res.statistic), "p": float(res.pvalue), "n": n, "k": k, "note": ""}


def rank_biserial(d: np.ndarray) -> float:
    """Matched-pairs rank-biserial correlation (Kerby 2014): (sum of ranks of positive differences - sum of
    ranks of negative ones) / total rank sum, zero differences dropped as in the Wilcoxon test; in [-1, 1]."""
    d = d[d != 0]
    if len(d) == 0:
        return 0.0
    ranks = stats.rankdata(np.abs(d))
    return float((ranks[d > 0].sum() - ranks[d < 0].sum()) / ranks.sum())


def mean_difference(d: np.ndarray, level: float = 0.95) -> tuple[float, float, float]:
    """Mean of the paired differences with its t interval (df = n - 1)."""
    n = len(d)
    mean = float(np.mean(d))
    if n < 2:
        return mean, math.nan, math.nan
    half = stats.t.ppf(0.5 + level / 2, n - 1) * float(np.std(d, ddof=1)) / math.sqrt(n)
    return mean, mean - half, mean + half


def bootstrap_interval(d: np.ndarray, statistic, rng: np.random.Generator, resamples: int = 2000,
                       level: float = 0.95) -> tuple[float, float]:  # fmt: skip
    """Percentile bootstrap interval of `statistic(d)`, participants resampled with replacement."""
    if len(d) < 2 or resamples < 1:
        return math.nan, math.nan
    draws = rng.integers(0, len(d), size=(resamples, len(d)))
    values = np.array([statistic(d[idx]) for idx in draws])
    lo, hi = np.quantile(values, [0.5 - level / 2, 0.5 + level / 2])
    return float(lo), float(hi)


def wilcoxon(x: np.ndarray, y: np.ndarray) -> tuple[float, float]:
    """Two-sided Wilcoxon signed-rank test of x - y (scipy's defaults: exact for small samples without ties
    or zeros); (nan, nan) when every difference is zero, where the test is undefined."""
    d = np.asarray(x, float) - np.asarray(y, float)
    if len(d) == 0 or np.all(d == 0):
        return math.nan, math.nan
    res = stats.wilcoxon(x, y)
    return float(res.statistic), float(res.pvalue)


def pairwise(wide: pd.DataFrame, rng: np.random.Generator, resamples: int = 2000) -> pd.DataFrame:
    """Every pair of conditions: Wilcoxon signed-rank (Holm-adjusted over the pairs), the paired mean
    difference (first minus second) with its t interval, the rank-biserial correlation with a bootstrap
    interval."""
    rows = []
    for a, b in itertools.combinations(wide.columns, 2):
        x, y = wide[a].to_numpy(float), wide[b].to_numpy(float)
        d = x - y
        stat, p = wilcoxon(x, y)
        mean, lo, hi = mean_difference(d)
        r = rank_biserial(d)
        r_lo, r_hi = bootstrap_interval(d, rank_biserial, rng, resamples)
        rows.append({"first": a, "second": b, "n": len(d), "wilcoxon_W": stat, "p": p,
                     "mean_difference": mean, "mean_difference_lo": lo, "mean_difference_hi": hi,
                     "rank_biserial": r, "rank_biserial_lo": r_lo, "rank_biserial_hi": r_hi})  # fmt: skip
    out = pd.DataFrame(rows)
    if len(out):
        out.insert(out.columns.get_loc("p") + 1, "p_holm", holm(out["p"].to_numpy()))
    return out
