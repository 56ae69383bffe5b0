"""Simulated study outcomes with known condition effects: a statistical population, drawn over a frozen plan's
structure (participants x conditions x tasks x trials) in the long format `coreach study analyze` reads.

The model (every number from the study config's `planted` section):

    time_s  = base_time_s + time_s[condition] + time_s[task] + a_person + e,  a ~ N(0, sd_p), e ~ N(0, sd_r)
    success ~ Bernoulli(expit(logit(base_success) + log_odds[condition] + log_odds[task] + b_person)),
              b ~ N(0, participant_sd_log_odds)

Time is normal on the seconds scale, so the mixed model of `coreach study analyze` (random intercept, normal
residuals, identity scale) is the true model and its condition effects estimate the planted seconds exactly.
Success has a participant intercept on the logit scale: the planted log-odds are subject-specific, while the
GEE of the analysis estimates population-averaged log-odds, which are smaller in magnitude when the
participants differ; `true_log_odds_effects` computes the population-averaged values the GEE aims at.
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
import statsmodels.api as sm
import statsmodels.formula.api as smf
from scipy import integrate, stats
from scipy.special import expit, logit
from statsmodels.tools.sm_exceptions import PerfectSeparationWarning

from coreach.config.option_specs import check_ranges
from coreach.config.schemas import StudyPlantedConfig, StudyPlantedEffectConfig, StudyPowerConfig
from coreach.errors import ConfigError
from coreach.study import models
from coreach.study.analysis import default_reference

WHERE = "study.planted"
# A normal time below zero is kept (clipping would change the model the analysis assumes); a config whose
# fastest cell is within this many standard deviations of zero is refused as a nonsense population
MIN_SDS_ABOVE_ZERO = 3.0


@dataclass(frozen=True)
class Structure:
    """What a simulated study repeats: from the frozen plan, with any number of participants."""

    conditions: tuple[str, ...]
    tasks: tuple[str, ...]
    trials: int  # measured trials per condition and task
    participants: int  # the plan's count
    sequences: int  # rows of the plan's Williams design: balanced counts are multiples of it


def structure_of(plan: dict) -> Structure:
    return Structure(conditions=tuple(c["name"] for c in plan["conditions"]),
                     tasks=tuple(t["name"] for t in plan["tasks"]), trials=int(plan["config"]["trials"]),
                     participants=len(plan["participants"]), sequences=int(plan["design"]["sequences"]))  # fmt: skip


@dataclass(frozen=True)
class Population:
    base_time_s: float
    participant_sd_time_s: float
    residual_sd_time_s: float
    base_success: float
    participant_sd_log_odds: float
    time_s: dict  # condition -> seconds (every condition of the structure, 0 where none was planted)
    log_odds: dict  # condition -> log-odds
    task_time_s: dict  # task -> seconds
    task_log_odds: dict  # task -> log-odds
    first: str  # the power question: time of `first` minus `second`
    second: str
    difference_s: float


def _effects(given: dict, names: tuple[str, ...], where: str, what: str) -> tuple[dict, dict]:
    given = dict(given or {})
    for name, effect in given.items():
        if name not in names:
            raise ConfigError(f"{where}.{name}", f"unknown {what} {name!r}; the plan's {what}s are {', '.join(names)}")
        check_ranges(StudyPlantedEffectConfig, effect, f"{where}.{name}")
    time = {n: float((given.get(n) or {}).get("time_s", 0.0)) for n in names}
    odds = {n: float((given.get(n) or {}).get("log_odds", 0.0)) for n in names}
    return time, odds


def population_from(planted: dict, structure: Structure) -> Population:
    """The population of a composed study's `planted` section over a plan's conditions and tasks; one line
    naming the option for an unknown condition or task, a value out of range, or a population that would
    draw negative times as a matter of course."""
    check_ranges(StudyPlantedConfig, planted, WHERE)
    time, odds = _effects(planted.get("effects"), structure.conditions, f"{WHERE}.effects", "condition")
    task_time, task_odds = _effects(planted.get("tasks"), structure.tasks, f"{WHERE}.tasks", "task")
    power = dict(planted.get("power") or {})
    check_ranges(StudyPowerConfig, power, f"{WHERE}.power")
    second = power.get("second") or default_reference(list(structure.conditions))
    if second not in structure.conditions:
        raise ConfigError(f"{WHERE}.power.second", f"unknown condition {second!r}; the plan's conditions are "
                                                   f"{', '.join(structure.conditions)}")  # fmt: skip
    first = power.get("first") or next((c for c in structure.conditions if c != second), None)
    if first not in structure.conditions or first == second:
        raise ConfigError(f"{WHERE}.power.first", f"expected a condition of the plan other than {second!r} "
                                                  f"({', '.join(structure.conditions)}), got {first!r}")  # fmt: skip
    pop = Population(base_time_s=float(planted["base_time_s"]),
                     participant_sd_time_s=float(planted["participant_sd_time_s"]),
                     residual_sd_time_s=float(planted["residual_sd_time_s"]),
                     base_success=float(planted["base_success"]),
                     participant_sd_log_odds=float(planted["participant_sd_log_odds"]),
                     time_s=time, log_odds=odds, task_time_s=task_time, task_log_odds=task_odds,
                     first=first, second=second, difference_s=float(power.get("time_s", -2.0)))  # fmt: skip
    check_times(pop)
    return pop


def check_times(pop: Population, where: str = f"{WHERE}.base_time_s") -> None:
    fastest = pop.base_time_s + min(pop.time_s.values()) + min(pop.task_time_s.values())
    sd = math.hypot(pop.participant_sd_time_s, pop.residual_sd_time_s)
    if fastest < MIN_SDS_ABOVE_ZERO * sd:
        raise ConfigError(where, f"the fastest condition and task average {fastest:.3g} s, "
                          f"less than {MIN_SDS_ABOVE_ZERO:g} standard deviations ({sd:.3g} s) above zero: the "
                          "normal time model would draw negative times; raise base_time_s or lower the "
                          "spreads")  # fmt: skip


def with_difference(pop: Population, difference_s: float) -> Population:
    """The same population with `first` planted `difference_s` seconds from `second` (other conditions kept)."""
    time = {**pop.time_s, pop.first: pop.time_s[pop.second] + difference_s}
    out = dataclasses.replace(pop, time_s=time, difference_s=difference_s)
    check_times(out, f"{WHERE}.power.time_s")
    return out


def generate(pop: Population, structure: Structure, participants: int, rng: np.random.Generator) -> pd.DataFrame:
    """One simulated study: every participant drives every condition on every task `structure.trials` times;
    columns participant, condition, task, trial, success, time_s. The condition order does not enter the
    model (no learning or carry-over is planted), so the rows are not laid out in the plan's order."""
    conditions, tasks, trials = structure.conditions, structure.tasks, structure.trials
    shape = (participants, len(conditions), len(tasks), trials)
    p, c, t, r = (a.ravel() for a in np.indices(shape))
    cond_time = np.array([pop.time_s[x] for x in conditions])
    task_time = np.array([pop.task_time_s[x] for x in tasks])
    cond_odds = np.array([pop.log_odds[x] for x in conditions])
    task_odds = np.array([pop.task_log_odds[x] for x in tasks])
    a = rng.normal(0.0, pop.participant_sd_time_s, participants)
    b = rng.normal(0.0, pop.participant_sd_log_odds, participants)
    time = pop.base_time_s + cond_time[c] + task_time[t] + a[p] + rng.normal(0.0, pop.residual_sd_time_s, p.size)
    chance = expit(logit(pop.base_success) + cond_odds[c] + task_odds[t] + b[p])
    success = (rng.uniform(size=p.size) < chance).astype(int)
    width = len(str(participants))
    codes = np.array([f"S{k + 1:0{width}d}" for k in range(participants)])  # simulated: no person's code
    return pd.DataFrame({"participant": codes[p], "condition": np.array(conditions)[c], "task": np.array(tasks)[t],
                         "trial": r + 1, "success": success, "time_s": time})  # fmt: skip


def true_time_effects(pop: Population, conditions, reference: str) -> dict[str, float]:
    """Condition minus reference, seconds: the planted values themselves (the mixed model is the true model)."""
    return {c: pop.time_s[c] - pop.time_s[reference] for c in conditions if c != reference}


def marginal_success(eta, sd: float) -> np.ndarray:
    """E[expit(eta + b)], b ~ N(0, sd^2): the population's success rate where a typical participant has
    log-odds `eta`. Adaptive quadrature (scipy.integrate.quad) rather than a fixed Gauss-Hermite rule: the
    logistic's complex poles at +-i pi make a fixed rule slow to converge once sd reaches 2-3 log-odds, and
    there are only conditions x tasks cells to integrate."""
    eta = np.asarray(eta, float)
    if sd == 0:
        return expit(eta)
    density = stats.norm(0.0, sd).pdf
    return np.vectorize(lambda e: integrate.quad(lambda b: expit(e + b) * density(b), -np.inf, np.inf,
                                                 epsabs=1e-13, epsrel=1e-12)[0])(eta)  # fmt: skip


def true_log_odds_effects(pop: Population, structure: Structure, reference: str) -> dict:
    """The population-averaged condition effects (log-odds against `reference`) the GEE of the analysis aims
    at: the success rate of every condition and task cell integrated over the participant intercept, then the
    analysis' own main-effects logistic formula fitted to those rates (equal weight per cell, as in the
    balanced plan). With participant_sd_log_odds = 0 these are the planted log-odds exactly. With a spread and
    task effects the integrated rates are not exactly additive on the logit scale; `nonadditivity` is the
    largest gap between a per-task effect and the fitted one (zero when the model holds exactly)."""
    cells = pd.DataFrame([(c, t) for c in structure.conditions for t in structure.tasks], columns=["condition", "task"])
    eta = np.array([logit(pop.base_success) + pop.log_odds[c] + pop.task_log_odds[t]
                    for c, t in zip(cells["condition"], cells["task"])])  # fmt: skip
    cells["success"] = marginal_success(eta, pop.participant_sd_log_odds)
    data = models._design(cells, list(structure.conditions), reference)  # the analysis' coding of the condition
    with warnings.catch_warnings():  # the rates are fitted closely by design, which statsmodels takes for separation
        warnings.simplefilter("ignore", PerfectSeparationWarning)
        fit = smf.glm(models._formula("success", data), data, family=sm.families.Binomial()).fit(tol=1e-12)
    effects = {}
    for name in fit.params.index:
        if name.startswith("C(condition)[T."):
            value = float(fit.params[name])  # below: the fit's rounding; a zero effect stays 0, without a sign
            effects[name[len("C(condition)[T."):-1]] = 0.0 if abs(value) < 1e-9 else value
    rates = cells.pivot(index="task", columns="condition", values="success")
    per_task = {c: logit(rates[c].to_numpy()) - logit(rates[reference].to_numpy()) for c in effects}
    gap = max((float(np.max(np.abs(d - effects[c]))) for c, d in per_task.items()), default=0.0)
    return {"effects": effects, "nonadditivity": gap}


# Separate random streams for the coverage studies and for each cell of the power grid, so that asking for
# more participant counts does not change the coverage studies (and each study can be drawn again alone)
COVERAGE_STREAM, POWER_STREAM = 0, 1


def study_rng(seed: int, stream: tuple[int, ...], index: int) -> np.random.Generator:
    """The Generator of simulated study `index` of a stream: the index-th child of SeedSequence([seed,
    *stream]), the same whether 20 or 200 studies are drawn."""
    return np.random.default_rng(np.random.SeedSequence([seed, *stream], spawn_key=(index,)))
