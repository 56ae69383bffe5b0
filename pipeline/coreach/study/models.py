"""Regression models over all trials: a mixed model of completion time, a GEE of success."""

from __future__ import annotations

import math
import warnings

import pandas as pd
import statsmodels.api as sm
import statsmodels.formula.api as smf


def _design(frame: pd.DataFrame, conditions: list[str], reference: str) -> pd.DataFrame:
    """The rows with the condition as a categorical whose first level is the reference, so the model's
    treatment coding compares every condition with it (no quoting of level names inside the formula)."""
    levels = [reference, *[c for c in conditions if c != reference and c in set(frame["condition"])]]
    data = frame[frame["condition"].isin(levels)].copy()
    data["condition"] = pd.Categorical(data["condition"], categories=levels)
    data["task"] = data["task"].astype(str)
    return data


def _formula(outcome: str, data: pd.DataFrame) -> str:
    # tasks differ in length and difficulty; a fixed effect per task keeps that out of the condition effects
    return f"{outcome} ~ C(condition)" + (" + C(task)" if data["task"].nunique() > 1 else "")


def _condition_rows(params, conf, pvalues, reference: str, exp: bool) -> list[dict]:
    rows = []
    for name in params.index:
        if not name.startswith("C(condition)[T."):
            continue
        level = name[len("C(condition)[T."):-1]
        lo, hi = conf.loc[name]
        row = {"condition": level, "reference": reference, "effect": float(params[name]), "lo": float(lo),
               "hi": float(hi), "p": float(pvalues[name])}  # fmt: skip
        if exp:  # log-odds -> odds ratios (the interval's ends transform with it)
            row.update(odds_ratio=math.exp(row["effect"]), odds_ratio_lo=math.exp(row["lo"]),
                       odds_ratio_hi=math.exp(row["hi"]))  # fmt: skip
        rows.append(row)
    return rows


def time_model(frame: pd.DataFrame, conditions: list[str], reference: str, outcome: str = "time_s") -> dict:
    """Linear mixed model `outcome ~ condition + task` with a random intercept per participant (REML), fitted
    on successful trials (a failed trial has no completion time); condition effects in the outcome's units
    against `reference` with 95% Wald intervals."""
    data = _design(frame[frame["success"] == 1].dropna(subset=[outcome]), conditions, reference)
    if data["participant"].nunique() < 2 or data["condition"].nunique() < 2:
        return {"fitted": False, "note": "needs >= 2 participants and >= 2 conditions with successful trials",
                "effects": []}  # fmt: skip
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        fit = smf.mixedlm(_formula(outcome, data), data, groups=data["participant"]).fit(reml=True)
    return {"fitted": True, "converged": bool(fit.converged), "n": int(len(data)),
            "groups": int(data["participant"].nunique()), "group_variance": float(fit.cov_re.iloc[0, 0]),
            "residual_variance": float(fit.scale), "formula": _formula(outcome, data),
            "warnings": sorted({str(w.message).splitlines()[0] for w in caught}),
            "effects": _condition_rows(fit.params, fit.conf_int(), fit.pvalues, reference, exp=False)}  # fmt: skip


def success_model(frame: pd.DataFrame, conditions: list[str], reference: str) -> dict:
    """GEE of success (binomial family, logit link, exchangeable working correlation within a participant,
    robust standard errors); condition effects in log-odds against `reference` and as odds ratios, 95%
    intervals."""
    data = _design(frame, conditions, reference)
    data["success"] = data["success"].astype(float)
    rates = data.groupby("condition", observed=True)["success"].mean()
    if data["participant"].nunique() < 2 or len(rates) < 2:
        return {"fitted": False, "note": "needs >= 2 participants and >= 2 conditions", "effects": []}
    if ((rates == 0) | (rates == 1)).any():  # separation: the log-odds run off to infinity, no interval exists
        return {"fitted": False, "effects": [],
                "note": "a condition succeeded on every trial or on none; log-odds are not estimable (see the "
                        "success rates)"}  # fmt: skip
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        model = smf.gee(_formula("success", data), "participant", data, family=sm.families.Binomial(),
                        cov_struct=sm.cov_struct.Exchangeable())  # fmt: skip
        fit = model.fit()
    return {"fitted": True, "n": int(len(data)), "groups": int(data["participant"].nunique()),
            "formula": _formula("success", data), "within_correlation": float(model.cov_struct.dep_params),
            "warnings": sorted({str(w.message).splitlines()[0] for w in caught}),
            "effects": _condition_rows(fit.params, fit.conf_int(), fit.pvalues, reference, exp=True)}  # fmt: skip


def effects_frame(result: dict, model: str) -> pd.DataFrame:
    """A model's condition effects as a table (empty, with the note, when it could not be fitted)."""
    if not result["effects"]:
        return pd.DataFrame([{"model": model, "note": result.get("note", "")}])
    return pd.DataFrame([{"model": model, **row} for row in result["effects"]])
