"""What every interface shares (the decoder wing's and the baseline plugins'): the stick's size, candidate
sticks per episode, and the check of a positive option."""

from __future__ import annotations

import math

from torch import Tensor

from coreach.errors import ConfigError

STICK_DIM = 2  # a 2-axis joystick


def check_positive(where: str, value: float, minimum: float = 0.0, strict: bool = True) -> float:
    """A finite float above (or, with strict=False, at least) `minimum`, or a ConfigError naming the option."""
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise ConfigError(where, f"expected a number, got {value!r}") from None
    ok = out > minimum if strict else out >= minimum
    if isinstance(value, bool) or not math.isfinite(out) or not ok:
        relation = ">" if strict else ">="
        raise ConfigError(where, f"expected a finite number {relation} {minimum}, got {value!r}")
    return out


def episode_sticks(stick: Tensor, n_episodes: int, where: str) -> Tensor:
    """Candidate sticks as [E, K, 2]: the same K candidates for every episode ([K, 2], what the operator
    evaluates) or one set per episode ([E, K, 2], e.g. the perturbed stick actually sent)."""
    if stick.ndim == 2 and stick.shape[-1] == STICK_DIM:
        return stick[None].expand(n_episodes, -1, -1)
    if stick.ndim == 3 and stick.shape[0] == n_episodes and stick.shape[-1] == STICK_DIM:
        return stick
    raise ConfigError(
        where, f"expected sticks of shape [K, {STICK_DIM}] or [{n_episodes}, K, {STICK_DIM}], got {tuple(stick.shape)}"
    )
