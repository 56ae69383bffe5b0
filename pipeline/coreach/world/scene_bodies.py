"""A scene's bodies from YAML: furniture as primitives with poses, and the person with their separation zones."""

from __future__ import annotations

import math
from dataclasses import replace
from typing import Any

import numpy as np

from coreach.control.bodies import SHAPES, Primitive, pack, point_distances
from coreach.control.separation import SeparationSettings
from coreach.errors import ConfigError

__all__ = ["finite_list", "named_entry", "parse_obstacles", "parse_person", "check_goals_clear", "world_json", "world_from_json", "SIZE_FORMS"]

# what `size` holds per shape (m)
SIZE_FORMS = {"box": ("x", "y", "z"), "cylinder": ("radius", "length"), "capsule": ("radius", "length"),
              "sphere": ("radius",)}  # fmt: skip
_BODY_KEYS = {"name", "shape", "size", "xyz", "rpy_deg"}
# the person's settings (ISO/TS 15066 speed and separation monitoring terms; coreach.control.separation)
_PERSON_KEYS = {"bodies", "speed", "reaction_time", "stopping_time", "intrusion", "person_uncertainty",
                "robot_uncertainty"}  # fmt: skip


def finite_list(value: Any, n: int, at: str, what: str) -> tuple[float, ...]:
    """n finite numbers (not booleans); ConfigError naming `at` and saying what was expected."""
    if isinstance(value, (str, bytes)) or not hasattr(value, "__len__") or len(value) != n:
        raise ConfigError(at, f"expected {n} numbers ({what}), got {value!r}")
    try:
        out = tuple(float(v) for v in value)
    except (TypeError, ValueError):
        raise ConfigError(at, f"expected {n} numbers ({what}), got {value!r}") from None
    if any(isinstance(v, bool) for v in value) or not all(math.isfinite(v) for v in out):
        raise ConfigError(at, f"expected {n} finite numbers ({what}), got {value!r}")
    return out


def named_entry(raw: Any, at: str, keys: set[str]) -> str:
    """The name of a scene-file entry (a goal, a body) after checking it is a mapping of known keys with a
    non-empty `name`; ConfigError naming the entry's field otherwise."""
    if not isinstance(raw, dict):
        raise ConfigError(at, f"expected a mapping with keys {sorted(keys)}")
    extra = sorted(set(raw) - keys)
    if extra:
        raise ConfigError(f"{at}.{extra[0]}", f"unknown option; expected one of {sorted(keys)}")
    name = raw.get("name")
    if not isinstance(name, str) or not name:
        raise ConfigError(f"{at}.name", f"expected a non-empty string, got {name!r}")
    return name


def _body(raw: Any, at: str, shapes: tuple[str, ...]) -> Primitive:
    name = named_entry(raw, at, _BODY_KEYS)
    shape = raw.get("shape")
    if shape not in shapes:
        raise ConfigError(f"{at}.shape", f"unknown shape {shape!r}; expected one of {list(shapes)}")
    form = SIZE_FORMS[shape]
    size = finite_list(raw.get("size"), len(form), f"{at}.size", f"{shape} {', '.join(form)} in m")
    if not all(v > 0 for v in size):
        raise ConfigError(f"{at}.size", f"expected positive sizes ({shape} {', '.join(form)} in m), got {list(size)}")
    if "xyz" not in raw:
        raise ConfigError(f"{at}.xyz", "missing; expected the body's centre [x, y, z] in m")
    xyz = finite_list(raw["xyz"], 3, f"{at}.xyz", "centre, m")
    rpy = finite_list(raw.get("rpy_deg", [0.0, 0.0, 0.0]), 3, f"{at}.rpy_deg", "roll pitch yaw, deg")
    return Primitive(name, shape, size, xyz, tuple(math.radians(v) for v in rpy))


def _bodies(raw: Any, at: str, shapes: tuple[str, ...], taken: set[str]) -> list[Primitive]:
    if raw is None:
        return []
    if not isinstance(raw, list):
        raise ConfigError(at, "expected a list of bodies")
    out = []
    for i, item in enumerate(raw):
        body = _body(item, f"{at}[{i}]", shapes)
        if body.name in taken:
            raise ConfigError(f"{at}[{i}].name", f"duplicate body name {body.name!r}; body names must be unique")
        taken.add(body.name)
        out.append(body)
    return out


def parse_obstacles(raw: Any, where: str, taken: set[str]) -> list[Primitive]:
    """The scene's furniture (`obstacles:`): boxes, cylinders, spheres and capsules."""
    return _bodies(raw, f"{where}, option obstacles", SHAPES, taken)


def parse_person(raw: Any, where: str, taken: set[str]) -> tuple[list[Primitive], SeparationSettings]:
    """The person (`person:`): capsules and spheres, and the speed and separation monitoring terms."""
    at = f"{where}, option person"
    if raw is None:
        return [], SeparationSettings()
    if not isinstance(raw, dict):
        raise ConfigError(at, f"expected a mapping with keys {sorted(_PERSON_KEYS)}")
    extra = sorted(set(raw) - _PERSON_KEYS)
    if extra:
        raise ConfigError(f"{at}.{extra[0]}", f"unknown option; expected one of {sorted(_PERSON_KEYS)}")
    bodies = _bodies(raw.get("bodies"), f"{at}.bodies", ("capsule", "sphere"), taken)
    defaults = SeparationSettings()
    values = {}
    for key, field in (("speed", "person_speed"), ("reaction_time", "reaction_time"),
                       ("stopping_time", "stopping_time"), ("intrusion", "intrusion"),
                       ("person_uncertainty", "person_uncertainty"), ("robot_uncertainty", "robot_uncertainty")):
        v = raw.get(key, getattr(defaults, field))
        try:
            f = float(v)
        except (TypeError, ValueError):
            f = math.nan
        if isinstance(v, bool) or not math.isfinite(f) or f < 0 or f > 10:
            raise ConfigError(f"{at}.{key}", f"expected a finite number in [0, 10], got {v!r}")
        values[field] = f
    return bodies, SeparationSettings(**values)


def check_goals_clear(points: np.ndarray, labels: list[str], obstacles: list[Primitive], person: list[Primitive],
                      keep_out: float, where: str) -> None:  # fmt: skip
    """ConfigError naming the first goal point [k, 3] (labels [k]) inside an obstacle or the person's keep-out."""
    for bodies, limit, what in ((obstacles, 0.0, "inside obstacle"), (person, keep_out, "inside the person's "
                                f"keep-out zone ({keep_out:.3f} m) around")):  # fmt: skip
        if not bodies:
            continue
        d, _ = point_distances(np.asarray(points, dtype=np.float64), pack(bodies))  # [k, O]
        bad = np.argwhere(d < limit)
        if len(bad):
            k, o = bad[0]
            raise ConfigError(f"{where}, goal {labels[k]}",
                              f"lies {what} {bodies[o].name} (distance {d[k, o]:.3f} m); move the goal or the body")


def _body_json(b: Primitive) -> dict:
    return {"name": b.name, "shape": b.shape, "size": list(b.size), "xyz": list(b.xyz),
            "rpy_deg": [math.degrees(v) for v in b.rpy]}


def world_json(obstacles: list[Primitive], person: list[Primitive], settings: SeparationSettings,
               links: dict | None) -> dict:  # fmt: skip
    """The release manifest's `world` section: the scene's bodies, the separation settings and the arm's
    sphere model (links, centres, radii, self_pairs); {} for a scene without bodies."""
    if not (obstacles or person):
        return {}
    return {
        "clearance": settings.clearance,
        "obstacles": [_body_json(b) for b in obstacles],
        "person": {"bodies": [_body_json(b) for b in person], "speed": settings.person_speed,
                   "reaction_time": settings.reaction_time, "stopping_time": settings.stopping_time,
                   "intrusion": settings.intrusion, "person_uncertainty": settings.person_uncertainty,
                   "robot_uncertainty": settings.robot_uncertainty},
        "links": links,
    }


def world_from_json(section: dict, where: str) -> tuple[list[Primitive], list[Primitive], SeparationSettings, dict]:
    """(obstacles, person, settings, link model dict) of a manifest's `world` section; ConfigError naming the
    field for anything malformed (the same checks as a scene file)."""
    extra = sorted(set(section) - {"clearance", "obstacles", "person", "links"})
    if extra:
        raise ConfigError(f"{where}.{extra[0]}", "unknown field; expected clearance, obstacles, person, links")
    taken: set[str] = set()
    obstacles = parse_obstacles(section.get("obstacles"), where, taken)
    person, settings = parse_person(section.get("person"), where, taken)
    clearance = section.get("clearance")
    if not isinstance(clearance, (int, float)) or isinstance(clearance, bool) or not 0 <= clearance <= 1:
        raise ConfigError(f"{where}.clearance", f"expected a number in [0, 1] (m), got {clearance!r}")
    links = section.get("links")
    if not isinstance(links, dict) or set(links) != {"links", "centres", "radii", "self_pairs"}:
        raise ConfigError(f"{where}.links", "expected a mapping with links, centres, radii, self_pairs")
    names = links["links"]
    try:
        centres = np.asarray(links["centres"], dtype=np.float64).reshape(len(names), 3)
        radii = np.asarray(links["radii"], dtype=np.float64).reshape(len(names))
        pairs = np.asarray(links["self_pairs"], dtype=np.int64).reshape(-1, 2)
    except (TypeError, ValueError):
        raise ConfigError(f"{where}.links", "expected centres [S, 3], radii [S] and self_pairs [P, 2] for the S "
                                            "links listed") from None  # fmt: skip
    if (not all(isinstance(n, str) for n in names) or not np.isfinite(centres).all() or not (radii > 0).all()
            or (pairs < 0).any() or (pairs >= len(names)).any()):  # fmt: skip
        raise ConfigError(f"{where}.links", "expected link names, finite centres, positive radii and pairs of "
                                            "sphere indices")  # fmt: skip
    return obstacles, person, replace(settings, clearance=float(clearance)), links
