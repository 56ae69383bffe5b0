"""Placing an arm in a scene: its base pose in the world frame and a tool-centre-point offset, written into the URDF.

Scenes are written in a world frame. Rather than teaching every stage (demonstrator, context, vetting, bundle,
runtime) a base transform and a tool offset, both become fixed joints of the URDF itself: a world link at the
root, with a fixed joint to the arm's root link at the base pose, and a tool-centre-point link under the
tool link. Every kinematics reader (the torch chain in training and vetting, the numpy chain on the robot
computer, pinocchio in the tests) then reports the tool-centre point in the world frame, and the bundle's
robot.urdf carries the placement with it.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from collections.abc import Sequence

from coreach.errors import ConfigError
from coreach.world.urdf import document

WORLD_LINK = "coreach_world"
TCP_LINK = "coreach_tcp"
_ZERO = (0.0, 0.0, 0.0)


def _fmt(values: Sequence[float]) -> str:
    return " ".join(repr(float(v)) for v in values)


def _root_link(robot: ET.Element, where: str) -> str:
    links = [link.get("name") for link in robot.findall("link")]
    children = {j.find("child").get("link") for j in robot.findall("joint") if j.find("child") is not None}
    roots = [name for name in links if name not in children]
    if len(roots) != 1:
        raise ConfigError(where, f"expected exactly one root link (a link that is no joint's child), found {roots}")
    return roots[0]


def _fixed_joint(name: str, parent: str, child: str, xyz: Sequence[float], rpy: Sequence[float]) -> ET.Element:
    joint = ET.Element("joint", name=name, type="fixed")
    ET.SubElement(joint, "parent", link=parent)
    ET.SubElement(joint, "child", link=child)
    ET.SubElement(joint, "origin", xyz=_fmt(xyz), rpy=_fmt(rpy))
    return joint


def place_arm(urdf_text: str, tool_link: str, base_xyz: Sequence[float] = _ZERO, base_rpy: Sequence[float] = _ZERO,
              tool_xyz: Sequence[float] = _ZERO, tool_rpy: Sequence[float] = _ZERO,
              where: str = "robot.urdf") -> tuple[str, str]:  # fmt: skip
    """(URDF text, tool link) of the arm placed at base_xyz (m) / base_rpy (rad, URDF convention) in the world
    frame, with the tool-centre point at tool_xyz / tool_rpy from `tool_link`. An identity placement returns
    the text and tool link unchanged, so an arm that needs none keeps its URDF byte for byte."""
    for name, v in (("base_xyz", base_xyz), ("base_rpy", base_rpy), ("tool_xyz", tool_xyz), ("tool_rpy", tool_rpy)):
        if len(v) != 3:
            raise ConfigError(f"{where}: placement {name}", f"expected 3 numbers, got {list(v)}")
    moved_base = any(float(v) != 0.0 for v in (*base_xyz, *base_rpy))
    moved_tool = any(float(v) != 0.0 for v in (*tool_xyz, *tool_rpy))
    if not (moved_base or moved_tool):
        return urdf_text, tool_link
    robot = document(urdf_text, where)  # the one URDF reader's parse and its refusals
    names = {link.get("name") for link in robot.findall("link")}
    if tool_link not in names:
        raise ConfigError(where, f"tool link {tool_link!r} is not a link of the URDF")
    taken = names | {j.get("name") for j in robot.findall("joint")}
    for name in (WORLD_LINK, TCP_LINK, f"{WORLD_LINK}_joint", f"{TCP_LINK}_joint"):
        if name in taken:
            raise ConfigError(where, f"the name {name!r} is reserved for coreach's placement frames")
    if moved_base:
        root = _root_link(robot, where)
        robot.insert(0, ET.Element("link", name=WORLD_LINK))
        robot.append(_fixed_joint(f"{WORLD_LINK}_joint", WORLD_LINK, root, base_xyz, base_rpy))
    if moved_tool:
        robot.append(ET.Element("link", name=TCP_LINK))
        robot.append(_fixed_joint(f"{TCP_LINK}_joint", tool_link, TCP_LINK, tool_xyz, tool_rpy))
        tool_link = TCP_LINK
    return ET.tostring(robot, encoding="unicode"), tool_link
