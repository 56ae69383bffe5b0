"""The collision geometry checked against outside references.

- coreach.control.bodies (signed distance from a sphere to a box, cylinder, sphere or capsule, and its
  gradient) against the coal collision library's shape-shape distance;
- coreach.runtime.kinematics (attached sphere centres and their Jacobians) against pinocchio;
- coreach.world.link_model (the conservative sphere cover of each link) against coal's distance to the link's real
  collision geometry: seven_joint_arm's cylinders, and one third-party arm's collision meshes (example-robot-data);
- bad collision inputs refused with a ConfigError in one line.
"""

from __future__ import annotations

from pathlib import Path

import coal
import numpy as np
import pinocchio as pin
import pytest
from conftest import third_party_robots
import torch

from coreach.control.bodies import SHAPES, Primitive, pack, point_distances
from coreach.errors import ConfigError
from coreach.world.link_model import link_model
from coreach.runtime.kinematics import Chain

N_POSES = 200


def _robots() -> Path:
    return third_party_robots()


# the third-party arm with collision meshes: the panda, whose links on the path to the tool are STL meshes
PANDA = ("panda_description/urdf/panda.urdf", "panda_hand_tcp")


# ---------------------------------------------------------------------------------------------------------
# 1. sphere-to-primitive distance and gradient against coal
# ---------------------------------------------------------------------------------------------------------


def _random_primitive(shape: str, rng: np.random.Generator) -> Primitive:
    if shape == "box":
        size = rng.uniform(0.02, 0.6, 3)
    elif shape == "sphere":
        size = rng.uniform(0.01, 0.3, 1)
    else:  # cylinder, capsule: radius, length
        size = np.array([rng.uniform(0.01, 0.3), rng.uniform(0.02, 0.6)])
    return Primitive("o", shape, tuple(size), tuple(rng.uniform(-1.0, 1.0, 3)), tuple(rng.uniform(-np.pi, np.pi, 3)))


def _coal_body(p: Primitive):
    """coal's shape and pose for a Primitive. coal: Box(x, y, z) full side lengths, Cylinder/Capsule(radius,
    full length along local z, a capsule's without caps), Sphere(radius). The rotation comes from pinocchio's
    rpyToMatrix (URDF roll-pitch-yaw), not from bodies.py, so the pose convention is checked too."""
    s = p.size
    shape = {"box": lambda: coal.Box(*s), "cylinder": lambda: coal.Cylinder(s[0], s[1]),
             "sphere": lambda: coal.Sphere(s[0]), "capsule": lambda: coal.Capsule(s[0], s[1])}[p.shape]()  # fmt: skip
    return shape, coal.Transform3s(pin.rpy.rpyToMatrix(*p.rpy), np.array(p.xyz))


def _coal_sphere_distance(centre, radius, p: Primitive):
    """coal's signed distance between a sphere and the primitive, and the result (nearest points, normal)."""
    shape, pose = _coal_body(p)
    req = coal.DistanceRequest()
    req.enable_signed_distance = True  # the penetration depth, negative, when they overlap
    res = coal.DistanceResult()
    d = coal.distance(coal.Sphere(radius), coal.Transform3s(np.eye(3), np.asarray(centre)), shape, pose, req, res)
    return d, res


def _ours(centre, radius, p: Primitive):
    d, g = point_distances(np.asarray(centre, dtype=np.float64)[None], pack([p]))
    return float(d[0, 0]), float(d[0, 0]) - radius, g[0, 0]


@pytest.mark.parametrize("shape", SHAPES)
def test_sphere_to_primitive_distance_and_gradient_match_coal(shape):
    """Sphere centre outside the body, the sphere clear of it or overlapping it: distance = coal's within 1e-6 m
    (coal 3.0.3, coal.distance with enable_signed_distance), gradient = the unit vector between coal's nearest
    points within 1e-5 where the distance exceeds 1 mm (below that the nearest points' difference is too short
    to give a direction)."""
    rng = np.random.default_rng(100 + SHAPES.index(shape))
    worst_d = worst_g = 0.0
    n_grad = 0
    for _ in range(N_POSES):
        p = _random_primitive(shape, rng)
        while True:  # a centre outside the body (the penetrating case is the next test)
            centre = np.array(p.xyz) + rng.uniform(-0.8, 0.8, 3)
            radius = rng.uniform(0.005, 0.15)
            point_d, d, g = _ours(centre, radius, p)
            if point_d > 0.0:
                break
        ref, res = _coal_sphere_distance(centre, radius, p)
        # reference: coal.distance(Sphere, shape), exact closed forms for these pairs when the centre is outside
        assert abs(d - ref) <= 1e-6, (shape, p, centre, radius, d, ref)
        worst_d = max(worst_d, abs(d - ref))
        if d > 1e-3:
            # reference: coal's nearest points, getNearestPoint1 on the sphere, getNearestPoint2 on the body;
            # the distance grows fastest along body point -> sphere point
            n = np.asarray(res.getNearestPoint1()) - np.asarray(res.getNearestPoint2())
            n /= np.linalg.norm(n)
            assert np.abs(g - n).max() <= 1e-5, (shape, p, centre, g, n)
            assert abs(np.linalg.norm(g) - 1.0) <= 1e-12
            worst_g = max(worst_g, float(np.abs(g - n).max()))
            n_grad += 1
    assert n_grad >= N_POSES // 2  # the sampling mostly gives clear spheres, so the gradient is checked often
    print(f"{shape}: outside, max |d - coal| {worst_d:.1e} m, max |grad - coal| {worst_g:.1e} ({n_grad} cases)")


def _inside_point(p: Primitive, rng: np.random.Generator) -> np.ndarray:
    """A point inside the primitive (rejection sampling in its local bounding box), world frame."""
    s = p.size
    if p.shape == "box":
        half = np.array(s) / 2
    elif p.shape == "sphere":
        half = np.full(3, s[0])
    else:  # cylinder, capsule (the capsule's caps add its radius along z)
        half = np.array([s[0], s[0], s[1] / 2 + (s[0] if p.shape == "capsule" else 0.0)])
    rot = pin.rpy.rpyToMatrix(*p.rpy)
    while True:
        c = rot @ (rng.uniform(-1.0, 1.0, 3) * half) + np.array(p.xyz)
        if _ours(c, 0.0, p)[0] < 0.0:
            return c


def _cylinder_depth(centre, p: Primitive) -> float:
    """Textbook signed distance of a point inside a solid cylinder (radius R, length L): minus the distance to
    the nearer of the side (R - rho) and the end faces (L/2 - |z|), rho and z in the cylinder's frame."""
    local = pin.rpy.rpyToMatrix(*p.rpy).T @ (np.asarray(centre) - np.array(p.xyz))
    rho = float(np.hypot(local[0], local[1]))
    return -min(p.size[0] - rho, p.size[1] / 2 - abs(local[2]))


@pytest.mark.parametrize("shape", SHAPES)
def test_penetration_depth_of_a_sphere_whose_centre_is_inside(shape):
    """Sphere centre inside the body: the distance is negative, and equals coal's signed distance (its
    penetration depth) within 1e-6 m for sphere, capsule and box, and the gradient coal's contact normal.

    coal 3.0.3 does not give the least penetration depth of a sphere whose centre is inside a cylinder: it
    separates along the radial direction even when an end face is nearer (cylinder radius 0.1 m, length 0.4 m,
    sphere of 1 cm at z = 0.15 on the axis: coal -0.11 m, the end face 5 cm away gives -0.06 m). There the
    reference is the analytic value (_cylinder_depth, minus the sphere radius), and coal's answer, a depth
    along some separating direction, may only be deeper than the least one, never shallower."""
    rng = np.random.default_rng(200 + SHAPES.index(shape))
    worst = 0.0
    for _ in range(N_POSES):
        p = _random_primitive(shape, rng)
        centre = _inside_point(p, rng)
        radius = rng.uniform(0.005, 0.15)
        point_d, d, g = _ours(centre, radius, p)
        assert point_d < 0.0 and d < 0.0
        ref, res = _coal_sphere_distance(centre, radius, p)
        if shape == "cylinder":
            # reference: the textbook cylinder depth (see docstring); coal only as a bound
            exact = _cylinder_depth(centre, p) - radius
            assert abs(d - exact) <= 1e-12, (p, centre, radius, d, exact)
            assert ref <= d + 1e-9, (p, centre, radius, d, ref)
            worst = max(worst, abs(d - exact))
        else:
            # reference: coal.distance with enable_signed_distance (closed forms for sphere-sphere,
            # sphere-capsule and sphere-box, exact inside too)
            assert abs(d - ref) <= 1e-6, (shape, p, centre, radius, d, ref)
            # reference: coal's normal points from the first shape (the sphere) into the body; the distance
            # grows the other way
            assert np.abs(g + np.asarray(res.normal)).max() <= 1e-5, (shape, p, centre, g, res.normal)
            worst = max(worst, abs(d - ref))
    print(f"{shape}: centre inside, max |d - reference| {worst:.1e} m")


def test_torch_and_numpy_give_the_same_distances():
    """The robot computer (numpy) and vetting (torch float64) run the same array-API code: agreement within
    1e-12 m for every shape at once, including points inside, on a cylinder's axis, and far away. The reference
    values of each path are checked against coal above."""
    rng = np.random.default_rng(300)
    bodies = [_random_primitive(s, rng) for s in SHAPES for _ in range(5)]
    packed = pack(bodies)
    pts = np.concatenate([
        np.array([b.xyz for b in bodies]),  # each body's centre (on the cylinders' axes)
        rng.uniform(-1.5, 1.5, (400, 3)),
    ]).reshape(2, -1, 3)  # a leading batch axis, as in vetting
    d_np, g_np = point_distances(pts, packed)
    d_t, g_t = point_distances(torch.tensor(pts, dtype=torch.float64), packed)
    assert d_t.dtype == torch.float64 and d_t.shape == d_np.shape and g_t.shape == g_np.shape
    np.testing.assert_allclose(d_t.numpy(), d_np, atol=1e-12, rtol=0)
    np.testing.assert_allclose(g_t.numpy(), g_np, atol=1e-12, rtol=0)
    d_t2, g_t2 = point_distances(torch.tensor(pts, dtype=torch.float64), packed, grad=False)
    assert g_t2 is None and torch.equal(d_t2, d_t)


# ---------------------------------------------------------------------------------------------------------
# 3. attached points and their Jacobians against pinocchio
# ---------------------------------------------------------------------------------------------------------


def _seven_joint_arm():
    from coreach.world.urdf_arm import UrdfArm

    arm = UrdfArm()
    return arm.urdf_text(), arm.tool_link, arm.link_model(0.02), None


def _panda():
    urdf = _robots() / PANDA[0]
    text = urdf.read_text(encoding="utf-8")
    # the meshes' package:// paths resolve beside the URDF's parents (.../share/example-robot-data/...)
    model = link_model(text, PANDA[1], urdf_dir=urdf.parent, where=str(urdf))
    return text, PANDA[1], model, urdf


def _full_q(model: pin.Model, names: list[str], q: np.ndarray) -> np.ndarray:
    """pinocchio's configuration for the chain's joint values; other joints (fingers) at neutral."""
    full = pin.neutral(model)
    for name, v in zip(names, q):
        joint = model.joints[model.getJointId(name)]
        if joint.nq == 2:  # pinocchio stores a continuous joint's angle as (cos, sin)
            full[joint.idx_q: joint.idx_q + 2] = np.cos(v), np.sin(v)
        else:
            full[joint.idx_q] = v
    return full


def _random_q(chain: Chain, rng, n: int) -> np.ndarray:
    lo, hi = np.clip(chain.q_lower, -np.pi, np.pi), np.clip(chain.q_upper, -np.pi, np.pi)
    return rng.uniform(lo, hi, size=(n, chain.dof))


@pytest.mark.parametrize("arm", ["seven_joint_arm", "panda"])
def test_attached_points_and_jacobians_match_pinocchio(arm):
    """Every sphere centre of the link model, on 20 random q: world position = pinocchio's placement of the
    sphere's link applied to the local centre; linear Jacobian = pinocchio's frame Jacobian (LOCAL_WORLD_ALIGNED,
    linear rows) of an operational frame added at the centre; both within 1e-9. The panda adds what seven_joint_arm
    lacks: joint origins with rotations, non-parallel axes and links behind fixed joints (the hand)."""
    text, tool, lm, _ = _seven_joint_arm() if arm == "seven_joint_arm" else _panda()
    chain = Chain.from_string(text, tool)
    attached = chain.attach(lm.links, lm.centres)
    model = pin.buildModelFromXML(text)
    # one operational frame per sphere centre, on its link's frame (pinocchio: placement w.r.t. the parent joint)
    ids = []
    for i, (link, c) in enumerate(zip(lm.links, lm.centres)):
        parent = model.getFrameId(link, pin.FrameType.BODY)
        f = model.frames[parent]
        ids.append(model.addFrame(pin.Frame(f"sphere_{i}", f.parentJoint, parent,
                                            f.placement * pin.SE3(np.eye(3), c), pin.FrameType.OP_FRAME)))  # fmt: skip
    data = model.createData()
    cols = [model.joints[model.getJointId(n)].idx_v for n in chain.joint_names]
    q = _random_q(chain, np.random.default_rng(400), 20)
    pos, jac = chain.points(q, attached)  # batched over q, as in vetting
    worst_p = worst_j = 0.0
    for k, qk in enumerate(q):
        full = _full_q(model, chain.joint_names, qk)
        pin.computeJointJacobians(model, data, full)  # also the forward kinematics
        pin.updateFramePlacements(model, data)
        for s, fid in enumerate(ids):
            # reference: pinocchio's body-frame placement composed with the centre (via the added frame)
            link_pose = data.oMf[model.getFrameId(lm.links[s], pin.FrameType.BODY)]
            ref_p = link_pose.act(lm.centres[s])
            assert np.abs(pos[k, s] - ref_p).max() <= 1e-9, (arm, lm.links[s], pos[k, s], ref_p)
            assert np.abs(data.oMf[fid].translation - ref_p).max() <= 1e-12  # the added frame is where we think
            # reference: pinocchio.getFrameJacobian, LOCAL_WORLD_ALIGNED: linear rows = the point's velocity
            ref_j = pin.getFrameJacobian(model, data, fid, pin.ReferenceFrame.LOCAL_WORLD_ALIGNED)[:3, cols]
            assert np.abs(jac[k, s] - ref_j).max() <= 1e-9, (arm, lm.links[s], jac[k, s], ref_j)
            worst_p = max(worst_p, float(np.abs(pos[k, s] - ref_p).max()))
            worst_j = max(worst_j, float(np.abs(jac[k, s] - ref_j).max()))
    # one unbatched q: the control loop's path through Chain._frames
    p1, j1 = chain.points(q[0], attached)
    np.testing.assert_allclose(p1, pos[0], atol=1e-12, rtol=0)
    np.testing.assert_allclose(j1, jac[0], atol=1e-12, rtol=0)
    print(f"{arm}: {len(ids)} spheres, max position error {worst_p:.1e} m, max Jacobian error {worst_j:.1e}")


# ---------------------------------------------------------------------------------------------------------
# 4. the sphere cover never reports more clearance than the real collision geometry (coal)
# ---------------------------------------------------------------------------------------------------------


def _cover_against_real_geometry(text, tool, lm, model, geom, n_q, per_q, rng):
    """For n_q random q and per_q obstacle spheres placed around the arm: for every moving link with collision
    geometry, (cover distance, coal distance to the real element). Cover distance: the least over the link's
    spheres of |centre - obstacle| - sphere radius - obstacle radius."""
    chain = Chain.from_string(text, tool)
    attached = chain.attach(lm.links, lm.centres)
    links = np.array(lm.links)
    data, gdata = model.createData(), geom.createData()
    q = _random_q(chain, rng, n_q)
    pos, _ = chain.points(q, attached, jacobian=False)
    objects = [(g, model.frames[g.parentFrame].name) for g in geom.geometryObjects]
    objects = [(i, g, name) for i, (g, name) in enumerate(objects) if name in set(lm.links)]
    assert {name for _, _, name in objects} == set(lm.links), "a link of the model without real geometry"
    req = coal.DistanceRequest()
    req.enable_signed_distance = True
    out = []
    for k, qk in enumerate(q):
        pin.updateGeometryPlacements(model, data, geom, gdata, _full_q(model, chain.joint_names, qk))
        for _ in range(per_q):
            # near the arm, so that many obstacles are within a few cm of a link (where the bound is tight)
            s = rng.integers(len(lm.links))
            u = rng.normal(size=3)
            u /= np.linalg.norm(u)
            centre = pos[k, s] + u * rng.uniform(0.0, lm.radii[s] + 0.12)
            radius = rng.uniform(0.002, 0.05)
            for i, g, name in objects:
                mine = links == name
                cover = float((np.linalg.norm(pos[k, mine] - centre, axis=-1) - lm.radii[mine]).min() - radius)
                res = coal.DistanceResult()
                pose = gdata.oMg[i]
                ref = coal.distance(g.geometry, coal.Transform3s(pose.rotation, pose.translation),
                                    coal.Sphere(radius), coal.Transform3s(np.eye(3), centre), req, res)  # fmt: skip
                out.append((name, cover, ref))
    return out


def _check_cover(rows, label):
    """cover <= max(coal, 0) + 1e-9. Clear of the real element, coal's distance is exact (the cylinder and mesh
    checks above and coal's own closed forms), and a cover can only be nearer. In contact, coal's depth is not
    the element's (a cylinder: see the penetration test; a mesh: coal measures against its triangles, a
    surface), so the bound is only that the cover reports contact too."""
    cover = np.array([r[1] for r in rows])
    ref = np.array([r[2] for r in rows])
    excess = cover - np.maximum(ref, 0.0)
    bad = np.nonzero(excess > 1e-9)[0]
    assert len(bad) == 0, [rows[i] for i in bad[:5]]
    clear = ref > 0
    assert clear.sum() > len(rows) // 4 and (~clear).sum() > 0  # both regimes were exercised
    print(f"{label}: {len(rows)} link-obstacle pairs, {int((~clear).sum())} in contact; largest cover - coal "
          f"{excess.max():.1e} m (must be <= 1e-9); cover's extra margin where clear: median "
          f"{np.median(-excess[clear]) * 1000:.1f} mm, max {(-excess[clear]).max() * 1000:.1f} mm")


def test_link_spheres_cover_seven_joint_arms_collision_cylinders():
    """seven_joint_arm: coal's distance to each link's URDF collision cylinder (loaded by pinocchio.buildGeomFromUrdfString)
    is never less than the sphere cover's, on 200 random q with 5 obstacles each."""
    text, tool, lm, _ = _seven_joint_arm()
    model = pin.buildModelFromXML(text)
    geom = pin.buildGeomFromUrdfString(model, text, pin.GeometryType.COLLISION)
    assert {type(g.geometry).__name__ for g in geom.geometryObjects} == {"Cylinder"}
    rows = _cover_against_real_geometry(text, tool, lm, model, geom, 200, 5, np.random.default_rng(500))
    _check_cover(rows, "seven_joint_arm cylinders")


def test_link_spheres_cover_a_third_party_arms_collision_meshes():
    """The panda (example-robot-data): collision meshes (STL) read by trimesh and bounded by capsules in
    link_model; coal's distance to each link's mesh, as pinocchio loads it (buildGeomFromUrdf, package
    directory = the share/ folder holding example-robot-data), is never less than the cover's, on 100 random q
    with 3 obstacles each."""
    text, tool, lm, urdf = _panda()
    robots = _robots()
    model = pin.buildModelFromUrdf(str(urdf))
    geom = pin.buildGeomFromUrdf(model, str(urdf), pin.GeometryType.COLLISION, package_dirs=[str(robots.parent.parent)])
    meshes = [g for g in geom.geometryObjects if model.frames[g.parentFrame].name in set(lm.links)]
    assert meshes and all(isinstance(g.geometry, coal.BVHModelBase) for g in meshes)  # really meshes
    rows = _cover_against_real_geometry(text, tool, lm, model, geom, 100, 3, np.random.default_rng(600))
    _check_cover(rows, "panda meshes")


# ---------------------------------------------------------------------------------------------------------
# 5. bad collision input: one line naming the file and the element
# ---------------------------------------------------------------------------------------------------------

_MESH_ARM = """<?xml version="1.0"?>
<robot name="mesh_arm">
  <link name="base"/>
  <joint name="j1" type="revolute">
    <parent link="base"/><child link="arm"/>
    <origin xyz="0 0 0.1"/><axis xyz="0 0 1"/><limit lower="-1" upper="1" velocity="1" effort="1"/>
  </joint>
  <link name="arm">
    <collision><geometry><mesh filename="{mesh}"/></geometry></collision>
  </link>
  <joint name="j_tool" type="fixed"><parent link="arm"/><child link="tool"/><origin xyz="0 0 0.3"/></joint>
  <link name="tool"/>
</robot>
"""


def _one_line(err) -> str:
    msg = str(err.value)
    assert "\n" not in msg, msg
    return msg


def test_a_missing_collision_mesh_is_refused(tmp_path):
    urdf = tmp_path / "arm.urdf"
    urdf.write_text(_MESH_ARM.format(mesh="meshes/arm.stl"))
    with pytest.raises(ConfigError) as err:
        link_model(urdf.read_text(), "tool", urdf_dir=tmp_path, where=str(urdf))
    msg = _one_line(err)
    assert str(urdf) in msg and "link arm collision[0]" in msg and "meshes/arm.stl is missing" in msg
    # the same through a package:// path, searched beside the URDF and in its parents
    urdf.write_text(_MESH_ARM.format(mesh="package://some_robot/meshes/arm.stl"))
    with pytest.raises(ConfigError) as err:
        link_model(urdf.read_text(), "tool", urdf_dir=tmp_path, where=str(urdf))
    assert "package://some_robot/meshes/arm.stl is missing" in _one_line(err)


def test_an_unreadable_collision_mesh_is_refused(tmp_path):
    """Garbage bytes in an .stl: trimesh either raises or reads no vertices; either way one ConfigError line
    naming the URDF element and the file."""
    (tmp_path / "arm.stl").write_bytes(np.random.default_rng(700).bytes(1000))
    urdf = tmp_path / "arm.urdf"
    urdf.write_text(_MESH_ARM.format(mesh="arm.stl"))
    with pytest.raises(ConfigError) as err:
        link_model(urdf.read_text(), "tool", urdf_dir=tmp_path, where=str(urdf))
    msg = _one_line(err)
    assert str(urdf) in msg and "link arm collision[0]" in msg and str(tmp_path / "arm.stl") in msg
    assert "is unreadable" in msg or "has no usable vertices" in msg


def test_an_override_naming_an_unknown_link_is_refused(tmp_path):
    text, tool, _, _ = _seven_joint_arm()
    override = tmp_path / "collision.yaml"
    override.write_text("links:\n  link_9:\n    - {sphere: [0, 0, 0.1], radius: 0.05}\n")
    with pytest.raises(ConfigError) as err:
        link_model(text, tool, override=override)
    msg = _one_line(err)
    assert f"{override}: links.link_9: unknown link" in msg and "link_7" in msg
