"""Vetting metrics: Wilson intervals against scipy and published values, the ultimate-bound fit on simulated
first-order systems with known k and w, and the summary of a hand-built rollout record."""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
import torch
from scipy.stats import binomtest

from coreach.errors import ConfigError
from coreach.vetting.metrics import (
    Tolerances,
    bound_by_confidence,
    flat_metrics,
    summarise,
    ultimate_bound,
)
from coreach.vetting.rates import rate, wilson_interval
from coreach.vetting.records import RolloutRecord

# ---- Wilson score interval ----


@pytest.mark.parametrize("k,n", [(0, 1), (1, 1), (3, 7), (0, 10), (10, 10), (37, 50), (150, 200), (999, 1000)])
@pytest.mark.parametrize("level", [0.9, 0.95, 0.99])
def test_wilson_matches_scipy(k, n, level):
    # Reference: scipy.stats.binomtest(k, n).proportion_ci(method="wilson") (no continuity correction).
    ref = binomtest(k, n).proportion_ci(confidence_level=level, method="wilson")
    lo, hi = wilson_interval(k, n, level)
    assert lo == pytest.approx(ref.low, abs=1e-12) and hi == pytest.approx(ref.high, abs=1e-12)


@pytest.mark.parametrize(
    "k,n,lo,hi",
    [
        # Newcombe (1998), Statistics in Medicine 17:857-872, Table II, score method without continuity
        # correction (values from memory, 4 decimals).
        (81, 263, 0.2553, 0.3662),
        (15, 148, 0.0624, 0.1605),
        (0, 20, 0.0, 0.1611),
        (1, 29, 0.0061, 0.1718),
        # 0 of 10: upper limit z^2 / (n + z^2) = 3.8415 / 13.8415 (closed form of the score interval at k = 0).
        (0, 10, 0.0, 0.2775),
    ],
)
def test_wilson_published_values(k, n, lo, hi):
    got = wilson_interval(k, n)
    assert got[0] == pytest.approx(lo, abs=6e-5) and got[1] == pytest.approx(hi, abs=6e-5)


def test_rate_and_edge_cases():
    r = rate(torch.tensor([True, False, True, True]))
    assert (r.value, r.n) == (0.75, 4)
    assert (r.lo, r.hi) == wilson_interval(3, 4)
    empty = rate(torch.zeros(0, dtype=torch.bool))
    assert empty.n == 0 and math.isnan(empty.value) and (empty.lo, empty.hi) == (0.0, 1.0)
    with pytest.raises(ValueError):
        wilson_interval(5, 4)


# ---- ultimate bound ----


def simulate(k: float, w: float, dt: float, E: int, T: int, disturbance: str, seed: int = 0, exact: bool = True,
             jumps: dict | None = None):
    """Error traces [E, T+1] of e' = -k e + d, d held constant over each step (|d| <= w).

    exact: the zero-order-hold solution e_{t+1} = a e_t + (1 - a) d_t / k, a = exp(-k dt); else Euler.
    jumps: {(episode, step): size} added to e at that step (a target that moves), decaying like the rest.
    """
    g = torch.Generator().manual_seed(seed)
    e = torch.empty(E, T + 1, dtype=torch.float64)
    e[:, 0] = 0.5 + 0.5 * torch.rand(E, generator=g, dtype=torch.float64)
    a = math.exp(-k * dt)
    for t in range(T):
        if disturbance == "constant":  # the worst case: a steady push of the full size w
            d = torch.full((E,), w, dtype=torch.float64)
        else:  # a bounded random signal, uniform in [-w, w]
            d = w * (2 * torch.rand(E, generator=g, dtype=torch.float64) - 1)
        e[:, t + 1] = a * e[:, t] + (1 - a) * d / k if exact else e[:, t] + dt * (-k * e[:, t] + d)
        for (ep, step), size in (jumps or {}).items():
            if step == t + 1:
                e[ep, t + 1] += size
    return e


# Uniform ultimate boundedness (Khalil, Nonlinear Systems, 3rd ed., sec. 4.8): for e' = -k e + d with
# |d| <= w, every solution ends up in |e| <= w / k. For k = 2, w = 0.1 the bound is 0.05 m.
@pytest.mark.parametrize("disturbance", ["constant", "random"])
@pytest.mark.parametrize("exact", [True, False])
def test_ultimate_bound_recovers_w_over_k(disturbance, exact):
    k, w, dt = 2.0, 0.1, 0.1
    e = simulate(k, w, dt, E=20, T=120, disturbance=disturbance, exact=exact)
    k_hat, w_hat, bound = ultimate_bound(e, dt)
    # Uniform d: the 95th percentile of |d| is 0.95 w, hence 15% rather than 10% on the random case.
    tol = 0.10 if disturbance == "constant" else 0.15
    assert bound == pytest.approx(w / k, rel=tol)
    assert k_hat == pytest.approx(k, rel=0.15)  # Euler data read as a sampled system: about 12% off at k dt = 0.2
    assert w_hat <= w * 1.15
    # Every trace does settle inside the estimated bound (plus the step-to-step spread of the random case).
    assert float(e[:, -20:].abs().max()) <= bound * (1.0 + tol) + 1e-12


def test_ultimate_bound_ignores_a_few_jumps():
    k, w, dt = 2.0, 0.1, 0.1
    # Two goal switches: the target jumps, the error with it, then decays again.
    e = simulate(k, w, dt, E=20, T=120, disturbance="random", seed=1, jumps={(3, 40): 0.3, (11, 70): 0.3})
    k_hat, w_hat, bound = ultimate_bound(e, dt)
    assert bound == pytest.approx(w / k, rel=0.2)
    x, y = e[:, :-1], (e[:, 1:] - e[:, :-1]) / dt
    assert float((y + k * x).abs().max()) > 10 * w  # the maximum would have been wrecked by the jumps


def test_ultimate_bound_masks_and_degenerate_cases():
    k, w, dt = 2.0, 0.1, 0.1
    e = simulate(k, w, dt, E=4, T=60, disturbance="constant")
    full = ultimate_bound(e, dt)
    mask = torch.ones_like(e, dtype=torch.bool)
    assert ultimate_bound(e, dt, mask) == pytest.approx(full)
    assert ultimate_bound(e, dt, mask[:, :-1]) == pytest.approx(full)
    assert all(math.isnan(v) for v in ultimate_bound(e, dt, torch.zeros_like(mask)))
    growing = torch.exp(0.5 * torch.arange(50, dtype=torch.float64) * dt)[None].repeat(3, 1)
    k_hat, _, bound = ultimate_bound(growing, dt)
    assert k_hat < 0 and bound == float("inf")


# ---- the summary of a record ----


def make_record(E: int = 40, T: int = 60, dt: float = 0.1, seed: int = 0, stick_gain: float = 0.4) -> RolloutRecord:
    """A hand-built record: known successes per switch cell, straight or L-shaped paths, limit_scaled that
    only happen after success (so must not count), and errors from a first-order system whose decay rate
    depends on belief confidence (k = 1 /s below 0.5, k = 4 /s at 0.95 and above, w = 0.1 m/s)."""
    g = torch.Generator().manual_seed(seed)
    G = 3
    switch_fraction = torch.tensor([float("nan")] * 10 + [0.2] * 15 + [0.8] * 15)
    success = torch.zeros(E, dtype=torch.bool)
    success[:8] = True  # none: 8 / 10
    success[10:22] = True  # 0.2: 12 / 15
    success[25:31] = True  # 0.8: 6 / 15
    success_step = torch.where(success, 20 + torch.arange(E) % 30, torch.full((E,), -1))
    goal_final = torch.arange(E) % G

    # Paths: odd episodes straight along x (0.3 m), even ones L-shaped (0.3 m along x, then 0.4 m along y).
    path = torch.zeros(E, T + 1, 3, dtype=torch.float64)
    for e in range(E):
        s = int(success_step[e]) if success[e] else T
        f = torch.linspace(0, 1, s + 1, dtype=torch.float64)
        if e % 2:
            path[e, : s + 1, 0] = 0.3 * f
        else:
            half = s // 2
            path[e, : half + 1, 0] = torch.linspace(0, 0.3, half + 1, dtype=torch.float64)
            path[e, half : s + 1, 0] = 0.3
            path[e, half : s + 1, 1] = torch.linspace(0, 0.4, s - half + 1, dtype=torch.float64)
        path[e, s + 1 :] = path[e, s]

    belief = torch.full((E, T + 1, G), 1.0 / G, dtype=torch.float64)
    high = torch.tensor([0.97, 0.015, 0.015], dtype=torch.float64)
    belief[:, T // 2 :, :] = high  # confident on goal 0 in the second half
    error = torch.empty(E, T + 1, dtype=torch.float64)
    error[:, 0] = 1.0
    for t in range(T):
        k = 1.0 if t < T // 2 else 4.0
        a = math.exp(-k * dt)
        d = 0.1 * (2 * torch.rand(E, generator=g, dtype=torch.float64) - 1)
        error[:, t + 1] = a * error[:, t] + (1 - a) * d / k

    limit_scaled = torch.zeros(E, T, dtype=torch.bool)
    limit_scaled[:, -1] = True  # the last step: after success for every success, counted only for failures
    limit_scaled[0, 0] = True  # one real intervention in a successful episode
    reachable = torch.ones(E, T, dtype=torch.bool)
    reachable[:, 1::4] = False
    return RolloutRecord(
        interface="test", suite="unit", goal_names=["a", "b", "c"], dt=dt,
        goal_initial=goal_final.clone(), goal_final=goal_final, switch_step=torch.full((E,), -1),
        switch_fraction=switch_fraction, success=success, success_step=success_step, ee_path=path,
        belief=belief, belief_at_switch=torch.where(torch.isnan(switch_fraction), float("nan"), 0.6),
        error=error, limit_scaled=limit_scaled, reachable=reachable,
        stick_gain=torch.full((E, T), stick_gain, dtype=torch.float64), mode_switches=torch.arange(E) % 3,
    )  # fmt: skip


def test_summary_values():
    rec = make_record()
    s = summarise(rec)
    ref = binomtest(26, 40).proportion_ci(method="wilson")  # scipy as the reference interval
    assert s["success"]["value"] == pytest.approx(26 / 40) and s["success"]["n"] == 40
    assert s["success"]["lo"] == pytest.approx(ref.low) and s["success"]["hi"] == pytest.approx(ref.high)
    rec_cells = s["recovery"]
    assert set(rec_cells) == {"none", "0.2", "0.8"}
    assert (rec_cells["none"]["value"], rec_cells["0.2"]["n"], rec_cells["0.8"]["value"]) == (0.8, 15, 0.4)

    steps = rec.success_step[rec.success].numpy() * rec.dt
    t = s["time_to_success"]
    assert t["median"] == pytest.approx(np.median(steps))
    assert (t["q25"], t["q75"]) == pytest.approx(tuple(np.percentile(steps, [25, 75])))

    # Straight paths: efficiency 1; L-shaped ones: hypotenuse over the two legs, 0.5 / 0.7.
    idx = rec.success.nonzero().squeeze(-1).numpy()
    expected = np.mean([1.0 if i % 2 else 0.5 / 0.7 for i in idx])
    assert s["path_efficiency"]["mean"] == pytest.approx(expected, rel=1e-9)

    visited = sum(int(rec.success_step[e]) if rec.success[e] else rec.limit_scaled.shape[1] for e in range(40))
    assert s["limit_scaled"]["step_share"] == pytest.approx((14 + 1) / visited)  # 14 failures + episode 0
    assert s["limit_scaled"]["episodes_with_any"]["value"] == pytest.approx(15 / 40)
    assert s["reachability"]["share"] == pytest.approx(0.75, abs=0.02)
    assert s["stick_gain"]["median"] == pytest.approx(0.4) and not s["stick_gain"]["collapsed"]
    assert s["belief"]["at_switch_original_mean"] == pytest.approx(0.6) and s["belief"]["at_switch_n"] == 30
    on_final = rec.belief[torch.arange(40), :, rec.goal_final].numpy()
    np.testing.assert_allclose(s["belief"]["trace_mean"], on_final.mean(0))


def test_summary_flags_collapsed_stick_gain():
    assert summarise(make_record(stick_gain=0.005))["stick_gain"]["collapsed"]
    assert not summarise(make_record(stick_gain=0.005), {"collapse_stick_gain": 0.001})["stick_gain"]["collapsed"]


def test_bound_by_confidence_separates_the_regimes():
    rows = {r["bin"]: r for r in bound_by_confidence(make_record(E=60, T=80))}
    # Khalil's bound w/k per regime: 0.1 / 1 below 0.5 confidence, 0.1 / 4 at 0.95 and above; uniform d
    # puts the 95th percentile at 0.95 w.
    assert rows["0-0.5"]["bound"] == pytest.approx(0.1, rel=0.2)
    assert rows["0.95-1"]["bound"] == pytest.approx(0.025, rel=0.2)
    assert rows["0.5-0.8"]["n"] == 0 and math.isnan(rows["0.5-0.8"]["bound"])


def test_flat_metrics_and_tolerances():
    flat = flat_metrics(summarise(make_record()))
    assert flat["success/value"] == pytest.approx(0.65) and "recovery/0.8/hi" in flat
    # MLflow metric names: alphanumerics, underscores, dashes, periods, spaces and slashes (mlflow docs).
    assert all(re.fullmatch(r"[\w\-. /]+", k) and math.isfinite(v) for k, v in flat.items())
    assert Tolerances.coerce({"arrive_tol": 0.01}) == Tolerances()  # a suite's success tolerance is not ours
    with pytest.raises(ConfigError, match="confidence"):
        Tolerances.coerce({"confidence": 1.5})
