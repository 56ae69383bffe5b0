"""Holm's step-down correction of p-values for several comparisons."""

from __future__ import annotations

import numpy as np


def holm(pvalues) -> np.ndarray:
    """Holm (1979) adjusted p-values: sort ascending, multiply the i-th smallest (0-based) by m - i, carry the
    running maximum forward so the adjusted values keep the p-values' order, cap at 1. NaN stays NaN."""
    p = np.asarray(pvalues, dtype=float)
    out = np.full(p.shape, np.nan)
    ok = np.flatnonzero(np.isfinite(p))
    m = len(ok)
    running = 0.0
    for rank, i in enumerate(ok[np.argsort(p[ok], kind="stable")]):
        running = max(running, min(1.0, (m - rank) * p[i]))
        out[i] = running
    return out
