"""Closed-loop vetting metrics from a RolloutRecord: rates with Wilson intervals, timing, safety, stick_gain,
and an empirical ultimate bound on the distance to the waypoint as a function of belief confidence.

Every number is plain Python (float, int, bool, list, dict) so a summary can go to JSON and MLflow as is.
A step counts as visited while its episode runs: up to its success step, or the whole horizon otherwise.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, fields
from statistics import NormalDist

import torch
from torch import Tensor

from coreach.errors import ConfigError
from coreach.vetting.diagnosis import NEEDED, diagnose, flat_diagnosis
from coreach.vetting.rates import rate, visited_steps
from coreach.vetting.records import RolloutRecord
from coreach.vetting.separation_metrics import flat_separation, separation_summary

MIN_FIT_SAMPLES = 8  # transitions below which a decay-rate fit is reported as nan rather than guessed


@dataclass(frozen=True)
class Tolerances:
    """Thresholds of the summary. collapse_stick_gain: median stick gain (rad/s per unit stick) below which the
    latent counts as collapsed (at 0.02 a full deflection along the stick's weakest direction asks for joint
    velocities of about 1 deg/s in norm: barely visible motion); confidence: level of every interval;
    bins: edges of the belief-confidence bins of the ultimate bound."""

    collapse_stick_gain: float = 0.02
    confidence: float = 0.95
    bins: tuple[float, ...] = (0.0, 0.5, 0.8, 0.95, 1.0)

    @classmethod
    def coerce(cls, value) -> Tolerances:
        """From None, a Tolerances or a mapping; keys that are not thresholds of the summary (a suite's
        success tolerances, say) are left to their owners."""
        if value is None:
            return cls()
        if isinstance(value, cls):
            return value
        try:
            items = dict(value)
        except (TypeError, ValueError):
            raise ConfigError("tolerances", f"expected a mapping of thresholds, got {type(value).__name__}") from None
        known = {f.name for f in fields(cls)}
        out = cls(**{k: (tuple(v) if k == "bins" else float(v)) for k, v in items.items() if k in known})
        if not 0.0 < out.confidence < 1.0:
            raise ConfigError("tolerances.confidence", f"expected a level in (0, 1), got {out.confidence}")
        if len(out.bins) < 2 or any(b <= a for a, b in zip(out.bins, out.bins[1:])):
            raise ConfigError("tolerances.bins", f"expected at least 2 increasing edges, got {list(out.bins)}")
        return out


# ---- the ultimate bound of the distance to the waypoint ----


def ultimate_bound(error: Tensor, dt: float, mask: Tensor | None = None) -> tuple[float, float, float]:
    """Fit e' = -k e + d, |d| <= w, to error traces [E, T+1] (s between samples: dt) -> (k, w, w / k).

    For that model every trace ends up within w / k of zero whatever it started from: the ultimate bound
    of a uniformly ultimately bounded system (Khalil, Nonlinear Systems, 3rd ed., section 4.8).

    k: least squares of (e_{t+1} - e_t) / dt against e_t, with an intercept so a steady push (a disturbance
    with non-zero mean) does not bias the decay rate; the per-step slope b is read as the sampled system
    e_{t+1} = a e_t + (1 - a) d / k with a = 1 + b dt = exp(-k dt) (commands are held for a step), which is
    exact for piecewise-constant d and tends to k = -b as dt -> 0. d_t is recovered from the residual
    including the intercept. w: the 95th percentile of |d_t|, not the maximum: a handful of transitions
    (the step at which the operator changes goal or the target moves on to the fine motion) jump by design,
    and one such outlier would otherwise set the bound for the whole suite.

    mask: [E, T] transitions (t -> t+1) to use, or [E, T+1] valid states (a transition needs both ends).
    Returns nans with fewer than MIN_FIT_SAMPLES transitions or no spread in e; k <= 0 (no decay) gives an
    infinite bound.
    """
    e = error.to(torch.float64)
    x, y = e[:, :-1], (e[:, 1:] - e[:, :-1]) / dt  # [E, T] each
    use = torch.isfinite(x) & torch.isfinite(y)
    if mask is not None:
        m = mask.to(torch.bool)
        if m.shape == e.shape:
            m = m[:, :-1] & m[:, 1:]
        elif m.shape != x.shape:
            raise ValueError(f"mask must be [E, T] or [E, T+1] for error {tuple(e.shape)}, got {tuple(m.shape)}")
        use &= m
    x, y = x[use], y[use]
    nan = float("nan")
    if x.numel() < MIN_FIT_SAMPLES or float(x.var()) < 1e-18:
        return nan, nan, nan
    xc = x - x.mean()
    b = float((xc * (y - y.mean())).sum() / (xc * xc).sum())
    a = 1.0 + b * dt
    if 0.0 < a < 1.0:
        k = -math.log(a) / dt
        to_d = k * dt / (1.0 - a)  # residual of the per-step fit -> disturbance of the continuous model
    else:  # no decay (a >= 1) or overshooting every step (a <= 0): keep the direct reading
        k, to_d = -b, 1.0
    d = (y - b * x) * to_d  # [N], intercept included: it is part of the disturbance
    w = float(torch.quantile(d.abs(), 0.95))
    bound = w / k if k > 0 else float("inf")
    return k, w, bound


def confidence(belief: Tensor) -> Tensor:
    """Belief confidence [E, T+1]: the largest goal probability at each step."""
    return belief.max(dim=-1).values


def bound_by_confidence(record: RolloutRecord, bins=(0.0, 0.5, 0.8, 0.95, 1.0)) -> list[dict]:
    """Ultimate bound of the distance to the waypoint fitted separately on the transitions whose starting state's
    confidence falls in each bin [lo, hi) (the last bin includes hi)."""
    conf = confidence(record.belief)[:, :-1]  # [E, T]: confidence where each transition starts
    visited = visited_steps(record)
    out = []
    for i, (lo, hi) in enumerate(zip(bins, bins[1:])):
        last = i == len(bins) - 2
        in_bin = (conf >= lo) & ((conf <= hi) if last else (conf < hi))
        m = in_bin & visited
        k, w, bound = ultimate_bound(record.error, record.dt, m)
        out.append({"bin": f"{lo:g}-{hi:g}", "lo": float(lo), "hi": float(hi), "k": k, "w": w, "bound": bound,
                    "n": int(m.sum())})  # fmt: skip
    return out


# ---- the summary ----


def _quantiles(values: Tensor, qs: tuple[float, ...]) -> list[float]:
    if values.numel() == 0:
        return [float("nan")] * len(qs)
    return [float(v) for v in torch.quantile(values.to(torch.float64), torch.tensor(qs, dtype=torch.float64))]


def _path_efficiency(record: RolloutRecord) -> dict:
    """Straight-line distance start -> end of the final goal's fine motion over the path length (successes).

    The end point comes from record.extras["goal_targets"] [E, G, 2, 3] when the loop stores it, else from
    the tool position at success (within the success tolerance of that point).
    """
    idx = record.success.nonzero().squeeze(-1)
    if idx.numel() == 0:
        return {"mean": float("nan"), "n": 0}
    path = record.ee_path.to(torch.float64)
    steps = record.success_step[idx].clamp(min=0)
    targets = record.extras.get("goal_targets") if isinstance(record.extras, dict) else None
    if targets is not None:
        end = torch.as_tensor(targets, dtype=torch.float64)[idx, record.goal_final[idx], 1]  # [S, 3]
    else:
        end = path[idx, steps]
    seg = (path[idx, 1:] - path[idx, :-1]).norm(dim=-1)  # [S, T]
    length = (seg * (torch.arange(seg.shape[1])[None, :] < steps[:, None])).sum(-1)
    straight = (end - path[idx, 0]).norm(dim=-1)
    ok = length > 1e-9
    eff = straight[ok] / length[ok]
    return {"mean": float(eff.mean()) if eff.numel() else float("nan"), "n": int(eff.numel())}


def _recovery(record: RolloutRecord, level: float) -> dict[str, dict]:
    """Success among episodes sharing a switch fraction (rounded to 0.001); 'none' for no switch."""
    out = {}
    sf = record.switch_fraction.to(torch.float64)
    none = torch.isnan(sf)
    if bool(none.any()):
        out["none"] = asdict(rate(record.success[none], level))
    keys = torch.round(sf[~none] * 1000) / 1000
    for v in sorted(set(keys.tolist())):
        cell = (~none) & (torch.round(sf * 1000) / 1000 == v)
        out[f"{v:g}"] = asdict(rate(record.success[cell], level))
    return out


def _belief(record: RolloutRecord, level: float) -> dict:
    E = record.n_episodes
    on_final = record.belief[torch.arange(E), :, record.goal_final].to(torch.float64)  # [E, T+1]
    mean = on_final.mean(0)
    z = NormalDist().inv_cdf(0.5 + level / 2.0)
    half = z * on_final.std(0, correction=1) / math.sqrt(E) if E > 1 else torch.full_like(mean, float("nan"))
    at = record.belief_at_switch.to(torch.float64)
    at = at[torch.isfinite(at)]
    return {
        "trace_mean": mean.tolist(),
        "trace_lo": (mean - half).clamp(0, 1).tolist(),
        "trace_hi": (mean + half).clamp(0, 1).tolist(),
        "at_switch_original_mean": float(at.mean()) if at.numel() else float("nan"),
        "at_switch_n": int(at.numel()),
    }


def summarise(record: RolloutRecord, tolerances=None) -> dict:
    """Every metric of one interface on one suite (see the module docstring for what counts as visited)."""
    tol = Tolerances.coerce(tolerances)
    level = tol.confidence
    visited = visited_steps(record)  # [E, T]
    succ = record.success.nonzero().squeeze(-1)
    t_succ = record.success_step[succ].to(torch.float64) * record.dt
    q25, q50, q75 = _quantiles(t_succ, (0.25, 0.5, 0.75))

    gain = record.stick_gain.to(torch.float64)[visited]
    gain = gain[torch.isfinite(gain)]
    a05, a50 = _quantiles(gain, (0.05, 0.5))
    reach = record.reachable[visited]

    return {
        "interface": record.interface,
        "suite": record.suite,
        "n_episodes": record.n_episodes,
        "dt": float(record.dt),
        "goal_names": list(record.goal_names),
        "confidence_level": level,
        "success": asdict(rate(record.success, level)),
        "time_to_success": {"median": q50, "q25": q25, "q75": q75, "n": int(succ.numel())},
        "path_efficiency": _path_efficiency(record),
        "recovery": _recovery(record, level),
        "belief": _belief(record, level),
        "limit_scaled": {
            "step_share": float(record.limit_scaled[visited].float().mean()) if bool(visited.any()) else float("nan"),
            "episodes_with_any": asdict(rate((record.limit_scaled & visited).any(dim=-1), level)),
        },
        "stick_gain": {
            "median": a50,
            "p05": a05,
            "n": int(gain.numel()),
            "threshold": tol.collapse_stick_gain,
            "collapsed": bool(a50 < tol.collapse_stick_gain),  # a nan median (never computed) is not a verdict
        },
        "reachability": {"share": float(reach.float().mean()) if reach.numel() else float("nan"),
                         "n": int(reach.numel())},  # fmt: skip
        "mode_switches": {"mean": float(record.mode_switches.to(torch.float64).mean())},
        "ultimate_bound": bound_by_confidence(record, tol.bins),
        "diagnosis": _diagnosis(record, level),
        "separation": separation_summary(record),
    }


def _diagnosis(record: RolloutRecord, level: float) -> dict | None:
    """Why episodes failed (coreach.vetting.diagnosis), when the record carries the loop's extras."""
    if not isinstance(record.extras, dict) or any(k not in record.extras for k in NEEDED):
        return None
    return diagnose(record, level)


def flat_metrics(summary: dict) -> dict[str, float]:
    """Scalar metrics of a summary as MLflow-friendly name -> float (finite values only)."""
    out: dict[str, float] = {}

    def put(name: str, value) -> None:
        if isinstance(value, (bool, int, float)) and math.isfinite(float(value)):
            out[name] = float(value)

    for key in ("success", "time_to_success", "path_efficiency", "stick_gain", "reachability", "mode_switches"):
        for k, v in summary[key].items():
            put(f"{key}/{k}", v)
    for cell, r in summary["recovery"].items():
        for k in ("value", "lo", "hi", "n"):
            put(f"recovery/{cell}/{k}", r[k])
    put("limit_scaled/step_share", summary["limit_scaled"]["step_share"])
    for k, v in summary["limit_scaled"]["episodes_with_any"].items():
        put(f"limit_scaled/episodes_with_any/{k}", v)
    put("belief/at_switch_original_mean", summary["belief"]["at_switch_original_mean"])
    for row in summary["ultimate_bound"]:
        for k in ("k", "w", "bound", "n"):
            put(f"ultimate_bound/{row['bin']}/{k}", row[k])
    out.update(flat_separation(summary.get("separation")))
    if summary.get("diagnosis"):
        for k, v in flat_diagnosis(summary["diagnosis"]).items():
            put(k, v)
    return out
