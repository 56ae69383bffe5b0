"""Scene plot of vetting paths: body outlines against the bodies' own sizes, the elbow against the seven_joint_arm URDF,
which episodes are drawn first, one patch per body and the person's zone outlines, on constructed records."""

from __future__ import annotations

import math

import matplotlib.image as mpimg
import numpy as np
import pytest
import torch

from coreach.control.bodies import Primitive
from coreach.control.safety_filter import SEPARATION
from coreach.world.scenario import load_scenario
from coreach.vetting.records import RolloutRecord
from coreach.vetting.scene_plot import (body_outline, convex_hull, elbow_joint, elbow_path, plot_scene_paths,
                                        sample_episodes, scene_figure)  # fmt: skip
from coreach.world.scene_arm import arm_world
from coreach.world.urdf_arm import UrdfArm

ROBOT = UrdfArm()
CHAIN = arm_world(ROBOT, load_scenario("bedside_shelf")).chain
TOP, SIDE = (0, 1), (0, 2)
KEEP_OUT, ZONE = 0.18, 0.23

FURNITURE = [
    Primitive("shelf", "box", (0.2, 0.4, 1.0), (0.8, 0.0, 0.0)),
    Primitive("turned_box", "box", (0.2, 0.4, 0.1), (0.0, -0.8, 0.0), (0.0, 0.0, math.pi / 2)),
    Primitive("post", "cylinder", (0.05, 0.4), (0.0, 0.0, -0.25)),
    Primitive("rail", "capsule", (0.05, 0.3), (0.5, -0.5, 0.2), (0.0, math.pi / 2, 0.0)),  # axis along x
]
PERSON = [Primitive("head", "sphere", (0.11,), (-0.4, 0.6, 0.6))]


def _bounds(outline):
    return outline.min(axis=0), outline.max(axis=0)


def test_outlines_match_the_bodies_sizes():
    lo, hi = _bounds(body_outline(FURNITURE[0], TOP))
    assert np.allclose(lo, [0.7, -0.2]) and np.allclose(hi, [0.9, 0.2]) and len(body_outline(FURNITURE[0], TOP)) == 4
    lo, hi = _bounds(body_outline(FURNITURE[1], TOP))  # turned a quarter about z: x and y extents swap
    assert np.allclose(lo, [-0.2, -0.9]) and np.allclose(hi, [0.2, -0.7])
    # an upright cylinder: a disc from above, a rectangle from the side
    top = body_outline(FURNITURE[2], TOP)
    assert np.allclose(np.linalg.norm(top, axis=1), 0.05)
    lo, hi = _bounds(body_outline(FURNITURE[2], SIDE))
    assert np.allclose(lo, [-0.05, -0.45]) and np.allclose(hi, [0.05, -0.05])
    # a capsule lying along x: half length plus radius along x, radius across
    lo, hi = _bounds(body_outline(FURNITURE[3], TOP))
    assert np.allclose(lo, [0.5 - 0.2, -0.55]) and np.allclose(hi, [0.5 + 0.2, -0.45])
    # a sphere widened by the keep-out distance: every outline vertex on the circle of radius r + K
    ring = body_outline(PERSON[0], SIDE, widen=KEEP_OUT) - np.array([-0.4, 0.6])
    assert np.allclose(np.linalg.norm(ring, axis=1), 0.11 + KEEP_OUT)


def test_convex_hull_drops_inner_and_collinear_points():
    square = np.array([[0, 0], [1, 0], [1, 1], [0, 1], [0.5, 0.5], [0.5, 0.0], [0.2, 0.7]], dtype=float)
    hull = convex_hull(square)
    assert sorted(map(tuple, hull)) == [(0, 0), (0, 1), (1, 0), (1, 1)]
    x, y = hull[:, 0], hull[:, 1]
    assert 0.5 * np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y) == pytest.approx(1.0)  # counter-clockwise


def test_elbow_is_the_middle_joint_of_the_urdf():
    k, name = elbow_joint(CHAIN)
    assert (k, name) == (3, "joint_4")
    # from the URDF: at q = 0 the arm stands straight up, joint_4 0.10 + 0.08 + 0.20 + 0.20 m above the base
    assert np.allclose(elbow_path(CHAIN, np.zeros(7)), [0.0, 0.0, 0.58])
    # joint_4 rides 0.40 m up the upper arm from the shoulder (joint_2's origin, 0.18 m up the base axis):
    # any q keeps it on that sphere, and joints after it do not move it
    q = np.random.default_rng(0).uniform(-1.5, 1.5, (50, 7))
    e = elbow_path(CHAIN, q)
    assert np.allclose(np.linalg.norm(e - [0.0, 0.0, 0.18], axis=-1), 0.40)
    q2 = q.copy()
    q2[:, 3:] = 0.0
    assert np.allclose(elbow_path(CHAIN, q2), e)


def _record(E=4, T=20) -> RolloutRecord:
    """A constructed record: episode 3 touches furniture, episode 1 enters the person's keep-out zone, episode 2 is
    held by the separation filter, episode 0 is none of these; joint paths sweep the base and shoulder."""
    t = torch.linspace(0, 1, T + 1, dtype=torch.float64)
    q = torch.zeros(E, T + 1, 7, dtype=torch.float64)
    for e in range(E):
        q[e, :, 0] = (e - 1.5) * 0.5 * t
        q[e, :, 1] = 0.8 * t
        q[e, :, 3] = 1.2 * t
    pos, _ = ROBOT.fk(q.reshape(-1, 7))
    sep_f = torch.full((E, T + 1), 0.2, dtype=torch.float64)
    sep_f[3, 10] = -0.01
    sep_p = torch.full((E, T + 1), 0.5, dtype=torch.float64)
    sep_p[1, 12] = KEEP_OUT - 0.02
    limits = torch.zeros(E, T, dtype=torch.uint8)
    limits[2, 5:] = SEPARATION
    limits[3, 5:] = SEPARATION
    return RolloutRecord(
        interface="constructed", suite="unit", goal_names=["a", "b"], dt=0.1, goal_initial=torch.zeros(E, dtype=torch.long),
        goal_final=torch.tensor([0, 1, 0, 1]), switch_step=torch.full((E,), -1), switch_fraction=torch.full((E,), math.nan),
        success=torch.zeros(E, dtype=torch.bool), success_step=torch.full((E,), -1),
        ee_path=pos.reshape(E, T + 1, 3).to(torch.float64), belief=torch.full((E, T + 1, 2), 0.5, dtype=torch.float64),
        belief_at_switch=torch.full((E,), math.nan), error=torch.zeros(E, T + 1), limit_scaled=limits > 0,
        reachable=torch.ones(E, T, dtype=torch.bool), stick_gain=torch.full((E, T), 0.5), mode_switches=torch.zeros(E),
        extras={"q": q, "limits": limits, "sep_furniture": sep_f, "sep_person": sep_p,
                "sep_self": torch.full((E, T + 1), 0.1, dtype=torch.float64),
                "person_excess": torch.zeros(E, T, dtype=torch.bool),
                "world": {"furniture": [b.name for b in FURNITURE], "person": ["head"], "clearance": 0.02,
                          "keep_out": KEEP_OUT, "reduced_zone": ZONE, "excess_tol": 0.01}},
    )  # fmt: skip


def test_contacts_and_held_episodes_are_drawn_first():
    rec = _record()
    assert sample_episodes(rec) == [(1, "contact"), (3, "contact"), (2, "held"), (0, "other")]
    assert sample_episodes(rec, most=3) == [(1, "contact"), (3, "contact"), (2, "held")]
    rec.extras = {}  # an older record: nothing to tell the episodes apart, all drawn in order
    assert sample_episodes(rec, most=2) == [(0, "other"), (1, "other")]


def test_figure_has_every_body_the_zones_and_the_sampled_paths():
    rec = _record()
    fig = scene_figure(rec, FURNITURE, PERSON, CHAIN, "constructed", most=3)
    axes = fig.axes[:2]
    names = [b.name for b in FURNITURE + PERSON]
    q = rec.extras["q"].numpy()
    for ax, (a, b) in zip(axes, (TOP, SIDE)):
        bodies = [p.get_gid() for p in ax.patches if (p.get_gid() or "").startswith("body:")]
        assert bodies == [f"body:{n}" for n in names]
        lines = {ln.get_gid(): ln for ln in ax.lines if ln.get_gid()}
        assert set(lines) == {f"{kind}:{e}" for kind in ("tool", "elbow") for e in (1, 3, 2)}
        assert np.allclose(lines["tool:3"].get_xdata(), rec.ee_path[3, :, a].numpy())
        assert np.allclose(lines["elbow:2"].get_ydata(), elbow_path(CHAIN, q[2])[:, b])
        # keep-out and reduced-speed zone: a single sphere, so each outline is a circle of r + distance
        centre = np.array(PERSON[0].xyz)[[a, b]]
        radii = []
        for cs in ax.collections:
            verts = np.concatenate([p.vertices for p in cs.get_paths()])
            radii.append(np.linalg.norm(verts - centre, axis=1))
        assert len(radii) == 2
        for r, want in zip(radii, (0.11 + KEEP_OUT, 0.11 + ZONE)):
            assert np.abs(r - want).max() < 0.02  # within a few cells of the raster the outline is traced on
    assert "joint_4" in fig.get_suptitle() and "3 of 4 episodes" in fig.get_suptitle()  # the caption says so


def test_scene_plot_is_a_png(tmp_path):
    path = plot_scene_paths(_record(), FURNITURE, PERSON, CHAIN, tmp_path / "scene.png", "constructed")
    img = mpimg.imread(path)
    assert img.ndim == 3 and img.shape[0] > 300 and [p.name for p in tmp_path.iterdir()] == ["scene.png"]
