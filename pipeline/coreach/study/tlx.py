"""Raw NASA-TLX: the unweighted mean of the six 0-100 subscales."""

from __future__ import annotations

import math

import pandas as pd

from coreach.errors import DataError

# Hart & Staveland (1988) subscales; "raw" TLX (Hart 2006) drops the pairwise weighting and averages them
SUBSCALES = ("mental", "physical", "temporal", "performance", "effort", "frustration")
COLUMNS = tuple(f"tlx_{s}" for s in SUBSCALES)


def raw_tlx(values: dict[str, float], where: str = "tlx") -> float:
    """The raw TLX of one rating: every subscale given, each in [0, 100] (else one-line DataError)."""
    total = 0.0
    for s in SUBSCALES:
        v = values.get(s, values.get(f"tlx_{s}"))
        try:
            v = float(v)
        except (TypeError, ValueError):
            raise DataError(where, f"TLX {s}: {v!r} is not a number; expected 0-100") from None
        if not math.isfinite(v) or not 0.0 <= v <= 100.0:
            raise DataError(where, f"TLX {s} = {v:g} is outside 0-100; the raw TLX subscales are rated 0-100")
        total += v
    return total / len(SUBSCALES)


def tlx_column(frame: pd.DataFrame, where: str = "trials") -> pd.Series:
    """Raw TLX per row of a long-format table (NaN where a row carries no rating; a partial or out-of-range
    rating is refused, naming the row, since a half-filled form is not a workload score)."""
    present = [c for c in COLUMNS if c in frame.columns]
    if not present:
        return pd.Series(float("nan"), index=frame.index, name="tlx")
    out = pd.Series(float("nan"), index=frame.index, name="tlx")
    rated = frame[present].notna().any(axis=1)
    for idx in frame.index[rated]:
        row = frame.loc[idx]
        label = row["_where"] if "_where" in frame.columns else f"{where} row {idx}"
        out[idx] = raw_tlx({c: row.get(c) for c in COLUMNS}, label)
    return out
