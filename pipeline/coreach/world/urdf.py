"""The one URDF reader: the joints on the root-to-tool path as typed specs (pure Python xml, no numpy/torch)."""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from dataclasses import dataclass
from pathlib import Path

from coreach.errors import ConfigError

__all__ = ["MOVABLE", "SUPPORTED", "JointSpec", "document", "parse_path", "read_path", "robot_name", "urdf_floats"]

MOVABLE = ("revolute", "continuous", "prismatic")
SUPPORTED = MOVABLE + ("fixed",)


@dataclass(frozen=True)
class JointSpec:
    """One joint on the root-to-tool path, in float64 as written in the URDF."""

    name: str
    kind: str  # one of SUPPORTED
    parent: str
    child: str
    xyz: tuple[float, float, float]  # origin translation (m), parent link -> joint frame
    rpy: tuple[float, float, float]  # origin roll, pitch, yaw (rad), fixed axes
    axis: tuple[float, float, float]  # unit vector in the joint frame; zeros for fixed joints
    lower: float  # -inf for continuous and fixed joints
    upper: float  # +inf for continuous and fixed joints
    velocity: float  # rad/s or m/s; +inf for fixed joints

    @property
    def movable(self) -> bool:
        return self.kind in MOVABLE


def urdf_floats(text, default: tuple[float, ...], where: str, what: str) -> tuple[float, ...]:
    """A URDF attribute such as xyz="0 0 0.1" as floats (`default` when absent); ConfigError if malformed."""
    if text is None:
        return default
    try:
        values = tuple(float(v) for v in text.split())
    except ValueError:
        values = ()
    if len(values) != len(default) or not all(math.isfinite(v) for v in values):
        raise ConfigError(where, f"{what} must be {len(default)} finite numbers, got {text!r}")
    return values


def document(text: str, where: str = "robot.urdf") -> ET.Element:
    """The <robot> element of a URDF text; ConfigError (one line) if it is not one."""
    try:
        robot = ET.fromstring(text)
    except ET.ParseError as exc:
        raise ConfigError(where, f"not a readable URDF: XML error {exc}") from exc
    if robot.tag != "robot":
        raise ConfigError(where, f"not a URDF: root element is <{robot.tag}>, expected <robot>")
    return robot


def robot_name(text: str, where: str = "robot.urdf") -> str | None:
    """The <robot name=...> attribute (None when absent); ConfigError if the text is not a URDF."""
    return document(text, where).get("name")


def _joint_spec(el: ET.Element, where: str) -> JointSpec:
    name = str(el.get("name"))
    jwhere = f"{where} (joint {name!r})"
    kind = el.get("type", "")
    if kind not in SUPPORTED:
        raise ConfigError(jwhere, f"joint type {kind!r} unsupported; expected one of {', '.join(SUPPORTED)}")
    if el.find("mimic") is not None:
        raise ConfigError(jwhere, "mimic joints between the root and the tool link are unsupported")
    origin = el.find("origin")
    xyz = urdf_floats(None if origin is None else origin.get("xyz"), (0.0, 0.0, 0.0), jwhere, "origin xyz")
    rpy = urdf_floats(None if origin is None else origin.get("rpy"), (0.0, 0.0, 0.0), jwhere, "origin rpy")
    axis_el = el.find("axis")
    # The URDF specification's default axis is x (some readers assume z).
    axis = urdf_floats(None if axis_el is None else axis_el.get("xyz"), (1.0, 0.0, 0.0), jwhere, "axis xyz")
    lower, upper, velocity = -math.inf, math.inf, math.inf
    if kind in MOVABLE:
        norm = math.hypot(*axis)
        if norm < 1e-9:
            raise ConfigError(jwhere, "axis xyz must be a non-zero vector")
        axis = tuple(a / norm for a in axis)
        limit = el.find("limit")
        if limit is None or limit.get("velocity") is None:
            raise ConfigError(jwhere, "no velocity limit; expected <limit velocity=...> (rad/s or m/s)")
        (velocity,) = urdf_floats(limit.get("velocity"), (0.0,), jwhere, "limit velocity")
        if velocity <= 0:
            raise ConfigError(jwhere, f"limit velocity must be > 0, got {velocity}")
        if kind != "continuous":
            (lower,) = urdf_floats(limit.get("lower"), (math.nan,), jwhere, "limit lower")
            (upper,) = urdf_floats(limit.get("upper"), (math.nan,), jwhere, "limit upper")
            if not lower < upper:  # also catches missing bounds (nan)
                raise ConfigError(jwhere, f"expected <limit lower=... upper=...> with lower < upper, got "
                                          f"lower={limit.get('lower')} upper={limit.get('upper')}")
    else:
        axis = (0.0, 0.0, 0.0)
    parent = str(el.find("parent").get("link"))  # type: ignore[union-attr]  # checked by parse_path
    child = str(el.find("child").get("link"))  # type: ignore[union-attr]
    return JointSpec(name, kind, parent, child, xyz, rpy, axis, lower, upper, velocity)  # type: ignore[arg-type]


def _tree(robot: ET.Element, links: list, where: str) -> dict[str, ET.Element]:
    """child link -> its joint, after checking that names are unique, joints name existing links, no link has
    two parents and there is one root."""
    for kind, names in (("link", links), ("joint", [j.get("name") for j in robot.findall("joint")])):
        seen: set = set()
        for n in names:
            if n is None or n in seen:
                raise ConfigError(where, f"{kind} name {n!r} " + ("missing" if n is None else "used twice") +
                                  f"; expected every {kind} to have a unique name")
            seen.add(n)
    known = set(links)
    parent_joint: dict[str, ET.Element] = {}
    for joint in robot.findall("joint"):
        child, parent = joint.find("child"), joint.find("parent")
        if child is None or parent is None or child.get("link") is None or parent.get("link") is None:
            raise ConfigError(where, f"joint {joint.get('name')!r} needs <parent link=...> and <child link=...>")
        for role, el in (("parent", parent), ("child", child)):
            if el.get("link") not in known:
                raise ConfigError(where, f"joint {joint.get('name')!r}: {role} link {el.get('link')!r} is not a "
                                         f"<link> of this URDF")
        if child.get("link") in parent_joint:
            raise ConfigError(where, f"link {child.get('link')!r} is the child of two joints; a URDF must be a tree")
        parent_joint[str(child.get("link"))] = joint

    roots = [n for n in links if n not in parent_joint]
    if len(roots) != 1:
        raise ConfigError(where, f"{len(roots)} root links ({', '.join(map(str, roots[:6]))}); expected one tree, "
                                 f"so that the tool link is reached from the one root")  # fmt: skip
    return parent_joint


def parse_path(text: str, tool_link: str, where: str = "robot.urdf") -> list[JointSpec]:
    """The joints from the root link to `tool_link`, root first; ConfigError (one line) naming what is wrong."""
    robot = document(text, where)
    links = [link.get("name") for link in robot.findall("link")]
    if tool_link not in links:
        shown = ", ".join(str(n) for n in links[:12]) + (", ..." if len(links) > 12 else "")
        raise ConfigError(where, f"tool link {tool_link!r} not found; links are: {shown or '(none)'}")
    parent_joint = _tree(robot, links, where)
    path: list[ET.Element] = []
    link = tool_link
    while link in parent_joint:
        path.append(parent_joint[link])
        link = str(parent_joint[link].find("parent").get("link"))  # type: ignore[union-attr]
        if len(path) > len(parent_joint):
            raise ConfigError(where, "joints form a loop; a URDF must be a tree")
    path.reverse()

    specs = [_joint_spec(el, where) for el in path]
    if not any(s.movable for s in specs):
        raise ConfigError(where, f"no movable joint between the root link and tool link {tool_link!r}")
    return specs


def read_path(path: str | Path, tool_link: str) -> tuple[str, list[JointSpec]]:
    """The file's text and its root-to-tool joints; ConfigError naming the file if it cannot be read."""
    path = Path(path).expanduser()
    where = str(path)
    if not path.is_file():
        raise ConfigError(where, "file not found; expected a URDF file (relative paths are from the working directory)")
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(where, f"cannot read the URDF file: {exc}") from exc
    return text, parse_path(text, tool_link, where)
