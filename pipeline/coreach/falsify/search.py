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

`restart_after` starts a stratum's TPE afresh (a new seed, no history) once it has gone that many of its own
trials without lowering its best score and has found no failure. Why: a goal's TPE can still settle on a shallow
valley, such as slow operators, who lower a success's score anywhere in the space, and never leave it; in far
starts 4 of 10 per-goal searches found nothing in 1,500 scenarios, and with restarts after 20 stalled trials all
10 found a failure, within 669 (docs/falsify.md). A stratum that has found a failure keeps its model.
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
# a stratum's best score must fall by more than this to count as progress (restart_after): a success's score
# moves in steps of one control step over the horizon (1/300 on a 30 s horizon), so any real change counts
STALL_TOLERANCE = 1e-3

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
    restarts: int = 0  # fresh starts of stalled strata (restart_after)

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


def _stratum_seed(seed: int, i: int, strata: int, restart: int = 0) -> int:
    """The seed of stratum i (at its `restart`-th fresh start). One search keeps the seed itself; strata and
    restarts draw theirs from numpy's SeedSequence of (seed, i[, restart]): seed + i would hand stratum 1 of
    seed s the random start of stratum 0 of seed s + 1, so the searches of neighbouring seeds would not be
    independent."""
    if restart:
        return int(np.random.SeedSequence([seed, i, restart]).generate_state(1)[0])
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
           progress: Callable[[int], None] | None = None, stop_at_failure: bool = False,
           restart_after: int | None = None) -> SearchResult:
    """Minimise the robustness score over `space` with `budget` evaluations, `batch` at a time.
    `stop_at_failure` ends the search after the batch holding the first failure (for counting the evaluations
    a search needs); `restart_after` (model-based samplers only) restarts a stalled stratum (module docstring)."""
    optuna.logging.set_verbosity(logging.WARNING)
    warnings.filterwarnings("ignore", category=optuna.exceptions.ExperimentalWarning)  # multivariate, group
    key, values = _strata(space, sampler)
    m = len(values)

    def study(i: int, restart: int = 0) -> optuna.Study:
        s = _sampler(sampler, _stratum_seed(seed, i, m, restart), batch, budget, m)
        return optuna.create_study(direction="minimize", sampler=s)

    studies = [study(i) for i in range(m)]
    restarts = [0] * m
    best, stalled = [math.inf] * m, [0] * m  # per stratum: its lowest score, its trials since it fell
    out: list[Evaluation] = []
    while len(out) < budget:
        n = min(batch, budget - len(out))
        trials, cases = [], []
        for k in range(len(out), len(out) + n):
            i = k % m
            trial = studies[i].ask()
            pick = functools.partial(_pick, trial=trial, key=key, fixed=values[i])
            suggest = (lambda name, lo, hi, kind, trial=trial: trial.suggest_int(name, int(lo), int(hi))
                       if kind == "int" else trial.suggest_float(name, lo, hi))  # noqa: E731  # fmt: skip
            trials.append((i, studies[i], trial))
            cases.append(space.case(pick, suggest, dof))
        scores, infos = evaluate(cases)
        for (i, owner, trial), case, score, info in zip(trials, cases, scores, infos):
            owner.tell(trial, float(score))
            out.append(Evaluation(len(out), case, float(score), info))
            fell = score < best[i] - STALL_TOLERANCE
            best[i], stalled[i] = (score, 0) if fell else (best[i], stalled[i] + 1)
        if restart_after is not None and sampler != "random":
            for i in range(m):
                if stalled[i] >= restart_after and best[i] >= 0:
                    restarts[i] += 1
                    studies[i], best[i], stalled[i] = study(i, restarts[i]), math.inf, 0
        if progress is not None:
            progress(len(out))
        if stop_at_failure and any(e.score < 0 for e in out):
            break
    return SearchResult(sampler, seed, out, sum(restarts))
