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
    noise_std: float = number(0.0, 0.0)
    tremor_cutoff_hz: float = number(2.0, 0.0, unit="Hz", open_range=True)
    delay_steps: int = integer(0, 0)
    mode_switch_margin: float = number(0.001, 0.0, unit="m")
    greedy: bool = False


class BoltzmannOperator:
    """beta: rationality (1/m of one-step progress); bias: constant offset added to the chosen stick;
    tremor_std: standard deviation (stick units) of band-limited noise added to the stick, white noise through
    a first-order low-pass with corner `tremor_cutoff_hz`; noise_std: white noise on the stick (stick units,
    independent per step: an unsteady hand rather than a tremor); delay_steps: the chosen candidate is applied that
    many steps later (the operator reacts to an old state); mode_switch_margin: extra one-step progress (m) a
    candidate in another interface mode must promise before the operator switches (hysteresis; the vetting
    loop subtracts it); greedy: always take the best candidate (deterministic, for reference runs).

    `vary` gives beta, noise_std, tremor_std, tremor_cutoff_hz and delay_steps a value per episode (what
    `coreach falsify` searches over, and what a suite's explicit cases set)."""

    def __init__(
        self,
        name: str = "boltzmann",
        beta: float = 500.0,
        bias: list[float] | tuple[float, ...] = (0.0, 0.0),
        tremor_std: float = 0.0,
        tremor_cutoff_hz: float = 2.0,
        delay_steps: int = 0,
        noise_std: float = 0.0,
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
        self.noise_std = number("noise_std", noise_std, 0.0)
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
        self._per_episode: dict[str, Tensor] = {}

    def _pole(self, cutoff_hz):
        return torch.exp(-2.0 * math.pi * cutoff_hz * self.dt) if isinstance(cutoff_hz, Tensor) else math.exp(
            -2.0 * math.pi * cutoff_hz * self.dt)

    @property
    def tremor_pole(self) -> float:
        """Pole a of the discrete low-pass x_t = a x_{t-1} + sqrt(1 - a^2) * std * w_t (exact discretisation
        of a first-order filter with corner f_c: a = exp(-2 pi f_c dt)); the sqrt factor keeps the
        stationary standard deviation at tremor_std."""
        return self._pole(self.tremor_cutoff_hz)

    def reset(self, n_episodes: int, generator: torch.Generator, dt: float | None = None) -> None:
        if dt is not None:
            self.dt = float(dt)
        self._n = int(n_episodes)
        self._queue = deque(torch.full((self._n,), NO_INPUT, dtype=torch.long) for _ in range(self.delay_steps))
        self._tremor = None  # drawn on first use, from the stationary distribution
        self._per_episode = {}

    def vary(self, values: dict[str, Tensor]) -> None:
        """Per-episode values after `reset`: {name: [E]} for beta, noise_std, tremor_std, tremor_cutoff_hz (nan
        = this operator's own value) and delay_steps (long, -1 = own). Unknown names are refused."""
        known = ("beta", "noise_std", "tremor_std", "tremor_cutoff_hz", "delay_steps")
        for key, v in values.items():
            if key not in known:
                raise ConfigError(f"operator {self.name}", f"cannot vary {key!r} per episode; expected {known}")
            if v.shape != (self._n,):
                raise ConfigError(f"operator {self.name}", f"{key} per episode has shape {list(v.shape)}, "
                                                           f"expected [{self._n}]")  # fmt: skip
            own = float(getattr(self, key))
            self._per_episode[key] = (torch.where(v < 0, int(own), v) if key == "delay_steps"
                                      else torch.where(torch.isnan(v), own, v.to(torch.float64)))  # fmt: skip
        if "delay_steps" in self._per_episode:
            # per-episode delays read a history of choices instead of one fixed-length queue
            self._history: list[Tensor] = []

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
            beta = self._per_episode.get("beta")
            beta = self.beta if beta is None else beta[:, None]  # [E, 1] per episode
            pick = (beta * flat.to(torch.float64) + gumbel).argmax(dim=-1)
        delays = self._per_episode.get("delay_steps")
        if delays is not None:
            # the choice made `delay` steps ago, no input before the first reaction
            self._history.append(pick)
            back = len(self._history) - 1 - delays  # [E] index into the history
            stacked = torch.stack(self._history)  # [t+1, E]
            old = stacked[back.clamp_min(0), torch.arange(E)]
            return torch.where(back >= 0, old, NO_INPUT)
        if not self.delay_steps:
            return pick
        self._queue.append(pick)
        return self._queue.popleft()

    def perturb(self, stick: Tensor, step: int, generator: torch.Generator) -> Tensor:
        """stick [E, d] -> stick + bias + tremor + noise, saturated to the stick box [-1, 1]."""
        if self._per_episode.keys() & {"tremor_std", "noise_std", "tremor_cutoff_hz"}:
            return self._perturb_per_episode(stick, generator)
        if not self.tremor_std and not any(self.bias) and not self.noise_std:
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
        if self.noise_std:
            out = out + self.noise_std * torch.randn(stick.shape, generator=generator, dtype=torch.float64).to(
                stick.dtype)
        return out.clamp(-1.0, 1.0)

    def _perturb_per_episode(self, stick: Tensor, generator: torch.Generator) -> Tensor:
        """`perturb` with per-episode tremor and noise (both drawn every step, for every episode)."""
        E = stick.shape[0]
        pe = self._per_episode
        std = pe.get("tremor_std", torch.full((E,), self.tremor_std, dtype=torch.float64))[:, None]
        pole = self._pole(pe.get("tremor_cutoff_hz", torch.full((E,), self.tremor_cutoff_hz,
                                                                dtype=torch.float64)))[:, None]  # fmt: skip
        noise = pe.get("noise_std", torch.full((E,), self.noise_std, dtype=torch.float64))[:, None]
        w = torch.randn(stick.shape, generator=generator, dtype=torch.float64)
        if self._tremor is None or self._tremor.shape != stick.shape:
            self._tremor = std * w  # the stationary distribution
        else:
            self._tremor = pole * self._tremor + torch.sqrt(1.0 - pole * pole) * std * w
        white = noise * torch.randn(stick.shape, generator=generator, dtype=torch.float64)
        bias = torch.tensor(self.bias, dtype=torch.float64) if any(self.bias) else 0.0
        return (stick.to(torch.float64) + bias + self._tremor + white).clamp(-1.0, 1.0).to(stick.dtype)
