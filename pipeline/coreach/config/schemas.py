"""Typed schemas of what a lab writes as configuration (suites, scenes), registered in Hydra's ConfigStore.

Each shipped file of the `suite` and `scenario` config groups starts from its schema (`defaults: [base_suite]`
or `[base_scenario]`), so a misspelt key or a wrong type fails when the config is composed, and overrides
such as `suite.episodes=20` or `scenario.goals.1.position=[0.6,0.1,0.3]` are checked the same way. A lab's
own file, given as a path, is merged onto the same schema (coreach.config.compose). Ranges are declared with
coreach.config.option_specs and checked right after composition (one line naming the option).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Dict, List, Optional

from hydra.core.config_store import ConfigStore

from coreach.control.separation import SeparationSettings
from coreach.config.option_specs import choice, integer, number, vector

_SEPARATION = SeparationSettings()  # the person's terms and the clearance default to the filter's own

__all__ = ["SuiteConfig", "CaseConfig", "CaseOperatorConfig", "FalsifySpaceConfig", "ToleranceConfig",
           "ScenarioConfig", "GoalConfig", "BodyConfig", "PersonConfig", "StudyConfig", "StudyConditionConfig",
           "StudyTaskConfig", "StudyPlantedConfig", "StudyPlantedEffectConfig", "StudyPowerConfig", "register",
           "MIN_SEED", "DEFAULT_POSITION_TOL", "DEFAULT_ORIENTATION_TOL_DEG"]  # fmt: skip

# Training (demonstration and trainer seeds) uses small integers from 0; vetting draws from 10_000 up so no
# vetting episode can coincide with a training one.
MIN_SEED = 10_000
# Common practice for "arrived" in reaching studies with assistive arms (not a standard): 2 cm, 15 deg.
DEFAULT_POSITION_TOL = 0.02
DEFAULT_ORIENTATION_TOL_DEG = 15.0


@dataclass
class ToleranceConfig:
    position_m: float = number(DEFAULT_POSITION_TOL, 1e-6, 1.0, "m")
    orientation_deg: float = number(DEFAULT_ORIENTATION_TOL_DEG, 1e-3, 180.0, "deg")


@dataclass
class CaseOperatorConfig:
    """Per-episode operator values of one case (null = the suite operator's own value)."""

    beta: Optional[float] = number(None, 1e-9, math.inf, "per m", optional=True)
    noise_std: Optional[float] = number(None, 0.0, 10.0, "stick units", optional=True)
    tremor_std: Optional[float] = number(None, 0.0, 10.0, "stick units", optional=True)
    tremor_cutoff_hz: Optional[float] = number(None, 1e-6, 1e3, "Hz", optional=True)
    delay_steps: Optional[int] = None


@dataclass
class CaseConfig:
    """One explicit episode of a suite (a counterexample found by `coreach falsify`, or a case a lab writes):
    the goals, the switch, the layout shift of each goal and the start pose, the translation of named scene
    bodies (furniture or the person's), and the operator's values."""

    goal: str = "???"  # initial goal
    switch_to: Optional[str] = None  # null: no switch
    switch_at: Optional[float] = number(None, 0.0, 1.0, "of the horizon", optional=True)
    layout_shift: Dict[str, Any] = field(default_factory=dict)  # goal name -> [dx, dy, dz] m
    start_offset: List[Any] = field(default_factory=list)  # rad per joint, added to the start pose; [] = none
    body_shift: Dict[str, Any] = field(default_factory=dict)  # scene body name -> [dx, dy, dz] m (e.g. the head)
    operator: CaseOperatorConfig = field(default_factory=CaseOperatorConfig)
    robustness: Optional[float] = None  # what the search measured for it (a note; vetting measures anew)


@dataclass
class SuiteConfig:
    """A vetting suite: which episodes a closed-loop test runs. Its scene and simulated operator are the
    `scenario` and `operator` config groups (a suite file selects them with `override /operator: noisy`)."""

    name: str = "suite"
    goals: Optional[List[str]] = None  # null = every goal of the scenario; else goal names
    layout_offset: List[float] = vector((0.0, 0.0, 0.0), 3, "m")  # added to every approach point
    layout_jitter: Optional[float] = number(None, 0.0, 1.0, "m", optional=True)  # null = the scenario's
    start: Any = "home"  # "home" or joint positions (rad)
    start_jitter: float = number(0.0, 0.0, math.pi, "rad")
    switch_fractions: List[Optional[float]] = field(default_factory=lambda: [None])  # null = no switch
    switch_to: str = choice("next", ("next", "random"))
    episodes: int = integer(50, 1, " (episodes per switch cell)")
    seed: int = integer(MIN_SEED, MIN_SEED, " so vetting episodes never coincide with training ones "
                                            "(training seeds are small integers)")  # fmt: skip
    horizon_s: float = number(20.0, 1e-3, 1e5, "s")
    dt: Optional[float] = number(None, 1e-4, 10.0, "s", optional=True)  # null = the scenario's
    tolerances: ToleranceConfig = field(default_factory=ToleranceConfig)
    candidates_per_axis: int = integer(5, 2, " (stick grid points per axis)")
    # explicit episodes: when given, the suite runs each case `episodes` times (layout and start jitter still
    # apply on top of each case's own shift), and switch_fractions / switch_to are not used
    cases: List[CaseConfig] = field(default_factory=list)


@dataclass
class GoalConfig:
    name: str = "???"
    position: List[float] = field(default_factory=lambda: [0.0, 0.0, 0.0])  # approach point, m
    approach_rpy_deg: List[float] = field(default_factory=lambda: [0.0, 90.0, 0.0])
    fine_motion: List[float] = field(default_factory=lambda: [0.0, 0.0, 0.0])  # m, base frame


@dataclass
class BodyConfig:
    name: str = "???"
    shape: str = "???"  # box, cylinder, sphere, capsule (checked with the sizes by coreach.world.scene_bodies)
    size: List[float] = field(default_factory=list)
    xyz: List[float] = field(default_factory=lambda: [0.0, 0.0, 0.0])
    rpy_deg: List[float] = field(default_factory=lambda: [0.0, 0.0, 0.0])


@dataclass
class PersonConfig:
    """The person's bodies and the speed and separation terms (coreach.control.separation)."""

    speed: float = _SEPARATION.person_speed
    reaction_time: float = _SEPARATION.reaction_time
    stopping_time: float = _SEPARATION.stopping_time
    intrusion: float = _SEPARATION.intrusion
    person_uncertainty: float = _SEPARATION.person_uncertainty
    robot_uncertainty: float = _SEPARATION.robot_uncertainty
    bodies: List[BodyConfig] = field(default_factory=list)


@dataclass
class ScenarioConfig:
    """A scene: goals, furniture and the person (their meaning and checks: coreach.world.scenario)."""

    name: str = "???"
    dt: float = number(0.1, 1e-4, 10.0, "s")
    jitter: float = number(0.02, 0.0, 1.0, "m")
    goals: List[GoalConfig] = field(default_factory=list)
    clearance: float = number(_SEPARATION.clearance, 0.0, 1.0, "m")
    obstacles: List[BodyConfig] = field(default_factory=list)
    person: Optional[PersonConfig] = None


@dataclass
class FalsifySpaceConfig:
    """A scenario space `coreach falsify` searches (conf/falsify/<name>.yaml): a base suite (scene, horizon,
    tolerances, start pose, operator), the goals a case may start at and switch to, and bounds [low, high] per
    parameter (coreach.falsify.space names the parameters and checks the bounds)."""

    name: str = "???"
    suite: str = "goal-switch"
    goals_from: Optional[List[str]] = None  # null = every goal of the scene
    goals_to: Optional[List[str]] = None  # null = every goal of the scene; a case switches to another goal
    switch: bool = True  # false: cases without a goal switch
    bounds: Dict[str, Any] = field(default_factory=dict)  # parameter -> [low, high] (checked by coreach.falsify.space)
    head_body: str = "head"  # the scene body (the person's head) that bounds.head_shift_m moves



@dataclass
class StudyConditionConfig:
    """One interface a participant drives: a released bundle (`ref`: a bundle folder, NAME@ALIAS or
    NAME/VERSION) or a baseline (`direct`, `blend`; no ref). `name` labels it in the analysis."""

    kind: str = "???"  # bundle, direct, blend (checked by coreach.study.plan, which names the condition)
    ref: Optional[str] = None
    name: Optional[str] = None  # null: the ref for a bundle, the kind for a baseline


@dataclass
class StudyTaskConfig:
    """One task: reach `goal` (a goal of the study's scene); optionally the goal changes to `switch_to`
    `switch_at_s` seconds into the trial."""

    name: str = "???"
    goal: str = "???"
    switch_to: Optional[str] = None
    switch_at_s: Optional[float] = number(None, 0.0, 1e4, "s", optional=True)


@dataclass
class StudyPopulationConfig:
    """Who the simulated participants of `coreach study simulate` are: each draws its Boltzmann operator's
    values uniformly from these [low, high] ranges (beta log-uniform; delay_steps whole control steps)."""

    beta: List[float] = field(default_factory=lambda: [100.0, 500.0])  # 1/m of one-step progress
    noise_std: List[float] = field(default_factory=lambda: [0.0, 0.1])  # stick units, white
    tremor_std: List[float] = field(default_factory=lambda: [0.0, 0.1])  # stick units, band-limited
    tremor_cutoff_hz: List[float] = field(default_factory=lambda: [1.0, 4.0])
    delay_steps: List[int] = field(default_factory=lambda: [0, 2])  # control steps of reaction delay


@dataclass
class StudyPlantedEffectConfig:
    """A fixed effect planted in simulated outcomes: seconds added to the completion time, log-odds added to
    the success logit (coreach.study.planted)."""

    time_s: float = number(0.0, -1e4, 1e4, "s")
    log_odds: float = number(0.0, -20.0, 20.0)


@dataclass
class StudyPowerConfig:
    """The difference a power analysis asks about: completion time of `first` minus `second`, in seconds."""

    first: Optional[str] = None  # null: the first condition that is not `second`
    second: Optional[str] = None  # null: the analysis' reference (direct when the study has it)
    time_s: float = number(-2.0, -1e4, 1e4, "s")


@dataclass
class StudyPlantedConfig:
    """A statistical population with known condition effects, for `coreach study power` (coverage of the
    analysis' intervals, power by simulation). Times are normal on the seconds scale with a random intercept
    per participant; success is logistic with a random intercept per participant on the log-odds scale."""

    base_time_s: float = number(40.0, 0.0, 1e4, "s", open_range=True)  # a condition and task with no effect
    participant_sd_time_s: float = number(5.0, 0.0, 1e4, "s")
    residual_sd_time_s: float = number(7.0, 0.0, 1e4, "s", open_range=True)  # > 0: the mixed model needs noise
    base_success: float = number(0.8, 0.0, 1.0, open_range=True)  # a participant with intercept 0, no effect
    participant_sd_log_odds: float = number(0.5, 0.0, 10.0)
    effects: Dict[str, StudyPlantedEffectConfig] = field(default_factory=dict)  # condition name -> effect
    tasks: Dict[str, StudyPlantedEffectConfig] = field(default_factory=dict)  # task name -> effect
    power: StudyPowerConfig = field(default_factory=StudyPowerConfig)


@dataclass
class StudyConfig:
    """A within-subject user study (coreach study plan): who drives what, in which order, how often."""

    name: str = "???"
    scenario: str = "bedside_shelf"  # the scene whose goals the tasks name
    conditions: List[StudyConditionConfig] = field(default_factory=list)
    tasks: List[StudyTaskConfig] = field(default_factory=list)
    trials: int = integer(3, 1, " (measured trials per condition and task)")
    practice_trials: int = integer(2, 0, " (practice trials per condition, before its measured trials)")
    participants: int = integer(12, 1, " (participants)")
    codes: Optional[List[str]] = None  # null: generated pseudonymous codes; else the lab's own, one each
    seed: int = integer(0, 0, " (the schedule's seed)")
    pilot: bool = False
    upload_to_tracking: bool = False  # log aggregates (never participant rows) of the analysis to MLflow
    trial_time_limit_s: float = number(30.0, 1.0, 600.0, "s")  # an unfinished trial ends as a failure here
    session_rate_hz: float = number(50.0, 10.0, 1000.0, "Hz")  # control rate of a person's session
    simulate_rate_hz: float = number(10.0, 5.0, 1000.0, "Hz")  # control rate of a simulated participant
    population: StudyPopulationConfig = field(default_factory=StudyPopulationConfig)
    # simulation assumptions for power analysis only; not part of the frozen schedule (coreach.study.plan)
    planted: StudyPlantedConfig = field(default_factory=StudyPlantedConfig)



SCHEMAS = {"suite": ("base_suite", SuiteConfig), "scenario": ("base_scenario", ScenarioConfig),
           "falsify": ("base_falsify", FalsifySpaceConfig), "study": ("base_study", StudyConfig)}  # fmt: skip


def register() -> None:
    """Store the schemas in Hydra's ConfigStore (idempotent): before any config is composed."""
    cs = ConfigStore.instance()
    for group, (name, node) in SCHEMAS.items():
        cs.store(group=group, name=name, node=node)
