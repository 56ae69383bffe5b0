"""Separation figures of a vetting record: how close the links came to furniture, to each other and to the
person, contact and keep-out steps, time in the reduced-speed zone and speed excesses there."""

from __future__ import annotations

import math

import torch

from coreach.control.safety_filter import SEPARATION

__all__ = ["separation_summary", "flat_separation", "FIGURES"]

# key -> label, as tables and the report show them
FIGURES = {
    "min_furniture_m": "closest link to furniture (m)",
    "min_person_m": "closest link to the person (m)",
    "min_self_m": "closest non-adjacent links (m)",
    "contact_steps": "steps with a link touching furniture or another link",
    "contact_episodes": "episodes with a contact",
    "keep_out_steps": "steps with a link inside the person's keep-out zone",
    "zone_time_s": "time in the reduced-speed zone, mean per episode (s)",
    "excess_steps": "steps approaching the person faster than allowed",
    "held_share": "share of steps the separation filter scaled the command",
}


def _figures(sep_f, sep_p, sep_s, excess, limits, world: dict, dt: float) -> dict:
    def low(x):  # None when there is nothing to measure (JSON has no infinity)
        return float(x.min()) if x.numel() and bool(torch.isfinite(x).any()) else None

    contact = (sep_f < 0) | (sep_s < 0)  # [E, T+1]
    return {
        "episodes": int(sep_f.shape[0]),
        "min_furniture_m": low(sep_f),
        "min_person_m": low(sep_p),
        "min_self_m": low(sep_s),
        "contact_steps": int(contact.sum()),
        "contact_episodes": int(contact.any(dim=-1).sum()),
        "keep_out_steps": int((sep_p < world["keep_out"]).sum()),
        "zone_time_s": float((sep_p < world["reduced_zone"]).sum(dim=-1).double().mean() * dt) if sep_p.numel() else 0.0,
        "excess_steps": int(excess.sum()),
        "held_share": float(((limits & SEPARATION) > 0).double().mean()) if limits.numel() else 0.0,
    }


def separation_summary(record) -> dict | None:
    """Overall and per final goal (None when the record's scene has no bodies)."""
    x = record.extras if isinstance(record.extras, dict) else {}
    world = x.get("world")
    if not world:
        return None
    sep_f, sep_p, sep_s = (torch.as_tensor(x[k]) for k in ("sep_furniture", "sep_person", "sep_self"))
    excess, limits = torch.as_tensor(x["person_excess"]), torch.as_tensor(x["limits"]).to(torch.int64)
    out = {"world": world, "all": _figures(sep_f, sep_p, sep_s, excess, limits, world, record.dt), "per_goal": {}}
    for g, name in enumerate(record.goal_names):
        m = record.goal_final == g
        if bool(m.any()):
            out["per_goal"][name] = _figures(sep_f[m], sep_p[m], sep_s[m], excess[m], limits[m], world, record.dt)
    return out


def flat_separation(summary: dict | None) -> dict[str, float]:
    """separation/<figure> and separation/<goal>/<figure> for MLflow (finite values only)."""
    if not summary:
        return {}
    out = {}
    for scope, figs in [("", summary["all"])] + [(f"{g}/", f) for g, f in summary["per_goal"].items()]:
        for k, v in figs.items():
            if isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(float(v)):
                out[f"separation/{scope}{k}"] = float(v)
    return out
