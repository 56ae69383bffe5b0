"""Operator plugin: a simulated user choosing stick inputs with Boltzmann rationality, plus bias, tremor, delay.

Choice rule (Boltzmann rationality; Baker, Saxe & Tenenbaum 2009): among the M*K candidates (mode, stick) of
an episode, candidate i is chosen with probability exp(beta * value_i) / sum_j exp(beta * value_j), value
being the progress (m) toward the operator's goal that candidate would make in one step. Sampling uses the
Gumbel-max trick (argmax of beta * value + Gumbel noise), which draws exactly from that softmax with one
random tensor per step.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass, field

import torch
from torch import Tensor

from coreach.host.api import ConfigError
from coreach.host.api import integer, number

NO_INPUT = -1  # choice meaning "no stick input this step" (a delayed operator before its first reaction)


@dataclass
class BoltzmannOperatorConfig:
    """Options of the `boltzmann` operator (conf/operator/*.yaml)."""

    _target_: str = "coreach_plugins.operator.boltzmann.BoltzmannOperator"
    name: str = "boltzmann"
    beta: float = number(500.0, 0.0, unit="per m")
    bias: list[float] = field(default_factory=lambda: [0.0, 0.0])
    tremor_std: float = number(0.0, 0.0)
    tremor_cutoff_hz: float = number(2.0, 0.0, unit="Hz", open_range=True)
    delay_steps: int = integer(0, 0)
    mode_switch_margin: float = number(0.001, 0.0, unit="m")
    greedy: bool = False


class BoltzmannOperator:
    """beta: rationality (1/m of one-step progress); bias: constant offset added to the chosen stick;
    tremor_std: standard deviation (stick units) of band-limited noise added to the stick, white noise through
    a first-order low-pass with corner `tremor_cutoff_hz`; delay_steps: the chosen candidate is applied that
    many steps later (the operator reacts to an old state); mode_switch_margin: extra one-step progress (m) a
    candidate in another interface mode must promise before the operator switches (hysteresis; the vetting
    loop subtracts it); greedy: always take the best candidate (deterministic, for reference runs)."""

    def __init__(
        self,
        name: str = "boltzmann",
        beta: float = 500.0,
        bias: list[float] | tuple[float, ...] = (0.0, 0.0),
        tremor_std: float = 0.0,
        tremor_cutoff_hz: float = 2.0,
        delay_steps: int = 0,
        mode_switch_margin: float = 0.001,
        greedy: bool = False,
        dt: float = 0.1,
    ):
        def number(key, value, lo, hi=math.inf, open_lo=False):
            ok = isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)
            if not ok or value < lo or value > hi or (open_lo and value == lo):
                bound = f"> {lo}" if open_lo else f">= {lo}"
                raise ConfigError(f"operator.{key}", f"expected a finite number {bound}, got {value!r}")
            return float(value)

        if not isinstance(name, str) or not name:
            raise ConfigError("operator.name", f"expected a non-empty string, got {name!r}")
        self.name = name
        self.beta = number("beta", beta, 0.0, open_lo=True)
        try:
            self.bias = [float(v) for v in bias]
        except (TypeError, ValueError):
            raise ConfigError("operator.bias", f"expected a list of numbers (stick units), got {bias!r}") from None
        if not all(math.isfinite(v) for v in self.bias):
            raise ConfigError("operator.bias", f"expected finite numbers, got {bias!r}")
        self.tremor_std = number("tremor_std", tremor_std, 0.0)
        self.tremor_cutoff_hz = number("tremor_cutoff_hz", tremor_cutoff_hz, 0.0, open_lo=True)
        if not isinstance(delay_steps, int) or isinstance(delay_steps, bool) or delay_steps < 0:
            raise ConfigError("operator.delay_steps", f"expected an integer >= 0, got {delay_steps!r}")
        self.delay_steps = delay_steps
        self.mode_switch_margin = number("mode_switch_margin", mode_switch_margin, 0.0)
        if not isinstance(greedy, bool):
            raise ConfigError("operator.greedy", f"expected true or false, got {greedy!r}")
        self.greedy = greedy
        self.dt = number("dt", dt, 0.0, open_lo=True)
        self._queue: deque[Tensor] = deque()
        self._tremor: Tensor | None = None

    @property
    def tremor_pole(self) -> float:
        """Pole a of the discrete low-pass x_t = a x_{t-1} + sqrt(1 - a^2) * std * w_t (exact discretisation
        of a first-order filter with corner f_c: a = exp(-2 pi f_c dt)); the sqrt factor keeps the
        stationary standard deviation at tremor_std."""
        return math.exp(-2.0 * math.pi * self.tremor_cutoff_hz * self.dt)

    def reset(self, n_episodes: int, generator: torch.Generator, dt: float | None = None) -> None:
        if dt is not None:
            self.dt = float(dt)
        self._n = int(n_episodes)
        self._queue = deque(torch.full((self._n,), NO_INPUT, dtype=torch.long) for _ in range(self.delay_steps))
        self._tremor = None  # drawn on first use, from the stationary distribution

    def choose(self, value: Tensor, step: int, generator: torch.Generator) -> Tensor:
        """Index [E] into the flattened M*K candidates (mode-major), or -1 (no input) while a delayed
        operator has not reacted yet."""
        E = value.shape[0]
        flat = value.reshape(E, -1)  # [E, M*K]
        if self.greedy:
            pick = flat.argmax(dim=-1)
        else:
            u = torch.rand(flat.shape, generator=generator, dtype=torch.float64).clamp_(1e-12, 1.0 - 1e-12)
            gumbel = -torch.log(-torch.log(u))
            pick = (self.beta * flat.to(torch.float64) + gumbel).argmax(dim=-1)
        if not self.delay_steps:
            return pick
        self._queue.append(pick)
        return self._queue.popleft()

    def perturb(self, stick: Tensor, step: int, generator: torch.Generator) -> Tensor:
        """stick [E, d] -> stick + bias + tremor, saturated to the stick box [-1, 1]."""
        if not self.tremor_std and not any(self.bias):
            return stick
        out = stick
        if any(self.bias):
            bias = torch.tensor(self.bias, dtype=stick.dtype)
            if bias.shape[0] != stick.shape[-1]:
                raise ConfigError(
                    "operator.bias", f"expected {stick.shape[-1]} values (one per stick axis), got {self.bias}"
                )
            out = out + bias
        if self.tremor_std:
            a = self.tremor_pole
            w = torch.randn(stick.shape, generator=generator, dtype=torch.float64)
            if self._tremor is None or self._tremor.shape != stick.shape:
                self._tremor = self.tremor_std * w
            else:
                self._tremor = a * self._tremor + math.sqrt(1.0 - a * a) * self.tremor_std * w
            out = out + self._tremor.to(stick.dtype)
        return out.clamp(-1.0, 1.0)
