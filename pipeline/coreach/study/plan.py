"""The frozen schedule of a study: who drives which condition in which order, hashed and versioned."""

from __future__ import annotations

import hashlib
import json
import re
import string
import time
from pathlib import Path

import numpy as np
from omegaconf import OmegaConf

from coreach.config.compose import SUITE_CONFIG, compose_here
from coreach.config.option_specs import check_ranges
from coreach.config.schemas import StudyConfig, StudyTaskConfig
from coreach.errors import ConfigError
from coreach.release.relaxation import relaxed_gate
from coreach.runtime.bundle import verify_bundle
from coreach.runtime.cautions import cautions
from coreach.study.codes import check_codes, generate_codes
from coreach.study.conditions import check_conditions
from coreach.study.files import private_folder, write_private
from coreach.study.williams import williams_rows

PLAN_FORMAT = "coreach-study-plan/1"
PLAN_FILE = "plan.json"
SESSIONS = "sessions"  # <study folder>/sessions/<code>/: a session has started for that participant
DEFAULT_ROOT = Path(".coreach") / "studies"
_VERSION = re.compile(r"^v([0-9]+)$")
# Study-config sections that describe simulated populations, not the schedule: kept out of the frozen plan so
# that changing a simulation assumption neither changes the plan's hash nor asks for a new version
SIMULATION_ONLY = ("planted",)


def compose_study(name: str, overrides: list[str]) -> dict:
    """The study config NAME (conf/coreach_conf/study/NAME.yaml) with `study.KEY=VALUE` overrides, checked
    against its schema and ranges, as plain data."""
    for o in overrides:
        if not o.startswith("study.") or "=" not in o:
            raise ConfigError(f"override {o!r}", "expected study.KEY=VALUE (e.g. study.participants=18)")
    cfg = compose_here("study_plan", [f"study={name}", *overrides], f"study/{name}.yaml")
    check_ranges(StudyConfig, cfg.study, "study")
    for i, task in enumerate(cfg.study.tasks):
        check_ranges(StudyTaskConfig, task, f"study.tasks.{i}")
    return OmegaConf.to_container(cfg.study, resolve=True)


def scenario_goals(scenario: str) -> list[str]:
    """The goal names of a shipped scene (composed through Hydra, without building the scene's bodies)."""
    cfg = compose_here(SUITE_CONFIG, [f"scenario={scenario}"], f"study.scenario {scenario!r}")
    return [str(g.name) for g in cfg.scenario.goals]


def check_tasks(tasks: list[dict], goals: list[str], where: str) -> list[dict]:
    """Each task names a goal of the scene; a goal change names another goal and when it happens."""
    if not tasks:
        raise ConfigError(f"{where}.tasks", "no tasks; expected at least one")
    names: set[str] = set()
    for i, t in enumerate(tasks):
        at = f"{where}.tasks.{i}"
        if t["name"] in names:
            raise ConfigError(f"{at}.name", f"task name {t['name']!r} appears twice")
        names.add(t["name"])
        for key in ("goal", "switch_to"):
            if t.get(key) is not None and t[key] not in goals:
                raise ConfigError(f"{at}.{key}", f"unknown goal {t[key]!r}; the scene's goals are {', '.join(goals)}")
        if (t.get("switch_to") is None) != (t.get("switch_at_s") is None):
            raise ConfigError(at, "a goal change needs both switch_to and switch_at_s (or neither)")
        if t.get("switch_to") == t["goal"]:
            raise ConfigError(f"{at}.switch_to", f"the goal changes to itself ({t['goal']!r})")
    return [dict(t) for t in tasks]


def check_population(population: dict, where: str) -> None:
    """Each simulated-participant parameter is a [low, high] range inside what the operator accepts."""
    floors = {"beta": 1e-9, "noise_std": 0.0, "tremor_std": 0.0, "tremor_cutoff_hz": 1e-9, "delay_steps": 0}
    for key, floor in floors.items():
        r = population.get(key)
        if r is None or len(r) != 2 or not all(isinstance(v, (int, float)) for v in r):
            raise ConfigError(f"{where}.{key}", f"{r!r}; expected [low, high]")
        lo, hi = float(r[0]), float(r[1])
        if not (floor <= lo <= hi < float("inf")):
            raise ConfigError(f"{where}.{key}", f"[{r[0]}, {r[1]}]; expected {floor:g} <= low <= high (finite)")


def check_vetted(folder: Path, where: str, pilot: bool) -> None:
    """A bundle a participant drives must be verified and released with the shipped gate settings (or
    looser only in a pilot)."""
    loose = relaxed_gate(verify_bundle(folder).gate)
    if loose and not pilot:
        raise ConfigError(where, f"{folder} was released with gate settings looser than shipped "
                                 f"({'; '.join(loose)}); a study drives vetted bundles only, unless it says "
                                 "pilot: true")  # fmt: skip


def build_plan(study: dict, base: Path | None = None) -> dict:
    """The schedule (a plain, JSON-ready dict) for a composed study; the same config always gives the same
    plan, since every random choice comes from one numpy Generator seeded with `study['seed']`."""
    where = "study"
    if study["participants"] < 1:
        raise ConfigError(f"{where}.participants", "zero participants; expected at least one")
    if study["trials"] < 1:
        raise ConfigError(f"{where}.trials", "zero trials; expected at least one per condition and task")
    check_population(study.get("population") or {}, f"{where}.population")
    conditions = check_conditions(study["conditions"], where, base)
    tasks = check_tasks(study["tasks"], scenario_goals(study["scenario"]), where)
    for i, c in enumerate(conditions):
        if c["ref_checked"] == "folder exists":  # registry references are checked when a session resolves them
            check_vetted(Path(c["ref"]) if base is None else base / c["ref"], f"{where}.conditions.{i}.ref",
                         bool(study["pilot"]))  # fmt: skip
    n = len(conditions)
    if n > len(string.ascii_uppercase):
        raise ConfigError(f"{where}.conditions", f"{n} conditions; at most 26 (one letter each)")
    rng = np.random.default_rng(study["seed"])
    # Letters are dealt at random so that A is not always the first-listed (often the lab's own) interface
    dealt = rng.permutation(n)
    letters = {string.ascii_uppercase[i]: conditions[int(dealt[i])]["name"] for i in range(n)}
    for letter, name in letters.items():
        next(c for c in conditions if c["name"] == name)["letter"] = letter
    rows = [[string.ascii_uppercase[i] for i in row] for row in williams_rows(n)]
    count = study["participants"]
    codes = check_codes(study["codes"], count, where) if study.get("codes") else generate_codes(count, rng)
    check_codes(codes, count, where)  # generated ones too: the check is the guarantee, not the construction
    people = []
    for k, code in enumerate(codes):
        row = rows[k % len(rows)]
        blocks = []
        for position, letter in enumerate(row):
            order = [tasks[int(i)]["name"] for i in rng.permutation(len(tasks))]
            trials = [{"task": name, "repeat": r + 1} for name in order for r in range(study["trials"])]
            blocks.append({"position": position + 1, "letter": letter, "practice_trials": study["practice_trials"],
                           "task_order": order, "trials": trials})  # fmt: skip
        people.append({"code": code, "row": k % len(rows) + 1, "order": row, "blocks": blocks})
    return {
        "format": PLAN_FORMAT,
        "name": study["name"],
        "pilot": bool(study["pilot"]),
        "config": {k: v for k, v in study.items() if k not in SIMULATION_ONLY},
        "conditions": conditions,
        "letters": letters,  # the experimenter's key: never shown on a participant's page
        "design": {"kind": "Williams", "rows": rows, "sequences": len(rows),
                   "balanced": count % len(rows) == 0},  # fmt: skip
        "tasks": tasks,
        "participants": people,
    }


def canonical_json(data) -> str:
    """Sorted keys, no spaces, UTF-8: the bytes the hash is taken over."""
    return json.dumps(data, sort_keys=True, separators=(",", ":"), ensure_ascii=False)


def plan_hash(plan: dict) -> str:
    return hashlib.sha256(canonical_json(plan).encode("utf-8")).hexdigest()


def versions(study_root: Path) -> list[int]:
    """The versions v<N> of a study that hold a plan, oldest first."""
    if not study_root.is_dir():
        return []
    found = [int(m.group(1)) for p in study_root.iterdir() if (m := _VERSION.match(p.name))]
    return sorted(v for v in found if (study_root / f"v{v}" / PLAN_FILE).is_file())


def sessions_of(folder: Path) -> list[str]:
    """The participant codes with a session folder under a version's folder."""
    root = folder / SESSIONS
    return sorted(p.name for p in root.iterdir() if p.is_dir()) if root.is_dir() else []


def read_plan(path: Path) -> dict:
    """A written plan file, checked against its own hash."""
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
        plan, digest = data["plan"], data["sha256"]
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise ConfigError(str(path), f"not a readable study plan ({type(exc).__name__}: {exc})") from None
    if plan_hash(plan) != digest:
        raise ConfigError(str(path), "the plan does not match its sha256: it was edited by hand; plans are "
                                     "frozen, make a new version with coreach study plan --new-version")  # fmt: skip
    return data


def latest_folder(root: Path, name: str, version: int | None = None) -> Path:
    """The folder of version `version` (default the latest) of study `name`."""
    found = versions(root / name)
    if not found:
        raise ConfigError(f"study {name}", f"no plan under {root / name}; run coreach study plan {name} first")
    if version is None:
        return root / name / f"v{found[-1]}"
    if version not in found:
        raise ConfigError(f"study {name}", f"no version v{version}; versions: {', '.join(f'v{v}' for v in found)}")
    return root / name / f"v{version}"


def freeze(plan: dict, root: Path, new_version: bool = False) -> dict:
    """Write the plan as the study's latest version, or change nothing when it is the same; refuses (one
    line) a changed plan for a version whose sessions have started, unless `new_version`."""
    name = plan["name"]
    study_root = root / name
    digest = plan_hash(plan)
    found = versions(study_root)
    version, status = 1, "written"
    if found:
        latest = found[-1]
        folder = study_root / f"v{latest}"
        existing = read_plan(folder / PLAN_FILE)
        if existing["sha256"] == digest:
            return {"status": "unchanged", "version": latest, "path": str(folder / PLAN_FILE), "sha256": digest,
                    "sessions": len(sessions_of(folder))}  # fmt: skip
        started = sessions_of(folder)
        if new_version:
            version, status = latest + 1, "written as a new version"
        elif started:
            raise ConfigError(f"study {name} v{latest}", f"the config differs from the frozen plan and "
                              f"{len(started)} session(s) have started ({folder / SESSIONS}); nothing was "
                              f"written. Use --new-version to plan v{latest + 1}")  # fmt: skip
        else:
            version, status = latest, "replaced (no session had started)"
    private_folder(root)
    private_folder(study_root)
    folder = private_folder(study_root / f"v{version}")
    document = {"plan": plan, "sha256": digest, "version": version, "written_at": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
                "cautions": cautions(recording=True, study=True)}  # fmt: skip
    path = write_private(folder / PLAN_FILE, json.dumps(document, indent=2, ensure_ascii=False) + "\n")
    return {"status": status, "version": version, "path": str(path), "sha256": digest, "sessions": 0}
