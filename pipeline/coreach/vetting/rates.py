"""Success proportions with their Wilson score intervals, and the steps of a rollout that count as visited."""

from __future__ import annotations

import math
from dataclasses import dataclass
from statistics import NormalDist

import torch
from torch import Tensor

from coreach.vetting.records import RolloutRecord


@dataclass(frozen=True)
class Rate:
    """A success proportion with its Wilson score interval."""

    value: float
    lo: float
    hi: float
    n: int


def wilson_interval(successes: int, n: int, confidence: float = 0.95) -> tuple[float, float]:
    """Wilson (1927) score interval for a binomial proportion; (0, 1) when n = 0 (nothing observed).

    Unlike the normal-approximation interval it stays inside [0, 1] and does not collapse to a point at 0 or
    n successes, which matters for the small per-cell counts of a vetting suite.
    """
    successes, n = int(successes), int(n)
    if n < 0 or not 0 <= successes <= max(n, 0):
        raise ValueError(f"expected 0 <= successes <= n, got successes={successes}, n={n}")
    if n == 0:
        return 0.0, 1.0
    z = NormalDist().inv_cdf(0.5 + confidence / 2.0)
    p = successes / n
    z2n = z * z / n
    centre = (p + z2n / 2.0) / (1.0 + z2n)
    half = z / (1.0 + z2n) * math.sqrt(p * (1.0 - p) / n + z2n / (4.0 * n))
    # At 0 or n successes the bound is exactly 0 or 1; rounding would otherwise leave a 1e-17 there.
    lo = 0.0 if successes == 0 else max(0.0, centre - half)
    hi = 1.0 if successes == n else min(1.0, centre + half)
    return lo, hi


def rate(successes: Tensor, confidence: float = 0.95) -> Rate:
    """Proportion of True in a bool tensor (any shape) with its Wilson interval."""
    n = int(successes.numel())
    k = int(successes.sum())
    lo, hi = wilson_interval(k, n, confidence)
    return Rate(k / n if n else float("nan"), lo, hi, n)


def visited_steps(record: RolloutRecord) -> Tensor:
    """[E, T] bool: steps taken while the episode ran (before its success step, or all of them)."""
    T = record.limit_scaled.shape[1]
    end = torch.where(record.success, record.success_step.clamp(0, T), torch.full_like(record.success_step, T))
    return torch.arange(T)[None, :] < end[:, None]
