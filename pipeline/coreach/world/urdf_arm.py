"""Robot plugin for any serial arm described by a URDF file (the shipped seven_joint_arm by default)."""

from __future__ import annotations

import copy
import math
import xml.etree.ElementTree as ET
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Sequence

import pytorch_kinematics as pk
import torch
from torch import Tensor

from coreach.errors import ConfigError
from coreach.world.geometry import rpy_to_matrix
from coreach.world.urdf import MOVABLE, JointSpec, parse_path, read_path
from coreach.world.link_model import LinkModel, link_model
from coreach.world.urdf_placement import place_arm

SHIPPED_URDF = "seven_joint_arm.urdf"
# Elbow bent 129 deg, tool 0.35 m in front of the base at z = 0.27 m, approach axis tilted 56 deg below
# horizontal. Smallest singular value of the 6x7 Jacobian there is 0.12 (about the median over
# random configurations), so the pose is well clear of a singularity.
SEVEN_JOINT_ARM_HOME = (0.0, -0.15, 0.0, 2.25, 0.0, 0.45, 0.0)

def shipped_urdf() -> str:
    """Path of the seven_joint_arm URDF shipped inside coreach_plugins."""
    return str(resources.files(__package__).joinpath("assets", SHIPPED_URDF))


@dataclass
class UrdfArmConfig:
    """Options of the `urdf_arm` robot (conf/robot/seven_joint_arm.yaml)."""

    urdf: str = ""
    tool_link: str = "tool"
    home: list[float] | None = None
    name: str = "seven_joint_arm"
    base_xyz: list[float] | None = None
    base_rpy_deg: list[float] | None = None
    tool_xyz: list[float] | None = None
    tool_rpy_deg: list[float] | None = None
    collision_override: str = ""
    _target_: str = "coreach.world.urdf_arm.UrdfArm"


def _origin_matrix(spec: JointSpec) -> Tensor:
    """4x4 float64 transform of a URDF <origin> (rotation from coreach.world.geometry, the shared convention)."""
    m = torch.eye(4, dtype=torch.float64)
    m[:3, :3] = rpy_to_matrix(torch.tensor(spec.rpy, dtype=torch.float64))
    m[:3, 3] = torch.tensor(spec.xyz, dtype=torch.float64)
    return m


def _path_urdf(specs: list[JointSpec]) -> str:
    """A URDF holding only the base-to-tool path, so pytorch_kinematics never trips over unrelated
    elements (transmissions, simulator tags, gripper branches) of the user's file."""
    robot = ET.Element("robot", name="coreach_path")
    ET.SubElement(robot, "link", name=specs[0].parent)
    for s in specs:
        ET.SubElement(robot, "link", name=s.child)
        joint = ET.SubElement(robot, "joint", name=s.name, type=s.kind)
        ET.SubElement(joint, "parent", link=s.parent)
        ET.SubElement(joint, "child", link=s.child)
        ET.SubElement(joint, "origin", xyz=" ".join(map(repr, s.xyz)), rpy=" ".join(map(repr, s.rpy)))
        if s.kind != "fixed":
            ET.SubElement(joint, "axis", xyz=" ".join(map(repr, s.axis)))
            limit = {"velocity": repr(s.velocity), "effort": "0"}
            if s.kind != "continuous":
                limit.update(lower=repr(s.lower), upper=repr(s.upper))
            ET.SubElement(joint, "limit", limit)
    return ET.tostring(robot, encoding="unicode")


def _build_chain(where: str, tool_link: str, specs: list[JointSpec]) -> pk.SerialChain:
    """A float64 serial chain from `pytorch_kinematics`, with origins and axes taken from our parse.

    pytorch_kinematics reads URDF origins through float32 (errors ~1e-8 m per joint); re-setting them
    from the float64 parse keeps float64 kinematics exact to round-off.
    """
    try:
        tree = pk.build_chain_from_urdf(_path_urdf(specs)).to(dtype=torch.float64)
        for spec in specs:
            frame = tree.find_frame(spec.child)
            frame.joint.offset = pk.Transform3d(matrix=_origin_matrix(spec))
            frame.joint.axis = torch.tensor(spec.axis, dtype=torch.float64)  # unit length from the parser
        chain = pk.SerialChain(tree, tool_link, dtype=torch.float64)
    except Exception as exc:  # the URDF reader raises many kinds; the user needs one line
        problem = " ".join(f"{type(exc).__name__}: {exc}".split())
        raise ConfigError(where, f"pytorch_kinematics could not build the chain to {tool_link!r}: {problem}") from exc
    movable = [s.name for s in specs if s.kind in MOVABLE]
    if chain.get_joint_parameter_names() != movable:
        raise ConfigError(where, f"joint order read by pytorch_kinematics {chain.get_joint_parameter_names()} "
                                 f"differs from the URDF path {movable}")
    return chain


def _triple(value, option: str) -> list[float]:
    """Three finite numbers (zeros when unset); ConfigError naming the option otherwise."""
    if value is None:
        return [0.0, 0.0, 0.0]
    try:
        out = [float(v) for v in value]
    except (TypeError, ValueError):
        out = []
    if len(out) != 3 or not all(map(math.isfinite, out)):
        raise ConfigError(f"option {option}", f"expected three finite numbers [x, y, z], got {value!r}")
    return out


class UrdfArm:
    """A serial arm from a URDF: limits from the file, batched FK and Jacobian of the tool link."""

    def __init__(self, urdf: str = "", tool_link: str = "tool", home: list[float] | None = None,
                 name: str = "seven_joint_arm", base_xyz: Sequence[float] | None = None,
                 base_rpy_deg: Sequence[float] | None = None, tool_xyz: Sequence[float] | None = None,
                 tool_rpy_deg: Sequence[float] | None = None, collision_override: str = ""):  # fmt: skip
        if not isinstance(name, str) or not name:
            raise ConfigError("robot.name", f"expected a non-empty string, got {name!r}")
        if not isinstance(tool_link, str) or not tool_link:
            raise ConfigError("robot.tool_link", f"expected a non-empty link name, got {tool_link!r}")
        if not isinstance(urdf, str):
            raise ConfigError("robot.urdf", f"expected a file path string, got {type(urdf).__name__}")
        if not isinstance(collision_override, str):
            raise ConfigError("robot.collision_override", f"expected a file path string, got {collision_override!r}")
        self.urdf = urdf
        self.name = name
        self.collision_override = collision_override

        shipped = shipped_urdf()
        path = Path(urdf).expanduser() if urdf else Path(shipped)
        where = str(path)
        text, specs = read_path(path, tool_link)
        # The base pose in the scene's world frame and the tool-centre point become fixed joints of the URDF,
        # so every kinematics reader (this chain, the runtime's, pinocchio) and the bundle's robot.urdf agree.
        placement = {key: _triple(value, f"robot.{key}") for key, value in
                     (("base_xyz", base_xyz), ("base_rpy_deg", base_rpy_deg), ("tool_xyz", tool_xyz),
                      ("tool_rpy_deg", tool_rpy_deg))}  # fmt: skip
        placed, tool_link = place_arm(text, tool_link, placement["base_xyz"],
                                      [math.radians(v) for v in placement["base_rpy_deg"]], placement["tool_xyz"],
                                      [math.radians(v) for v in placement["tool_rpy_deg"]], where)  # fmt: skip
        if placed is not text:
            specs = parse_path(placed, tool_link, where)
        self._urdf_text = placed
        self._urdf_dir = path.parent
        self._link_models: dict[float, LinkModel] = {}
        self.tool_link = tool_link
        self._chains: dict[tuple[torch.dtype, torch.device], pk.SerialChain] = {}
        master = _build_chain(where, tool_link, specs)
        self._chains[(torch.float64, torch.device("cpu"))] = master

        movable = [s for s in specs if s.kind in MOVABLE]
        self.joint_names: list[str] = [s.name for s in movable]
        self._lower = torch.tensor([s.lower for s in movable], dtype=torch.float64)
        self._upper = torch.tensor([s.upper for s in movable], dtype=torch.float64)
        self._qd_max = torch.tensor([s.velocity for s in movable], dtype=torch.float64)

        if home is None:
            is_shipped = path.resolve() == Path(shipped).resolve()
            if is_shipped and len(movable) == len(SEVEN_JOINT_ARM_HOME):
                home = list(SEVEN_JOINT_ARM_HOME)
            else:
                # infinite (continuous-joint) bounds give nan midpoints; start those at 0
                home = torch.nan_to_num((self._lower + self._upper) / 2, nan=0.0).tolist()
        self._home = self._check_home(home)

    def _check_home(self, home: Sequence[float]) -> Tensor:
        try:
            values = [float(v) for v in home]
        except (TypeError, ValueError) as exc:
            raise ConfigError("robot.home", f"expected a list of {self.dof} numbers (rad), got {home!r}") from exc
        if len(values) != self.dof:
            raise ConfigError("robot.home", f"expected {self.dof} values for joints {self.joint_names}, "
                                            f"got {len(values)}")
        q = torch.tensor(values, dtype=torch.float64)
        outside = [n for n, v, lo, hi in zip(self.joint_names, q, self._lower, self._upper) if not lo <= v <= hi]
        if outside:
            raise ConfigError("robot.home", f"values outside the URDF joint limits for {outside}")
        return q

    @property
    def dof(self) -> int:
        return len(self.joint_names)

    # Limits have no q to follow, so they come in torch's default dtype (float32 unless changed).
    @property
    def q_lower(self) -> Tensor:
        return self._lower.to(torch.get_default_dtype())

    @property
    def q_upper(self) -> Tensor:
        return self._upper.to(torch.get_default_dtype())

    @property
    def qd_max(self) -> Tensor:
        return self._qd_max.to(torch.get_default_dtype())

    @property
    def q_home(self) -> Tensor:
        return self._home.to(torch.get_default_dtype())

    def _chain_for(self, q: Tensor) -> pk.SerialChain:
        if not torch.is_tensor(q) or q.dtype not in (torch.float32, torch.float64):
            raise TypeError(f"{self.name}: q must be a float32 or float64 tensor, got {type(q).__name__} "
                            f"{getattr(q, 'dtype', '')}")
        if q.ndim != 2 or q.shape[1] != self.dof:
            raise ValueError(f"{self.name}: q must have shape [B, {self.dof}], got {list(q.shape)}")
        key = (q.dtype, q.device)
        if key not in self._chains:
            master = self._chains[(torch.float64, torch.device("cpu"))]
            self._chains[key] = copy.deepcopy(master).to(dtype=q.dtype, device=q.device)
        return self._chains[key]

    def fk(self, q: Tensor) -> tuple[Tensor, Tensor]:
        m = self._chain_for(q).forward_kinematics(q).get_matrix()  # [B, 4, 4]
        return m[:, :3, 3], m[:, :3, :3]

    def jacobian(self, q: Tensor) -> Tensor:
        return self._chain_for(q).jacobian(q)

    def fk_and_jacobian(self, q: Tensor) -> tuple[Tensor, Tensor, Tensor]:
        """Pose and Jacobian from one kinematics pass (closed loops need both every step)."""
        jac, m = self._chain_for(q).jacobian(q, ret_eef_pose=True)
        return m[:, :3, 3], m[:, :3, :3], jac

    def __repr__(self) -> str:
        return f"UrdfArm(name={self.name!r}, dof={self.dof}, urdf={self.urdf or SHIPPED_URDF!r})"

    def link_model(self, clearance: float) -> LinkModel:
        """The links as spheres (coreach.world.link_model): the URDF's collision geometry, meshes resolved beside the
        URDF, then `collision_override`; self-collision pairs at least `clearance` apart at home."""
        if clearance not in self._link_models:
            self._link_models[clearance] = link_model(
                self._urdf_text, self.tool_link, urdf_dir=self._urdf_dir, override=self.collision_override or None,
                home=self._home.numpy(), clearance=clearance, where=str(self._urdf_dir / Path(self.urdf or SHIPPED_URDF).name))
        return self._link_models[clearance]

    def urdf_text(self) -> str:
        """The URDF this arm was built from, with its placement, as text (what a release bundle ships as
        robot.urdf)."""
        return self._urdf_text
