"""The arm as bodies: a conservative sphere model of every link, from the URDF's collision geometry.

Sources, in order of precedence:
1. an override file (YAML: `links: {link_name: [{sphere: [x, y, z], radius: r} |
   {capsule: [[x, y, z], [x, y, z]], radius: r}, ...]}`, link frames, m) replaces the named links' models;
2. the URDF's <collision> elements: sphere, cylinder, box and capsule are taken directly; meshes (STL, OBJ,
   DAE, ...) are read with trimesh and bounded.

Every element becomes a capsule that contains it, and every capsule a row of spheres that contains it:
- cylinder (radius R, length L): the capsule of radius R on its axis segment (the caps only add volume);
- box: a capsule along its longest axis, radius = the half-diagonal of the other two;
- mesh: its principal axis cut into pieces, a capsule per piece with the largest distance from the axis of any
  vertex of a face reaching into that piece (`_mesh_capsules` says why that holds every face);
- capsule (segment a-b, radius R) -> spheres at n + 1 evenly spaced points of the segment, spacing s <= R,
  radius sqrt(R^2 + (s/2)^2): a point of the capsule lies within R of some segment point, and that point
  within s/2 of a sphere centre along the segment, so within the enlarged radius of that centre.
A sphere model is what coreach.control.bodies measures exactly against every obstacle primitive; the price is
the enlargement (at most 12% of the radius with s <= R).

Links that never move (on the root side of the first movable joint) are left out: nothing can bring them
closer to anything. Self-collision pairs: spheres on two links with at least two links between them (links
joined by one or two joints, such as the two sides of an elbow or of a wrist, are left to the joint limits:
spheres that round a short joint housing would otherwise meet at every bend), and that are not already
within `clearance` of each other at the home configuration (common practice when listing allowed collision
pairs: a pair touching at rest is treated as adjacent).
"""

from __future__ import annotations

import logging
import math
import xml.etree.ElementTree as ET
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import yaml

from coreach.errors import ConfigError
from coreach.runtime.kinematics import Chain
from coreach.world.geometry import rpy_to_matrix
from coreach.world.urdf import document, parse_path, urdf_floats

__all__ = ["LinkModel", "link_model", "capsule_spheres"]

log = logging.getLogger("coreach.world.link_model")


@dataclass
class LinkModel:
    """Spheres of the arm: link name per sphere [S], centres in the link frame [S, 3] (m), radii [S] (m), and
    the self-collision pairs [P, 2] (sphere indices)."""

    links: list[str]
    centres: np.ndarray
    radii: np.ndarray
    self_pairs: np.ndarray

    def to_dict(self) -> dict:
        return {"links": list(self.links), "centres": self.centres.tolist(), "radii": self.radii.tolist(),
                "self_pairs": self.self_pairs.tolist()}  # fmt: skip

    @classmethod
    def from_dict(cls, d: dict) -> LinkModel:
        return cls(list(d["links"]), np.asarray(d["centres"], dtype=np.float64).reshape(-1, 3),
                   np.asarray(d["radii"], dtype=np.float64), np.asarray(d["self_pairs"], dtype=np.int64).reshape(-1, 2))


def capsule_spheres(a, b, radius: float) -> tuple[np.ndarray, np.ndarray]:
    """Spheres (centres [k, 3], radii [k]) whose union contains the capsule a-b of `radius` (module docstring)."""
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    length = float(np.linalg.norm(b - a))
    n = max(1, math.ceil(length / radius)) if length > 0 else 0
    if n == 0:
        return a[None], np.array([radius])
    spacing = length / n
    t = np.linspace(0.0, 1.0, n + 1)[:, None]
    return a + t * (b - a), np.full(n + 1, math.sqrt(radius**2 + (spacing / 2) ** 2))


def _pose(el: ET.Element | None, where: str) -> np.ndarray:
    t = np.eye(4)
    if el is not None:
        t[:3, :3] = rpy_to_matrix(np.array(urdf_floats(el.get("rpy"), (0.0, 0.0, 0.0), where, "origin rpy")))
        t[:3, 3] = urdf_floats(el.get("xyz"), (0.0, 0.0, 0.0), where, "origin xyz")
    return t


def _positive(el: ET.Element, attr: str, where: str) -> float:
    try:
        v = float(el.get(attr, "nan"))
    except ValueError:
        v = math.nan
    if not (math.isfinite(v) and v > 0):
        raise ConfigError(where, f"expected a positive {attr}, got {el.get(attr)!r}")
    return v


# capsules per collision mesh, along its principal axis: four did not tighten the third-party arm tested (its
# links are L-shaped, so each piece is as wide as the whole), and they multiply the spheres the filter checks
MESH_SEGMENTS = 1


def _mesh_capsules(path: Path, scale: np.ndarray, where: str) -> list[tuple[np.ndarray, np.ndarray, float]]:
    """Capsules (a, b, radius) whose union holds the mesh: its principal axis cut into MESH_SEGMENTS equal
    pieces; piece k's capsule spans the piece, with the largest distance from the axis of any vertex of a
    face whose projection meets the piece. Along a triangle the distance from a line is convex, so it peaks at
    a vertex: every point of every face lies in the capsule of the piece it projects into."""
    try:
        import trimesh  # late: trimesh (~0.8 s), only for mesh collision geometry

        mesh = trimesh.load(str(path), force="mesh")
        verts = np.asarray(mesh.vertices, dtype=np.float64) * scale
        faces = np.asarray(mesh.faces, dtype=np.int64).reshape(-1, 3)
    except Exception as exc:  # trimesh raises many kinds for unreadable files
        raise ConfigError(where, f"collision mesh {path} is unreadable ({type(exc).__name__}: {exc})") from None
    if verts.ndim != 2 or len(verts) < 1 or not np.isfinite(verts).all():
        raise ConfigError(where, f"collision mesh {path} has no usable vertices (unreadable or empty)")
    if len(faces) == 0:  # a point cloud: every vertex is its own face
        faces = np.arange(len(verts))[:, None].repeat(3, axis=1)
    centre = verts.mean(axis=0)
    _, _, vt = np.linalg.svd(verts - centre, full_matrices=False)
    axis = vt[0]
    proj = (verts - centre) @ axis
    radial = np.linalg.norm((verts - centre) - proj[:, None] * axis, axis=1)
    lo, hi = float(proj.min()), float(proj.max())
    edges = np.linspace(lo, hi, MESH_SEGMENTS + 1)
    f_lo, f_hi, f_r = proj[faces].min(axis=1), proj[faces].max(axis=1), radial[faces].max(axis=1)
    out = []
    for k in range(MESH_SEGMENTS):
        meets = (f_hi >= edges[k]) & (f_lo <= edges[k + 1])
        if not meets.any():
            continue
        radius = max(float(f_r[meets].max()), 1e-3)
        out.append((centre + edges[k] * axis, centre + edges[k + 1] * axis, radius))
    return out


def _resolve_mesh(filename: str, urdf_dir: Path | None, where: str) -> Path:
    name = filename
    if name.startswith("file://"):
        name = name[len("file://"):]
    elif name.startswith("package://"):
        rest = name[len("package://"):]
        package, _, rel = rest.partition("/")
        candidates = [] if urdf_dir is None else [p / package / rel for p in (urdf_dir, *urdf_dir.parents)]
        candidates += [] if urdf_dir is None else [p / rel for p in (urdf_dir, *urdf_dir.parents)]
        for c in candidates:
            if c.is_file():
                return c
        raise ConfigError(where, f"collision mesh {filename} is missing (looked beside the URDF and in its parents)")
    path = Path(name)
    if not path.is_absolute() and urdf_dir is not None:
        path = urdf_dir / path
    if not path.is_file():
        raise ConfigError(where, f"collision mesh {filename} is missing ({path} does not exist)")
    return path


def _collision_capsules(link: ET.Element, urdf_dir: Path | None, where: str) -> list[tuple]:
    """(a, b, radius) capsules, link frame, containing each <collision> element of `link`."""
    out = []
    for i, col in enumerate(link.findall("collision")):
        at = f"{where}: link {link.get('name')} collision[{i}]"
        pose = _pose(col.find("origin"), at)
        geom = col.find("geometry")
        shape = None if geom is None or len(geom) == 0 else geom[0]
        if shape is None:
            raise ConfigError(at, "expected a <geometry> with a box, cylinder, sphere, capsule or mesh")
        kind = shape.tag
        if kind == "sphere":
            r = _positive(shape, "radius", at)
            a = b = np.zeros(3)
        elif kind in ("cylinder", "capsule"):
            r, length = _positive(shape, "radius", at), _positive(shape, "length", at)
            a, b = np.array([0, 0, -length / 2]), np.array([0, 0, length / 2])
        elif kind == "box":
            size = np.array(urdf_floats(shape.get("size"), (math.nan,) * 3, at, "box size"))
            if not (size > 0).all():
                raise ConfigError(at, f"expected a positive box size, got {shape.get('size')!r}")
            axis = int(np.argmax(size))
            others = [s for i2, s in enumerate(size) if i2 != axis]
            r = float(math.hypot(others[0] / 2, others[1] / 2))
            a, b = np.zeros(3), np.zeros(3)
            a[axis], b[axis] = -size[axis] / 2, size[axis] / 2
        elif kind == "mesh":
            filename = shape.get("filename")
            if not filename:
                raise ConfigError(at, "mesh without a filename")
            scale = np.array(urdf_floats(shape.get("scale"), (1.0, 1.0, 1.0), at, "mesh scale"))
            for a, b, r in _mesh_capsules(_resolve_mesh(filename, urdf_dir, at), scale, at):
                out.append((pose[:3, :3] @ a + pose[:3, 3], pose[:3, :3] @ b + pose[:3, 3], float(r)))
            continue
        else:
            raise ConfigError(at, f"unknown geometry <{kind}>; expected box, cylinder, sphere, capsule or mesh")
        out.append((pose[:3, :3] @ a + pose[:3, 3], pose[:3, :3] @ b + pose[:3, 3], float(r)))
    return out


def _override(path: str | Path, known: list[str], moving: list[str]) -> dict[str, list[tuple]]:
    where = str(path)
    p = Path(path)
    if not p.is_file():
        raise ConfigError(where, "collision override file not found")
    try:
        data = yaml.safe_load(p.read_text(encoding="utf-8"))
    except yaml.YAMLError as exc:
        raise ConfigError(where, f"not valid YAML ({str(exc).splitlines()[0]})") from None
    if not isinstance(data, dict) or not isinstance(data.get("links"), dict) or set(data) - {"links"}:
        raise ConfigError(where, "expected a mapping with one key, links: {link_name: [bodies]}")
    out = {}
    for name, bodies in data["links"].items():
        if name not in known:
            raise ConfigError(f"{where}: links.{name}", f"unknown link; expected one of {moving}")
        if name not in moving:
            raise ConfigError(f"{where}: links.{name}", f"this link never moves, so it is not modelled; expected one "
                                                        f"of {moving}")  # fmt: skip
        if not isinstance(bodies, list) or not bodies:
            raise ConfigError(f"{where}: links.{name}", "expected a non-empty list of spheres and capsules")
        caps = []
        for i, body in enumerate(bodies):
            at = f"{where}: links.{name}[{i}]"
            try:
                r = float(body["radius"])
                if "sphere" in body:
                    a = b = np.asarray(body["sphere"], dtype=np.float64).reshape(3)
                else:
                    a, b = (np.asarray(v, dtype=np.float64).reshape(3) for v in body["capsule"])
            except (KeyError, TypeError, ValueError):
                raise ConfigError(at, "expected {sphere: [x, y, z], radius: r} or "
                                      "{capsule: [[x, y, z], [x, y, z]], radius: r}") from None
            if not (math.isfinite(r) and r > 0 and np.isfinite(a).all() and np.isfinite(b).all()):
                raise ConfigError(at, f"expected finite numbers and a positive radius, got radius {r}")
            caps.append((a, b, r))
        out[name] = caps
    return out


def link_model(urdf_text: str, tool_link: str, *, urdf_dir: str | Path | None = None,
               override: str | Path | None = None, home=None, clearance: float = 0.02,
               where: str = "robot.urdf") -> LinkModel:  # fmt: skip
    """The sphere model of the links on the root-to-tool path that move (module docstring)."""
    robot = document(urdf_text, where)
    joints = parse_path(urdf_text, tool_link, where)
    chain = Chain(joints, tool_link)
    path_links = [n for n, (k, _) in chain.link_frames.items()]
    moving = [n for n in path_links if chain.link_frames[n][0] >= 0]
    elements = {link.get("name"): link for link in robot.findall("link")}
    base = None if urdf_dir is None else Path(urdf_dir)
    caps = {name: _collision_capsules(elements[name], base, where) for name in moving}
    if override is not None and str(override):
        caps.update(_override(override, path_links, moving))
    side = sorted(n for n, el in elements.items() if n not in path_links and el.findall("collision"))
    if side:  # off the path the chain has no frame for them: said once, not dropped silently
        log.warning("%s: links %s have collision geometry but are not on the root-to-tool path, so the separation "
                    "step does not model them; add them to their parent link in robot.collision_override", where,
                    side)  # fmt: skip
    links, centres, radii = [], [], []
    for name in moving:
        for a, b, r in caps.get(name, []):
            c, rr = capsule_spheres(a, b, r)
            links += [name] * len(c)
            centres.append(c)
            radii.append(rr)
    if not links:
        return LinkModel([], np.zeros((0, 3)), np.zeros(0), np.zeros((0, 2), dtype=np.int64))
    centres_a, radii_a = np.concatenate(centres), np.concatenate(radii)
    pairs = _self_pairs(chain, links, centres_a, radii_a, home, clearance)
    return LinkModel(links, centres_a, radii_a, pairs)


def _self_pairs(chain, links: list[str], centres: np.ndarray, radii: np.ndarray, home, clearance: float) -> np.ndarray:
    frame = np.array([chain.link_frames[n][0] for n in links])
    # same moving frame = one rigid body; frames k and k + 1 are joined by joint k + 1 (module docstring)
    apart = np.abs(frame[:, None] - frame[None, :]) >= 3
    i, j = np.nonzero(np.triu(apart, k=1))
    if home is not None and len(i):
        attached = chain.attach(links, centres)
        pos, _ = chain.points(np.asarray(home, dtype=np.float64), attached)
        gap = np.linalg.norm(pos[i] - pos[j], axis=-1) - radii[i] - radii[j]
        keep = gap > clearance
        i, j = i[keep], j[keep]
    return np.stack([i, j], axis=1).astype(np.int64)
