"""Vetting paths over the scene's bodies: tool and elbow paths of a sample of episodes, top view (x-y) and side
view (x-z), with every furniture and person body drawn and the person's keep-out and reduced-speed zones.

A body is drawn as the convex hull of its projection. Every body of the scene is convex (coreach.control.bodies:
a box of half extents h rounded by a radius r, or a cylinder), and the projection of a convex body is the
convex hull of the projections of its points; the rounding is a sphere, whose projection is a disc, so the
outline is the hull of the projected core points (a box's 8 corners, the segment of a capsule, a cylinder's
two end circles) each widened by a disc of radius r (sampled on DISC points). The person's zones are the same
bodies widened by the zone's distance, drawn as the outline of their union.

The "elbow" is the origin of the middle joint's frame of the chain (joint index dof // 2, the 4th of a
7-joint arm); the caption names the joint, since a chain has no link that is an elbow by name.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import torch
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch, Polygon
from matplotlib.path import Path as MplPath

from coreach.control.bodies import Primitive, pack
from coreach.control.safety_filter import SEPARATION
from coreach.runtime.kinematics import SpherePoints
from coreach.vetting.report import PLANES, _save

__all__ = ["convex_hull", "body_outline", "elbow_joint", "elbow_path", "sample_episodes", "scene_figure",
           "plot_scene_paths", "scene_plots", "KINDS"]

DISC = 72  # points on a widening disc: the outline departs from the circle by r (1 - cos(pi / 72)) < 0.1% r
GRID = 300  # cells per axis of the raster the zones' union outline is traced on (a few mm for a person)
# episode kind -> (legend label, colour); the sample takes them in this order
KINDS = {
    "contact": ("contact or keep-out entry", "tab:red"),
    "held": ("held by the separation filter", "tab:orange"),
    "other": ("other episodes", "tab:blue"),
}
_FURNITURE = {"facecolor": "0.82", "edgecolor": "0.45", "alpha": 0.8}
_PERSON = {"facecolor": "peachpuff", "edgecolor": "sienna", "alpha": 0.9}


def convex_hull(points: np.ndarray) -> np.ndarray:
    """Vertices [K, 2] of the convex hull of points [N, 2], counter-clockwise (monotone chain)."""
    pts = np.unique(np.asarray(points, dtype=np.float64).reshape(-1, 2), axis=0)  # sorted by x, then y
    if len(pts) < 3:
        return pts

    def half(seq):
        out: list[np.ndarray] = []
        for p in seq:
            # drop the last vertex while it does not make a left turn toward p
            while len(out) >= 2:
                (ox, oy), (ax, ay) = out[-2], out[-1]
                if (ax - ox) * (p[1] - oy) - (ay - oy) * (p[0] - ox) > 1e-15:
                    break
                out.pop()
            out.append(p)
        return out

    lower, upper = half(pts), half(pts[::-1])
    return np.array(lower[:-1] + upper[:-1])


def _core_points(body: Primitive) -> tuple[np.ndarray, float]:
    """Points [N, 3] in the body frame whose hull, widened by the returned radius, is the body."""
    h, r, folded = body.half_extents_and_radius()
    if folded:  # a cylinder: its two end circles (h = (radius, BIG, half length))
        a = np.linspace(0.0, 2.0 * math.pi, DISC, endpoint=False)
        ring = np.stack([h[0] * np.cos(a), h[0] * np.sin(a)], axis=-1)
        return np.concatenate([np.column_stack([ring, np.full(DISC, z)]) for z in (-h[2], h[2])]), 0.0
    signs = np.array([[sx, sy, sz] for sx in (-1, 1) for sy in (-1, 1) for sz in (-1, 1)], dtype=np.float64)
    return signs * np.asarray(h, dtype=np.float64), float(r)


def body_outline(body: Primitive, plane: tuple[int, int], widen: float = 0.0) -> np.ndarray:
    """Outline [K, 2] (counter-clockwise) of `body` projected on the world axes `plane` (0 = x, 1 = y, 2 = z),
    the body widened by `widen` m in every direction (a zone around it)."""
    packed = pack([body])
    core, r = _core_points(body)
    world = core @ packed.rot[0].T + packed.centre[0]
    flat = world[:, list(plane)]
    r = r + float(widen)
    if r > 0:
        a = np.linspace(0.0, 2.0 * math.pi, DISC, endpoint=False)
        disc = r * np.stack([np.cos(a), np.sin(a)], axis=-1)
        flat = (flat[:, None, :] + disc[None]).reshape(-1, 2)
    return convex_hull(flat)


def _inside(hull: np.ndarray, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """bool [...]: points (x, y) inside the polygon `hull` [K, 2] (matplotlib's point-in-path test)."""
    if len(hull) < 3:
        return np.zeros(np.shape(x), dtype=bool)
    pts = np.column_stack([np.ravel(x), np.ravel(y)])
    return MplPath(hull).contains_points(pts).reshape(np.shape(x))


def elbow_joint(chain) -> tuple[int, str]:
    """(frame index, joint name) of the middle joint of the chain, whose origin is drawn as the elbow."""
    k = chain.dof // 2
    return k, chain.joint_names[k]


def elbow_path(chain, q) -> np.ndarray:
    """World positions [..., 3] of the middle joint's origin at q [..., n] (rad)."""
    k, _ = elbow_joint(chain)
    origin = SpherePoints(np.array([k]), np.zeros((1, 3)), chain)
    pos, _ = chain.points(np.asarray(q, dtype=np.float64), origin, jacobian=False)
    return pos[..., 0, :]


def _episode_kinds(record) -> list[str]:
    """Per episode: "contact" (a link touched furniture or another link, or entered the person's keep-out zone),
    "held" (the separation step scaled an applied command), or "other"."""
    ex = record.extras
    E = record.n_episodes
    kinds = ["other"] * E
    world = ex.get("world") or {}
    if ex.get("limits") is not None:
        held = ((torch.as_tensor(ex["limits"]).to(torch.int64) & SEPARATION) > 0).any(-1)
        kinds = ["held" if bool(h) else k for k, h in zip(kinds, held)]
    if ex.get("sep_furniture") is not None and world:
        touch = (torch.as_tensor(ex["sep_furniture"]) < 0) | (torch.as_tensor(ex["sep_self"]) < 0)
        touch |= torch.as_tensor(ex["sep_person"]) < float(world["keep_out"])
        kinds = ["contact" if bool(c) else k for k, c in zip(kinds, touch.any(-1))]
    return kinds


def sample_episodes(record, most: int = 20) -> list[tuple[int, str]]:
    """Up to `most` (episode, kind) pairs: contacts and keep-out entries first, then held episodes, then the
    rest, each in episode order (the drawing is for finding the episodes that came close)."""
    kinds = _episode_kinds(record)
    order = [(e, k) for kind in KINDS for e, k in enumerate(kinds) if k == kind]
    return order[: max(0, int(most))]


def _zone_outline(ax, hulls: list[np.ndarray], style: dict) -> None:
    """The outline of the union of convex polygons, traced on a GRID x GRID raster over their bounding box
    (a margin of a few cells, so the outline closes inside the raster)."""
    if not hulls:
        return
    pts = np.concatenate(hulls)
    lo, hi = pts.min(axis=0), pts.max(axis=0)
    pad = 3.0 * float((hi - lo).max()) / GRID
    gx, gy = np.meshgrid(np.linspace(lo[0] - pad, hi[0] + pad, GRID), np.linspace(lo[1] - pad, hi[1] + pad, GRID))
    inside = np.zeros(gx.shape, dtype=bool)
    for h in hulls:
        inside |= _inside(h, gx, gy)
    if inside.any():
        ax.contour(gx, gy, inside.astype(float), levels=[0.5], **style)


def scene_figure(record, bodies: list[Primitive], person: list[Primitive], chain, label: str,
                 most: int = 20) -> Figure:  # fmt: skip
    """The figure of `plot_scene_paths` (bodies as Polygon patches with gid "body:<name>", tool and elbow
    paths as lines with gid "tool:<episode>" and "elbow:<episode>")."""
    ex = record.extras
    world = ex.get("world") or {}
    keep_out, zone = world.get("keep_out"), world.get("reduced_zone")
    picks = sample_episodes(record, most)
    tool = record.ee_path.to(torch.float64).numpy()  # [E, T+1, 3]
    q = ex.get("q")
    elbow = elbow_path(chain, torch.as_tensor(q)[[e for e, _ in picks]].to(torch.float64).numpy()) \
        if q is not None and picks else None  # fmt: skip
    k, joint = elbow_joint(chain)

    fig = Figure(figsize=(12.5, 6.0), layout="constrained")
    axes = fig.subplots(1, 2)
    for ax, (a, b, plane) in zip(axes, PLANES):
        for body, style in [(x, _FURNITURE) for x in bodies] + [(x, _PERSON) for x in person]:
            ax.add_patch(Polygon(body_outline(body, (a, b)), closed=True, gid=f"body:{body.name}", linewidth=0.8,
                                 **style))  # fmt: skip
        for i, (e, kind) in enumerate(picks):
            colour = KINDS[kind][1]
            ax.plot(tool[e, :, a], tool[e, :, b], color=colour, linewidth=1.0, alpha=0.8, gid=f"tool:{e}")
            ax.plot(tool[e, -1, a], tool[e, -1, b], "x", color=colour, markersize=5)
            if elbow is not None:
                ax.plot(elbow[i, :, a], elbow[i, :, b], color=colour, linewidth=0.8, alpha=0.6, linestyle="--",
                        gid=f"elbow:{e}")  # fmt: skip
        if person and keep_out is not None:
            _zone_outline(ax, [body_outline(p, (a, b), keep_out) for p in person],
                          {"colors": "darkred", "linestyles": "--", "linewidths": 1.0})  # fmt: skip
        if person and zone is not None:
            _zone_outline(ax, [body_outline(p, (a, b), zone) for p in person],
                          {"colors": "darkred", "linestyles": ":", "linewidths": 0.8})  # fmt: skip
        ax.set_aspect("equal", adjustable="datalim")
        ax.set_xlabel(f"{plane[0]} (m)")
        ax.set_ylabel(f"{plane[-1]} (m)")
        ax.set_title(f"{'top' if plane == 'x-y' else 'side'} view ({plane})", fontsize=9)
    handles = [Patch(label="furniture", **_FURNITURE), Patch(label="person", **_PERSON)]
    if person and keep_out is not None:
        handles.append(Line2D([], [], color="darkred", linestyle="--",
                              label=f"keep-out zone ({keep_out * 100:.0f} cm)"))  # fmt: skip
    if person and zone is not None:
        handles.append(Line2D([], [], color="darkred", linestyle=":",
                              label=f"reduced-speed zone ({zone * 100:.0f} cm)"))  # fmt: skip
    shown = {kind for _, kind in picks}
    handles += [Line2D([], [], color=c, label=name) for kind, (name, c) in KINDS.items() if kind in shown]
    handles.append(Line2D([], [], color="black", label="tool path"))
    if elbow is not None:
        handles.append(Line2D([], [], color="black", linestyle="--", label=f"elbow path ({joint} origin)"))
    axes[0].legend(handles=handles, fontsize=7, loc="best")
    counts = ", ".join(f"{sum(kk == kind for _, kk in picks)} {KINDS[kind][0]}" for kind in KINDS if kind in shown)
    fig.suptitle(
        f"{label}: {len(picks)} of {record.n_episodes} episodes over the scene ({counts or 'none'}); x: where an "
        f"episode ended.\nElbow: origin of the middle joint's frame ({joint}, chain frame {k} of {chain.dof}). "
        "Zones are drawn around the person's bodies; they bound the links' surfaces, the paths are centre points.",
        fontsize=9,
    )  # fmt: skip
    return fig


def plot_scene_paths(record, bodies: list[Primitive], person: list[Primitive], chain, path: Path, label: str,
                     most: int = 20) -> Path:  # fmt: skip
    """Tool paths (solid) and elbow paths (dashed) of up to `most` episodes (contacts and keep-out entries
    first, then episodes the separation filter held, then the rest), top view (x-y) and side view (x-z), over
    every furniture body (grey) and person body, with the person's keep-out (dashed) and reduced-speed (dotted)
    zones from the record's world."""
    return _save(scene_figure(record, bodies, person, chain, label, most), path)


def scene_plots(records: dict, scene, chain, out: Path, most: int = 20) -> list[Path]:
    """One scene plot per interface (label -> RolloutRecord) into `out`; none when the scene has no bodies."""
    if chain is None or not (scene.obstacles or scene.person):
        return []
    plots = []
    for label, record in records.items():
        slug = "".join(c if c.isalnum() or c in "-_" else "_" for c in label)  # a file name
        plots.append(plot_scene_paths(record, list(scene.obstacles), list(scene.person), chain,
                                      Path(out) / f"scene-paths-{slug}.png", label, most))  # fmt: skip
    return plots
