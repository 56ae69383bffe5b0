"""A simulated participant: a Boltzmann-rational operator (the `boltzmann` operator plugin vetting uses) that
picks a stick from what each candidate would do through the condition's own Session, and fills in the forms.

Drawn from the study's declared population, one set of values per participant (its rationality, stick noise,
tremor and reaction delay). The candidate values are vetting's (`coreach.vetting.loop.candidate_values`:
one-step progress toward the current waypoint, orientation weighted, a mode switch paying its cost), so a
simulated participant judges sticks exactly as a simulated operator in closed-loop vetting does. What it does
not model: learning across trials, fatigue, looking away, misreading the instruction.

The forms' answers (workload, liking, ranking) come from a plain model of the participant's own outcomes
(more failures and longer times: more workload, less liking) with noise. It is invented, for testing a
protocol end to end, and says nothing about how people rate these interfaces.
"""

from __future__ import annotations

import math

import numpy as np
import torch
from omegaconf import OmegaConf

from coreach.host.registry import build_plugin
from coreach.study.tlx import SUBSCALES
from coreach.vetting.loop import candidate_values
from coreach.world.geometry import rotation_error

GRID = 5  # candidate sticks per axis, as the shipped suites' candidates_per_axis
MARGIN = 0.001  # m: the operator's hysteresis before changing mode (the shipped operators' mode_switch_margin)
# the population's parameters and the operator option each sets
PARAMETERS = ("beta", "noise_std", "tremor_std", "tremor_cutoff_hz", "delay_steps")


def draw_values(population: dict, rng: np.random.Generator) -> dict:
    """One participant's operator values from the population: each parameter uniform in its [low, high]
    (beta log-uniform, since rationality spans orders of magnitude; delay_steps an integer)."""
    out = {}
    for key in PARAMETERS:
        lo, hi = (float(v) for v in population[key])
        if key == "beta":
            out[key] = float(math.exp(rng.uniform(math.log(lo), math.log(hi))))
        elif key == "delay_steps":
            out[key] = int(rng.integers(int(lo), int(hi) + 1))
        else:
            out[key] = float(rng.uniform(lo, hi))
    return out


class SimulatedParticipant:
    def __init__(self, values: dict, seed: int):
        self.values = dict(values)
        cfg = OmegaConf.create({"_target_": "coreach_plugins.operator.boltzmann.BoltzmannOperator",
                                "name": "participant", "mode_switch_margin": MARGIN, **self.values})  # fmt: skip
        self.operator = build_plugin(cfg, "operator")
        self.generator = torch.Generator().manual_seed(int(seed))
        self.rng = np.random.default_rng(int(seed))
        axis = np.linspace(-1.0, 1.0, GRID)
        self.grid = np.stack(np.meshgrid(axis, axis, indexing="ij"), axis=-1).reshape(-1, 2)  # [K, 2]
        self.outcomes: dict[str, list[tuple[int, float]]] = {}

    def begin(self, dt: float) -> None:
        """Before each trial: the operator's delay line and tremor start afresh."""
        self.operator.reset(1, self.generator, dt=dt)
        self.step, self.hold = 0, 0

    def act(self, run) -> np.ndarray:
        """The stick for this step of the trial `run` (a TrialRun); may switch the interface's mode, which costs
        the participant the interface's switch time with the stick at rest."""
        d = run.drive
        session = d.session
        self.step += 1
        if self.hold > 0:
            self.hold -= 1
            return np.zeros(2)
        q = d.q
        pos, rot, jac = session.chain.fk_jacobian(q)
        target = d.targets[run.wanted, min(run.phase, 1)]
        qd = session.preview(self.grid, q)  # [M, K, n]
        twist = np.einsum("ij,mkj->mki", jac, qd) * d.dt  # [M, K, 6]
        mode = int(getattr(session, "mode", 0))
        switch_cost = int(getattr(getattr(session, "interface", None), "switch_cost_steps", 0))
        t = lambda a: torch.as_tensor(np.asarray(a, dtype=np.float64))[None]  # noqa: E731
        rot_err = rotation_error(t(d.goal_rot[run.wanted]), t(rot))
        value = candidate_values(t(twist), t(target - pos), rot_err, torch.tensor([mode]), switch_cost, MARGIN)
        idx = int(self.operator.choose(value, self.step, self.generator)[0])
        if idx < 0:  # a delayed participant has not reacted yet
            return np.zeros(2)
        m, k = divmod(idx, len(self.grid))
        if m != mode:
            while int(getattr(session, "mode", 0)) != m:
                run.switch_mode()
            self.hold = max(switch_cost - 1, 0)
            return np.zeros(2)
        stick = torch.as_tensor(self.grid[k], dtype=torch.float64)[None]
        return self.operator.perturb(stick, self.step, self.generator)[0].numpy()

    # ----------------------------------------------------------------------------------------- forms
    def remember(self, letter: str, success: int, time_s: float) -> None:
        self.outcomes.setdefault(letter, []).append((int(success), float(time_s)))

    def _score(self, letter: str) -> float:
        """0 (every trial failed, at the limit) .. 1 (every trial quick): the participant's own experience."""
        seen = self.outcomes.get(letter) or [(0, 30.0)]
        rate = float(np.mean([s for s, _ in seen]))
        quick = float(np.mean([math.exp(-t / 20.0) for s, t in seen if s] or [0.0]))
        return 0.7 * rate + 0.3 * quick

    def tlx(self, letter: str) -> dict[str, float]:
        base = 80.0 - 60.0 * self._score(letter)
        return {s: float(np.clip(round(base + self.rng.normal(0.0, 8.0)), 0, 100)) for s in SUBSCALES}

    def liking(self, letter: str) -> int:
        """1-7: "I would use this interface again"."""
        return int(np.clip(round(1 + 6 * self._score(letter) + self.rng.normal(0.0, 0.7)), 1, 7))

    def ranking(self, letters: list[str]) -> list[str]:
        noisy = {L: self._score(L) + self.rng.normal(0.0, 0.05) for L in letters}
        return sorted(letters, key=lambda L: -noisy[L])
