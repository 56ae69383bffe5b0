"""Streams onto the schema's uniform time grid: positions interpolated linearly, commands and sticks held."""

from __future__ import annotations

import math

import numpy as np


def uniform_grid(t0: float, t1: float, dt: float) -> np.ndarray:
    """t0, t0 + dt, ... up to t1 (inclusive within a nanosecond, so a grid point on t1 is not lost to rounding)."""
    count = math.floor((t1 - t0) / dt + 1e-9) + 1
    return t0 + dt * np.arange(count, dtype=np.float64)


def interpolate(t: np.ndarray, values: np.ndarray, grid: np.ndarray) -> np.ndarray:
    """Piecewise-linear values [M, w] at grid times (t increasing; the grid lies within [t[0], t[-1]])."""
    return np.stack([np.interp(grid, t, values[:, j]) for j in range(values.shape[1])], axis=1)


def hold(t: np.ndarray, values: np.ndarray, grid: np.ndarray, before: float = 0.0) -> np.ndarray:
    """The last value published at or before each grid time [M, w]; `before` until the first message
    (no command or stick received yet means standing still)."""
    idx = np.searchsorted(t, grid, side="right") - 1
    out = values[np.clip(idx, 0, None)].copy()
    out[idx < 0] = before
    return out


def forward_velocity(q: np.ndarray, dt: float) -> np.ndarray:
    """Joint velocities [M-1, n] that take each grid position to the next in one step: (q[k+1] - q[k]) / dt,
    the schema's convention q[k+1] = q[k] + qd[k] * dt."""
    return np.diff(q, axis=0) / dt


def labels_at(changes: list[tuple[float, str]], grid: np.ndarray) -> np.ndarray:
    """The goal label in force at each grid time; before the first label, the first label (a label is
    usually published just after the recording starts)."""
    times = np.array([c[0] for c in changes], dtype=np.float64)
    names = np.array([c[1] for c in changes], dtype=object)
    idx = np.clip(np.searchsorted(times, grid, side="right") - 1, 0, None)
    return names[idx]
