"""The search: optuna's TPE sampler against plain random search, the same budget in batches, one space.

Why TPE (Bergstra et al. 2011, as implemented in optuna): the space mixes categorical goals, an integer delay
and a dozen continuous parameters, and scenarios are evaluated in batches. TPE handles every kind of parameter
in one model and, with `constant_liar`, proposes a batch of distinct points before any result is back; CMA-ES
(optuna's CmaEsSampler, or the cma package) models continuous parameters only and would leave the goals to an
independent sampler. Random search over the same space with the same budget, in the same run, is the baseline
a search has to beat.

`tpe_per_goal` runs one TPE per final goal (the start goal without a switch, the goal switched to with one) and
takes the batch's points from them in turn. Why: one TPE over the whole space commits to the goal whose score
falls most smoothly. On the bedside shelf that is the goal slowest to reach: in far starts (docs/falsify.md) TPE
spent 971 of 1,000 scenarios on the drawer knob, descending toward slow successes, while the planted failures lay
toward the lamp switch, at the bottom of the lamp's own slope. Per goal, each slope is searched.
"""

from __future__ import annotations

import functools
import logging
import math
import warnings
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import optuna

from coreach.falsify.space import Space

__all__ = ["Evaluation", "SearchResult", "search", "SAMPLERS"]

SAMPLERS = ("tpe", "tpe_per_goal", "random")

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


def _sampler(name: str, seed: int, batch: int, budget: int, strata: int = 1) -> optuna.samplers.BaseSampler:
    if name == "random":
        return optuna.samplers.RandomSampler(seed=seed)
    # one random batch (at least 20 points) before the model takes over, shared among the strata: on the
    # constructed problem of tests/test_falsify.py a start of 50 found the failure region in a third of the
    # evaluations a start of a tenth of the budget needed (measured while writing this module)
    return optuna.samplers.TPESampler(seed=seed, n_startup_trials=max(10, max(20, batch) // strata),
                                      multivariate=True, constant_liar=True)  # fmt: skip


def _stratum_seed(seed: int, i: int, strata: int) -> int:
    """The seed of stratum i. One search keeps the seed itself; strata draw theirs from numpy's SeedSequence of
    (seed, i): seed + i would hand stratum 1 of seed s the random start of stratum 0 of seed s + 1, so the
    searches of neighbouring seeds would not be independent."""
    if strata == 1:
        return seed
    return int(np.random.SeedSequence([seed, i]).generate_state(1)[0])


def _strata(space: Space, sampler: str) -> tuple[str | None, list]:
    """(the categorical a per-goal search fixes, its values); (None, [None]) for one search over everything."""
    if sampler != "tpe_per_goal":
        return None, [None]
    key = "goal_to" if space.switch else "goal_from"
    return key, list(space.goals_to if space.switch else space.goals_from)


def _pick(name: str, choices: list, trial, key: str | None, fixed) -> str:
    """A categorical of the case: the stratum's own value for the fixed one; with a switch, the goal started
    from is never the goal switched to (the case would move the switch to another goal and leave the stratum)."""
    if name == key:
        return fixed
    if key == "goal_to" and name == "goal_from":
        choices = [c for c in choices if c != fixed] or choices
    return trial.suggest_categorical(name, choices)


def search(space: Space, evaluate: Evaluate, budget: int, batch: int, seed: int, sampler: str, dof: int,
           progress: Callable[[int], None] | None = None, stop_at_failure: bool = False) -> SearchResult:
    """Minimise the robustness score over `space` with `budget` evaluations, `batch` at a time.
    `stop_at_failure` ends the search after the batch holding the first failure (for counting the evaluations
    a search needs)."""
    optuna.logging.set_verbosity(logging.WARNING)
    warnings.filterwarnings("ignore", category=optuna.exceptions.ExperimentalWarning)  # multivariate, group
    key, values = _strata(space, sampler)
    samplers = [_sampler(sampler, _stratum_seed(seed, i, len(values)), batch, budget, len(values))
                for i in range(len(values))]
    studies = [optuna.create_study(direction="minimize", sampler=s) for s in samplers]
    out: list[Evaluation] = []
    while len(out) < budget:
        n = min(batch, budget - len(out))
        trials, cases = [], []
        for k in range(len(out), len(out) + n):
            study, fixed = studies[k % len(values)], values[k % len(values)]
            trial = study.ask()
            pick = functools.partial(_pick, trial=trial, key=key, fixed=fixed)
            suggest = (lambda name, lo, hi, kind, trial=trial: trial.suggest_int(name, int(lo), int(hi))
                       if kind == "int" else trial.suggest_float(name, lo, hi))  # noqa: E731  # fmt: skip
            trials.append((study, trial))
            cases.append(space.case(pick, suggest, dof))
        scores, infos = evaluate(cases)
        for (study, trial), case, score, info in zip(trials, cases, scores, infos):
            study.tell(trial, float(score))
            out.append(Evaluation(len(out), case, float(score), info))
        if progress is not None:
            progress(len(out))
        if stop_at_failure and any(e.score < 0 for e in out):
            break
    return SearchResult(sampler, seed, out)
