"""The search: optuna's TPE sampler against plain random search, the same budget in batches, one space.

Why TPE (Bergstra et al. 2011, as implemented in optuna): the space mixes categorical goals, an integer delay
and a dozen continuous parameters, and scenarios are evaluated in batches. TPE handles every kind of parameter
in one model and, with `constant_liar`, proposes a batch of distinct points before any result is back; CMA-ES
(optuna's CmaEsSampler, or the cma package) models continuous parameters only and would leave the goals to an
independent sampler. Random search over the same space with the same budget, in the same run, is the baseline
a search has to beat.
"""

from __future__ import annotations

import logging
import math
import warnings
from dataclasses import dataclass, field
from typing import Callable

import optuna

from coreach.falsify.space import Space

__all__ = ["Evaluation", "SearchResult", "search", "SAMPLERS"]

SAMPLERS = ("tpe", "random")

# evaluate(cases) -> one robustness score per case (negative = failed), plus anything to keep per case
Evaluate = Callable[[list[dict]], tuple[list[float], list[dict]]]


@dataclass
class Evaluation:
    index: int  # 0-based, in evaluation order
    case: dict
    score: float
    info: dict = field(default_factory=dict)


@dataclass
class SearchResult:
    sampler: str
    seed: int
    evaluations: list[Evaluation]

    @property
    def first_failure(self) -> int | None:
        """Evaluations spent up to and including the first failure (None: none found)."""
        return next((e.index + 1 for e in self.evaluations if e.score < 0), None)

    @property
    def failures(self) -> list[Evaluation]:
        return [e for e in self.evaluations if e.score < 0]

    @property
    def worst(self) -> Evaluation:
        return min(self.evaluations, key=lambda e: e.score)

    def best_so_far(self) -> list[float]:
        """The lowest score after each evaluation (the search curve)."""
        out, low = [], math.inf
        for e in self.evaluations:
            low = min(low, e.score)
            out.append(low)
        return out


def _sampler(name: str, seed: int, batch: int, budget: int) -> optuna.samplers.BaseSampler:
    if name == "random":
        return optuna.samplers.RandomSampler(seed=seed)
    # one random batch (at least 20 points) before the model takes over: on the constructed problem of
    # tests/test_falsify.py a start of 50 found the failure region in a third of the evaluations a start of a
    # tenth of the budget needed (measured while writing this module)
    return optuna.samplers.TPESampler(seed=seed, n_startup_trials=max(20, batch), multivariate=True,
                                      constant_liar=True)  # fmt: skip


def search(space: Space, evaluate: Evaluate, budget: int, batch: int, seed: int, sampler: str, dof: int,
           progress: Callable[[int], None] | None = None, stop_at_failure: bool = False) -> SearchResult:
    """Minimise the robustness score over `space` with `budget` evaluations, `batch` at a time.
    `stop_at_failure` ends the search after the batch holding the first failure (for counting the evaluations
    a search needs)."""
    optuna.logging.set_verbosity(logging.WARNING)
    warnings.filterwarnings("ignore", category=optuna.exceptions.ExperimentalWarning)  # multivariate, group
    study = optuna.create_study(direction="minimize", sampler=_sampler(sampler, seed, batch, budget))
    out: list[Evaluation] = []
    while len(out) < budget:
        n = min(batch, budget - len(out))
        trials, cases = [], []
        for _ in range(n):
            trial = study.ask()
            pick = lambda name, choices, trial=trial: trial.suggest_categorical(name, choices)  # noqa: E731
            suggest = (lambda name, lo, hi, kind, trial=trial: trial.suggest_int(name, int(lo), int(hi))
                       if kind == "int" else trial.suggest_float(name, lo, hi))  # noqa: E731  # fmt: skip
            trials.append(trial)
            cases.append(space.case(pick, suggest, dof))
        scores, infos = evaluate(cases)
        for trial, case, score, info in zip(trials, cases, scores, infos):
            study.tell(trial, float(score))
            out.append(Evaluation(len(out), case, float(score), info))
        if progress is not None:
            progress(len(out))
        if stop_at_failure and any(e.score < 0 for e in out):
            break
    return SearchResult(sampler, seed, out)
