"""Vetting suites: the episodes a closed-loop test runs (scene, layouts, starts, operator, switches), built from
the `suite`, `scenario` and `operator` config groups."""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import torch
from torch import Tensor
from omegaconf import DictConfig, OmegaConf

from coreach.config.compose import SUITE_CONFIG, compose_here, is_file_reference, on_schema, options, read_yaml_file
from coreach.config.option_specs import check_ranges, is_number
from coreach.config.schemas import (DEFAULT_ORIENTATION_TOL_DEG, DEFAULT_POSITION_TOL, MIN_SEED, CaseConfig,
                                    CaseOperatorConfig, SuiteConfig, ToleranceConfig)  # fmt: skip
from coreach.demonstrator import rollout as scripted
from coreach.errors import ConfigError
from coreach.host.registry import build_plugin
from coreach.world.geometry import angle_between
from coreach.world.scenario import Layout, Scenario, load_scenario, scenario_from_config

__all__ = ["Suite", "EpisodePlan", "load_suite", "builtin_suites", "build_suite", "suite_from_config", "suite_from_dict",
           "MIN_SEED"]




@dataclass
class EpisodePlan:
    """What each of E episodes will be: goals, switch, layout and start (float64, SI units)."""

    goal_initial: Tensor  # [E] long
    goal_final: Tensor  # [E] long (== goal_initial when there is no switch)
    switch_step: Tensor  # [E] long, -1 for no switch
    switch_fraction: Tensor  # [E] float64, nan for no switch
    layout: Layout  # E layouts of all G goals
    q_start: Tensor  # [E, n]
    # per-episode operator values ({name: [E]}; nan, or -1 for delay_steps, = the operator's own value);
    # empty unless the suite lists cases that set them
    operator_values: dict = field(default_factory=dict)
    # per-episode translation of named scene bodies ({name: [E, 3]} m, zero = where the scene puts it); empty
    # unless the suite lists cases that set one (the loop then measures each episode against its own bodies)
    body_shift: dict = field(default_factory=dict)

    def __len__(self) -> int:
        return int(self.goal_initial.shape[0])

    def select(self, idx) -> EpisodePlan:
        """The episodes at `idx` (a list, slice or index tensor), in that order."""
        lay = self.layout
        return EpisodePlan(
            self.goal_initial[idx], self.goal_final[idx], self.switch_step[idx], self.switch_fraction[idx],
            Layout(lay.names, lay.approach_pos[idx], lay.approach_rot[idx], lay.fine[idx]), self.q_start[idx],
            {k: v[idx] for k, v in self.operator_values.items()}, {k: v[idx] for k, v in self.body_shift.items()},
        )  # fmt: skip


@dataclass
class Suite:
    """One vetting suite. Every episode count is per switch cell (`switch_fractions` entry)."""

    name: str
    scenario: str  # shipped scenario name or YAML path
    operator: dict  # operator plugin config (with _target_)
    goals: list[str] | None = None  # goals used as initial/final goals; None = all goals of the scenario
    layout_offset: tuple[float, float, float] = (0.0, 0.0, 0.0)  # m, added to every approach point
    layout_jitter: float | None = None  # m, uniform per axis; None = the scenario's jitter
    start: str | list[float] = "home"
    start_jitter: float = 0.0  # rad, uniform per joint
    switch_fractions: list[float | None] = field(default_factory=lambda: [None])
    switch_to: str = "next"  # "next": goal after the initial one (cyclic); "random": any other goal
    episodes: int = 50
    seed: int = MIN_SEED
    horizon_s: float = 20.0
    dt: float | None = None  # s; None = the scenario's dt
    position_tol: float = DEFAULT_POSITION_TOL  # m
    orientation_tol_deg: float = DEFAULT_ORIENTATION_TOL_DEG
    candidates_per_axis: int = 5
    cases: list[dict] = field(default_factory=list)  # explicit episodes (CaseConfig as plain data)
    path: str = "suite"  # where it was read from, for error messages
    scenario_obj: Scenario | None = field(default=None, repr=False, compare=False)

    # ----- derived -----
    @property
    def scene(self) -> Scenario:
        """The loaded scenario (loaded once)."""
        if self.scenario_obj is None:
            self.scenario_obj = load_scenario(self.scenario)
        return self.scenario_obj

    @property
    def step_dt(self) -> float:
        return float(self.dt if self.dt is not None else self.scene.dt)

    @property
    def steps(self) -> int:
        """Control steps per episode T."""
        return max(1, int(round(self.horizon_s / self.step_dt)))

    @property
    def n_episodes(self) -> int:
        return self.episodes * (len(self.cases) if self.cases else len(self.switch_fractions))

    @property
    def goal_names(self) -> list[str]:
        return self.scene.goal_names

    @property
    def goal_indices(self) -> list[int]:
        """Indices (into the scenario's goals) of the goals this suite uses."""
        names = self.goal_names
        return list(range(len(names))) if self.goals is None else [names.index(g) for g in self.goals]

    @property
    def orientation_tol(self) -> float:
        return math.radians(self.orientation_tol_deg)

    @property
    def tolerances(self) -> dict[str, float]:
        return {"position_m": self.position_tol, "orientation_deg": self.orientation_tol_deg}

    def to_dict(self) -> dict:
        """The suite as plain data, in the flat form suite_from_dict reads (for run records and reports)."""
        keys = ["name", "scenario", "operator"] + [f.name for f in dataclasses.fields(SuiteConfig)
                                                   if f.name not in ("name", "tolerances")]  # fmt: skip
        if not self.cases:
            keys.remove("cases")
        out = {k: getattr(self, k) for k in keys}
        out["layout_offset"] = list(self.layout_offset)
        out["tolerances"] = self.tolerances
        return out

    def stick_grid(self, dtype: torch.dtype = torch.float64) -> Tensor:
        """Candidate sticks [K, 2], K = candidates_per_axis^2, on a regular grid over [-1, 1]^2
        (row k = (x_i, y_j) with k = i * c + j)."""
        axis = torch.linspace(-1.0, 1.0, self.candidates_per_axis, dtype=dtype)
        gx, gy = torch.meshgrid(axis, axis, indexing="ij")
        return torch.stack([gx.reshape(-1), gy.reshape(-1)], dim=-1)

    def generator(self) -> torch.Generator:
        """A fresh generator seeded with the suite's seed: give every interface its own, so all of them
        meet the same episodes."""
        return torch.Generator().manual_seed(int(self.seed))

    def build_operator(self):
        """The operator plugin, checked against the Operator protocol."""
        try:
            return build_plugin(OmegaConf.create(self.operator), "operator")
        except ConfigError as exc:
            raise ConfigError(f"{self.path}, option operator ({exc.where})", exc.problem) from None

    # ----- checks that need the robot or the decoder -----
    def validate(self, robot, spec_n_goals: int | None = None, where: str | None = None) -> None:
        """Raise one ConfigError naming the suite file and the item if this suite cannot run on `robot`
        (or with a decoder trained for `spec_n_goals` goals)."""
        where = where or self.path
        scene = self.scene
        G = len(scene.goals)
        if spec_n_goals is not None and int(spec_n_goals) != G:
            raise ConfigError(
                f"{where}, option scenario",
                f"the decoder was trained for {spec_n_goals} goals but scenario {scene.name!r} has {G} "
                f"({', '.join(scene.goal_names)}); vet it on a suite over a scene with the same goals",
            )
        q0 = self._start_q(robot, where)
        for i, case in enumerate(self.cases):
            if case["start_offset"] and len(case["start_offset"]) != robot.dof:
                raise ConfigError(f"{where}, option cases[{i}].start_offset",
                                  f"expected [] or {robot.dof} joint offsets (rad) for {robot.name}, got "
                                  f"{len(case['start_offset'])} values")  # fmt: skip
        self.build_operator()
        self._check_reach(robot, q0, where)

    def _start_q(self, robot, where: str) -> Tensor:
        n = robot.dof
        if self.start == "home":
            return robot.q_home.to(torch.float64)
        q0 = torch.tensor(self.start, dtype=torch.float64)
        if q0.shape != (n,):
            raise ConfigError(
                f"{where}, option start",
                f"expected 'home' or {n} joint positions (rad) for {robot.name} {list(robot.joint_names)}, "
                f"got {len(self.start)} values",
            )
        lo, hi = robot.q_lower.to(torch.float64), robot.q_upper.to(torch.float64)
        bad = [name for name, v, a, b in zip(robot.joint_names, q0, lo, hi) if not a <= v <= b]
        if bad:
            raise ConfigError(f"{where}, option start", f"joint positions outside {robot.name}'s limits for {bad}")
        return q0

    def _check_reach(self, robot, q0: Tensor, where: str) -> None:
        """Run the scripted demonstrator, noise-free, from the start pose to every used goal at its offset
        position; a goal it cannot complete within the tolerances and the horizon is out of reach."""
        scene = self.scene
        used = self.goal_indices
        goals = [dataclasses.replace(scene.goals[i]) for i in used]
        for g in goals:
            g.position = [p + o for p, o in zip(g.position, self.layout_offset)]
        probe = Scenario(name=scene.name, goals=goals, jitter=0.0, dt=self.step_dt)
        run = scripted(
            _StartAt(robot, q0), probe, len(goals), seed=int(self.seed), noise=0.0, max_steps=self.steps,
            goal_order="round_robin", arrive_tol=self.position_tol, approach_rot_tol=self.orientation_tol,
        )  # fmt: skip
        for e, goal in enumerate(goals):
            if bool(run.completed[e]):
                continue
            last = int(run.lengths[e]) - 1
            q_last = run.q[e, last : last + 1] + run.qd[e, last : last + 1] * run.dt  # [1, n]
            pos, rot = robot.fk(q_last.to(torch.float64))
            end = run.layout.approach_pos[e, e] + run.layout.fine[e, e]
            miss = float((pos[0].to(torch.float64) - end).norm())
            ang = math.degrees(float(angle_between(run.layout.approach_rot[e, e], rot[0].to(torch.float64))))
            raise ConfigError(
                f"{where}, goal {goal.name}",
                f"out of reach for {robot.name} from the suite's start pose (layout_offset "
                f"{list(self.layout_offset)}): the scripted demonstrator ended {miss:.3f} m from the end of "
                f"its fine motion ({ang:.0f} deg from the approach orientation) after {self.steps} steps; "
                f"expected within {self.position_tol} m and {self.orientation_tol_deg} deg",
            )

    # ----- episodes -----
    def episodes_plan(self, generator: torch.Generator, robot=None) -> EpisodePlan:
        """Every episode of the suite, cells in `switch_fractions` order, `episodes` per cell.

        Initial goals go round-robin over the used goals inside each cell (balanced cells). Random draws,
        in this order: layouts (scenario jitter replaced by `layout_jitter`, then `layout_offset` added),
        start jitter, and the final goals when `switch_to` is "random". `robot` gives the home pose and
        joint limits (needed unless `start` lists joint positions and `start_jitter` is 0).
        """
        if self.cases:
            return self._cases_plan(generator, robot)
        E, T = self.n_episodes, self.steps
        used = torch.tensor(self.goal_indices, dtype=torch.long)
        U = len(used)
        slot = torch.arange(self.episodes).repeat(len(self.switch_fractions)) % U  # [E] position in `used`
        fractions = torch.tensor(
            [math.nan if f is None else float(f) for f in self.switch_fractions], dtype=torch.float64
        ).repeat_interleave(self.episodes)  # [E]
        has_switch = ~torch.isnan(fractions)
        switch_step = torch.where(has_switch, torch.round(torch.nan_to_num(fractions) * T).long(), -1)

        layout, q_start = self._layouts_and_starts(E, generator, robot)
        if robot is not None:
            lo, hi = robot.q_lower.to(torch.float64), robot.q_upper.to(torch.float64)
            q_start = torch.minimum(torch.maximum(q_start, lo), hi)

        if self.switch_to == "next":
            final_slot = (slot + 1) % U
        else:
            final_slot = (slot + torch.randint(1, max(U, 2), (E,), generator=generator)) % U
        final_slot = torch.where(has_switch, final_slot, slot)
        return EpisodePlan(used[slot], used[final_slot], switch_step, fractions, layout, q_start)

    def _layouts_and_starts(self, E: int, generator: torch.Generator, robot) -> tuple[Layout, Tensor]:
        """E layouts (the scene's jitter replaced by `layout_jitter`, `layout_offset` added) and E start poses
        (start jitter drawn, clamped to the joint limits), in that draw order."""
        scene = self.scene
        jitter = scene.jitter if self.layout_jitter is None else float(self.layout_jitter)
        layout = dataclasses.replace(scene, jitter=jitter).sample_layouts(E, generator)
        layout.approach_pos = layout.approach_pos + torch.tensor(self.layout_offset, dtype=torch.float64)
        if robot is None and (self.start == "home" or self.start_jitter > 0):
            raise ValueError("episodes_plan needs the robot for start='home' or start_jitter > 0")
        q0 = self._start_q(robot, self.path) if robot is not None else torch.tensor(self.start, dtype=torch.float64)
        noise = torch.rand(E, q0.shape[0], generator=generator, dtype=torch.float64) * 2 - 1
        return layout, q0 + self.start_jitter * noise

    def _cases_plan(self, generator: torch.Generator, robot) -> EpisodePlan:
        """The suite's cases, each `episodes` times (case-major): the case's goals and switch, its layout shift
        on top of the drawn layout, its start offset on top of the drawn start, its operator values, its
        body shifts."""
        names = self.goal_names
        R, T = self.episodes, self.steps
        E = R * len(self.cases)
        layout, q_start = self._layouts_and_starts(E, generator, robot)

        def per_case(values, dtype) -> Tensor:
            return torch.tensor(values, dtype=dtype).repeat_interleave(R, dim=0)

        initial = per_case([names.index(c["goal"]) for c in self.cases], torch.long)
        final = per_case([names.index(c["switch_to"] or c["goal"]) for c in self.cases], torch.long)
        fraction = per_case([math.nan if c["switch_to"] is None else float(c["switch_at"]) for c in self.cases],
                            torch.float64)  # fmt: skip
        step = torch.where(torch.isnan(fraction), -1,
                           torch.round(torch.nan_to_num(fraction) * T).long().clamp(1, T - 1))  # fmt: skip
        shift = per_case([[c["layout_shift"].get(g, [0.0, 0.0, 0.0]) for g in names] for c in self.cases],
                         torch.float64)  # [E, G, 3]
        layout.approach_pos = layout.approach_pos + shift
        n = q_start.shape[1]
        q_start = q_start + per_case([c["start_offset"] or [0.0] * n for c in self.cases], torch.float64)
        if robot is not None:
            lo, hi = robot.q_lower.to(torch.float64), robot.q_upper.to(torch.float64)
            q_start = torch.minimum(torch.maximum(q_start, lo), hi)
        values = {}
        for key in ("beta", "noise_std", "tremor_std", "tremor_cutoff_hz"):
            if any(c["operator"].get(key) is not None for c in self.cases):
                values[key] = per_case([math.nan if c["operator"].get(key) is None else float(c["operator"][key])
                                        for c in self.cases], torch.float64)  # fmt: skip
        if any(c["operator"].get("delay_steps") is not None for c in self.cases):
            values["delay_steps"] = per_case([-1 if c["operator"].get("delay_steps") is None
                                              else int(c["operator"]["delay_steps"]) for c in self.cases], torch.long)
        moved = sorted({b for c in self.cases for b in c.get("body_shift", {})})
        bodies = {b: per_case([c.get("body_shift", {}).get(b, [0.0, 0.0, 0.0]) for c in self.cases], torch.float64)
                  for b in moved}  # fmt: skip
        return EpisodePlan(initial, final, step, fraction, layout, q_start, values, bodies)


class _StartAt:
    """A robot seen through a different home pose (the demonstrator starts from q_home)."""

    def __init__(self, robot, q0: Tensor):
        self._robot, self._q0 = robot, q0

    def __getattr__(self, name):
        return getattr(self._robot, name)

    @property
    def q_home(self) -> Tensor:
        return self._q0


# ----- building from configs -----
def builtin_suites() -> list[str]:
    """Names of the suites shipped in the `suite` config group."""
    return options("suite")


def _operator(value: Any, where: str) -> dict:
    """An operator option's config: a shipped name (the `operator` config group) or a mapping with _target_."""
    if isinstance(value, str):
        if value not in options("operator"):
            raise ConfigError(where, f"unknown operator {value!r}; expected one of {options('operator')} or a "
                                     "mapping with _target_")  # fmt: skip
        return OmegaConf.to_container(compose_here(SUITE_CONFIG, [f"operator={value}"], where).operator)
    if isinstance(value, dict) and isinstance(value.get("_target_"), str):
        return dict(value)
    raise ConfigError(where, f"expected a shipped operator name ({options('operator')}) or a mapping with "
                             f"_target_, got {value!r}")  # fmt: skip


def build_suite(node: Any, scene: Scenario, operator: dict, where: str) -> Suite:
    """A Suite from its options (a composed `suite` node or plain data, checked against SuiteConfig: keys,
    types, ranges), its scene and its operator's config; the checks that need the scene follow."""
    o = on_schema(SuiteConfig, OmegaConf.to_container(node) if isinstance(node, DictConfig) else node, where)
    check_ranges(SuiteConfig, o, where)
    check_ranges(ToleranceConfig, o["tolerances"], f"{where}.tolerances")
    tol = o["tolerances"]
    goals = o["goals"]
    if goals is not None:
        if not goals:
            raise ConfigError(f"{where}.goals", f"expected null (all goals) or a list of goal names, got {goals!r}")
        for i, g in enumerate(goals):
            if g not in scene.goal_names:
                raise ConfigError(f"{where}.goals[{i}]",
                                  f"unknown goal {g!r}; scenario {scene.name!r} has {scene.goal_names}")  # fmt: skip
        if len(set(goals)) != len(goals):
            raise ConfigError(f"{where}.goals", f"duplicate goal names in {goals}")
    start = o["start"]
    if start != "home" and not (isinstance(start, list) and start and all(is_number(v) for v in start)):
        raise ConfigError(f"{where}.start", f"expected 'home' or a list of joint positions (rad), got {start!r}")
    fractions = o["switch_fractions"]
    if not fractions:
        raise ConfigError(f"{where}.switch_fractions", "expected a non-empty list (null = no switch), got []")
    for i, f in enumerate(fractions):
        if f is not None and not (is_number(f) and 0.0 < f < 1.0):
            raise ConfigError(f"{where}.switch_fractions[{i}]",
                              f"expected null (no switch) or a fraction of the horizon strictly between 0 and 1, got {f!r}")  # fmt: skip
    if any(f is not None for f in fractions) and len(scene.goals if goals is None else goals) < 2 and not o["cases"]:
        raise ConfigError(f"{where}.switch_fractions", "goal switches need at least 2 goals")
    cases = [_check_case(c, scene, f"{where}.cases[{i}]") for i, c in enumerate(o["cases"])]
    suite = Suite(
        name=o["name"], scenario=scene.name, operator=dict(operator), goals=goals,
        layout_offset=tuple(float(v) for v in o["layout_offset"]), layout_jitter=o["layout_jitter"], start=start,
        start_jitter=float(o["start_jitter"]), switch_fractions=list(fractions), switch_to=o["switch_to"],
        episodes=o["episodes"], seed=o["seed"], horizon_s=float(o["horizon_s"]), dt=o["dt"],
        position_tol=float(tol["position_m"]), orientation_tol_deg=float(tol["orientation_deg"]),
        candidates_per_axis=o["candidates_per_axis"], cases=cases, path=where, scenario_obj=scene,
    )  # fmt: skip
    for i, f in enumerate(fractions):
        if f is not None and not 1 <= round(f * suite.steps) <= suite.steps - 1:
            raise ConfigError(f"{where}.switch_fractions[{i}]",
                              f"switch at step {round(f * suite.steps)} of {suite.steps}; expected a step inside the horizon")  # fmt: skip
    return suite


def _check_shifts(shifts: dict, known: list[str], kind: str, where: str, scene: Scenario) -> None:
    """{name: [dx, dy, dz]} of a case: every name one of the scene's (goals or bodies), every value 3 numbers."""
    for name, v in shifts.items():
        if name not in known:
            raise ConfigError(f"{where}.{name}", f"unknown {kind}; scenario {scene.name!r} has {known}")
        if not isinstance(v, list) or len(v) != 3 or not all(is_number(x) for x in v):
            raise ConfigError(f"{where}.{name}", f"expected [dx, dy, dz] in m, got {v!r}")


def _check_case(case: Any, scene: Scenario, where: str) -> dict:
    """One case as plain data, checked against CaseConfig and the scene (goal names, switch, shift vectors,
    body names)."""
    c = on_schema(CaseConfig, OmegaConf.to_container(case) if isinstance(case, DictConfig) else case, where)
    check_ranges(CaseConfig, c, where)
    check_ranges(CaseOperatorConfig, c["operator"], f"{where}.operator")
    names = scene.goal_names
    for key in ("goal", "switch_to"):
        if c[key] is not None and c[key] not in names:
            raise ConfigError(f"{where}.{key}", f"unknown goal {c[key]!r}; scenario {scene.name!r} has {names}")
    if (c["switch_to"] is None) != (c["switch_at"] is None):
        raise ConfigError(f"{where}.switch_at", "give switch_to and switch_at together (or neither: no switch)")
    if c["switch_to"] is not None and c["switch_to"] == c["goal"]:
        raise ConfigError(f"{where}.switch_to", f"a switch leads to another goal than {c['goal']!r}")
    if c["switch_at"] is not None and not 0.0 < c["switch_at"] < 1.0:
        raise ConfigError(f"{where}.switch_at", f"expected a fraction of the horizon strictly between 0 and 1, "
                                                f"got {c['switch_at']!r}")  # fmt: skip
    _check_shifts(c["layout_shift"], names, "goal", f"{where}.layout_shift", scene)
    _check_shifts(c["body_shift"], scene.body_names, "body", f"{where}.body_shift", scene)
    if not all(is_number(x) for x in c["start_offset"]):
        raise ConfigError(f"{where}.start_offset", f"expected joint offsets in rad, got {c['start_offset']!r}")
    delay = c["operator"].get("delay_steps")
    if delay is not None and (not isinstance(delay, int) or isinstance(delay, bool) or delay < 0):
        raise ConfigError(f"{where}.operator.delay_steps", f"expected null or an integer >= 0, got {delay!r}")
    return c


def suite_from_config(cfg: DictConfig, where: str = "suite") -> Suite:
    """The Suite of a composed config holding `suite`, `scenario` and `operator` (coreach vet, replay)."""
    scene = scenario_from_config(cfg.scenario, f"scenario {cfg.scenario.get('name', '')}".strip())
    return build_suite(cfg.suite, scene, OmegaConf.to_container(cfg.operator, resolve=True), where)


def suite_from_dict(d: Any, where: str, default_name: str = "suite") -> Suite:
    """A Suite from one flat mapping: the suite's options plus `scenario` (a name or a scene file) and
    `operator` (a name or a mapping with _target_), as a lab's own suite file or a test writes it."""
    if not isinstance(d, dict):
        raise ConfigError(where, f"expected a mapping of suite options, got {type(d).__name__}")
    d = dict(d)
    scene_ref = d.pop("scenario", "bedside_shelf")
    try:
        scene = load_scenario(scene_ref)
    except ConfigError as exc:
        raise ConfigError(f"{where}, option scenario ({exc.where})", exc.problem) from None
    operator = _operator(d.pop("operator", "expert"), f"{where}, option operator")
    d.setdefault("name", default_name)
    return build_suite(d, scene, operator, where)


def load_suite(name_or_path: str | Path, **overrides) -> Suite:
    """A suite by name (the `suite` config group, composed through Hydra with its scene and operator) or a lab's
    own flat YAML file (suite_from_dict). `overrides` set suite options (e.g. episodes=20) or `operator`."""
    if is_file_reference(name_or_path):
        data = {**read_yaml_file(name_or_path, "suite"), **overrides}
        return suite_from_dict(data, str(name_or_path), default_name=Path(str(name_or_path)).stem)
    name = str(name_or_path)
    if name not in builtin_suites():
        raise ConfigError("option suite", f"unknown suite {name!r}; expected one of {builtin_suites()} or a .yaml path")
    args = [f"suite={name}"]
    for key, value in overrides.items():
        args.append(f"operator={value}" if key == "operator" else f"suite.{key}={_override_value(value)}")
    cfg = compose_here(SUITE_CONFIG, args, f"suite/{name}.yaml")
    return suite_from_config(cfg, f"suite/{name}.yaml")


def _override_value(value: Any) -> str:
    """A Python value as a Hydra override value (null, numbers, lists, strings)."""
    if value is None:
        return "null"
    if isinstance(value, (list, tuple)):
        return "[" + ",".join(_override_value(v) for v in value) + "]"
    return str(value)
