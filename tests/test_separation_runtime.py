"""The runtime Session's separation step under wild input, checked against an outside reference.

Reference everywhere: the coal collision library (3.x), through pinocchio (buildModelFromXML +
buildGeomFromUrdfString(COLLISION) on the bundle's robot.urdf, computeDistances with signed distances), on
the arm's real collision cylinders and the scene's bodies as coal shapes. None of coreach's kinematics, sphere
model or distance code is in the check. The fuzz loop is coreach.bench.fuzz_bench's (`coreach bench fuzz`
runs the same loop for a million steps).

Bundle: an untrained cVAE on the bedside shelf's goals, the manifest's safety.world as a release writes it,
and a workspace box beyond the arm's reach (fuzz_bench.REACH_BOX), so the separation step alone keeps the arm
out of the shelf and away from the person.
"""

from __future__ import annotations

import math
import time

import numpy as np
import pytest
from hypothesis import event, given, settings
from hypothesis import strategies as st

pin = pytest.importorskip("pinocchio")
coal = pytest.importorskip("coal")

from coreach.bench import fuzz_bench as fb  # noqa: E402
from coreach.errors import DataError  # noqa: E402
from coreach.runtime.session import Session  # noqa: E402

SHELF = ("shelf_", "board_", "drawer_")  # the shelf's bodies in scenario/bedside_shelf.yaml
# the head moved into the open space at the arm's left, where the tool can reach it from home
NEW_HEAD = ((0.30, 0.55, 0.35), (0.0, 0.0, 0.3))


@pytest.fixture(scope="module")
def bundle(tmp_path_factory):
    from coreach.world.scenario import load_scenario
    from coreach.world.urdf_arm import UrdfArm

    return fb.random_bundle(tmp_path_factory.mktemp("sep") / "bundle", UrdfArm(), load_scenario("bedside_shelf"))


@pytest.fixture(scope="module")
def session(bundle):
    return Session.open(bundle)


@pytest.fixture(scope="module")
def ref(session):
    return fb.reference_for(session)


@pytest.fixture(scope="module")
def starts(session, ref):
    """Clear start states near the shelf's bodies and near the person's (fuzz_bench.find_starts)."""
    found = fb.find_starts(session, ref, seed=0)
    near_shelf = [s for s in found if s.body.startswith(SHELF)]
    near_person = [s for s in found if s.group == "person"]
    return near_shelf, near_person


def _fresh(session):
    session.reset()
    session.reset_fault()
    return session


def _no_violation(tally: fb.Tally) -> str:
    return "; ".join(str(v) for v in tally.violations)


# ------------------------------------------------------------------------------------ the reference itself
def test_reference_is_coal_on_the_urdf_cylinders(session, ref):
    """The reference's wiring: pinocchio loads one collision cylinder per link of seven_joint_arm (base included), the
    closest pair of each group is the minimum over every (link, body) pair, and a pair's distance is what a
    plain coal.distance call gives for the link's placement (pinocchio's oMg) and the body's (rpyToMatrix of
    the scene's rpy), within 2e-6 m: coal's GJK and EPA stop at their tolerance (1e-6 by default) and
    pinocchio warm-starts them from the pair's previous answer, so two calls differ by up to about that
    (three orders below the 1 mm tolerance of the keep-out check)."""
    geom = ref.groups["furniture"][0]
    cylinders = [g for g in geom.geometryObjects if not g.name.startswith("scene/")]
    assert len(cylinders) == 8 and all(isinstance(g.geometry, coal.Cylinder) for g in cylinders)
    bodies = {p.name: p for p in session.arm.world.furniture + session.arm.world.person}
    req = coal.DistanceRequest()
    req.enable_signed_distance = True
    rng = np.random.default_rng(3)
    m = session.manifest
    model = pin.buildModelFromXML(m.path("robot.urdf").read_text())
    data, gdata = model.createData(), geom.createData()
    n_contact = 0
    for _ in range(5):
        q = rng.uniform(np.clip(m.q_lower, -3, 3), np.clip(m.q_upper, -3, 3))
        rows = ref.pairs(q)
        d_f, d_p = ref.closest(q)
        assert abs(d_f - min(r[3] for r in rows if r[0] == "furniture")) <= 2e-6
        assert abs(d_p - min(r[3] for r in rows if r[0] == "person")) <= 2e-6
        pin.updateGeometryPlacements(model, data, geom, gdata, q)
        for link_i, g in enumerate(cylinders):
            for name, p in bodies.items():
                M = gdata.oMg[link_i]
                # reference: coal.distance between the cylinder and the body, poses built here
                d = coal.distance(g.geometry, coal.Transform3s(M.rotation, M.translation), fb._coal_shape(p),
                                  coal.Transform3s(pin.rpy.rpyToMatrix(*p.rpy), np.array(p.xyz)), req,
                                  coal.DistanceResult())  # fmt: skip
                mine = next(r[3] for r in rows if r[1] == ref.links[link_i] and r[2] == name)
                assert abs(d - mine) <= 2e-6, (name, ref.links[link_i], d, mine)
                n_contact += d <= 0
    assert n_contact > 0  # random q put links into some body: the sign of an overlap is checked too


def test_start_states_are_clear_and_near_the_shelf_and_the_person(session, ref, starts):
    near_shelf, near_person = starts
    assert len(near_shelf) >= 3 and len(near_person) >= 2, (near_shelf, near_person)
    s = session.arm.world.settings
    for st_ in near_shelf + near_person:
        d_f, d_p = ref.closest(st_.q)
        # reference: coal; every start is clear of furniture and outside the person's keep-out zone
        assert d_f > 0.0 and d_p > s.keep_out, st_
        target = s.clearance if st_.group == "furniture" else s.keep_out
        assert st_.distance_m <= target + 0.05, st_  # near: within 5 cm of its protective distance
    print("starts:", ", ".join(f"{x.body} {x.distance_m:.3f} m" for x in near_shelf + near_person))


# ----------------------------------------------------------------------------------------------- the fuzz
@st.composite
def _segment(draw) -> fb.Segment:
    """A run of steps with one wild stick: mostly in or just past the box, sometimes huge, now and then a
    NaN or an infinity for one to three steps (it latches a fault until a later segment resets it, so it is
    kept rare enough for the arm to move most of the time); the sample mostly fresh, sometimes old but within
    the 0.2 s watchdog, stale or from the future."""
    kind = draw(st.sampled_from(["box"] * 6 + ["huge"] * 2 + ["not finite"]))
    if kind == "box":
        stick = draw(st.tuples(st.floats(-1.5, 1.5), st.floats(-1.5, 1.5)))
    elif kind == "huge":
        stick = draw(st.tuples(st.floats(-1e12, 1e12), st.floats(-1e12, 1e12)))
    else:
        bad, other = draw(st.sampled_from([math.nan, math.inf, -math.inf])), draw(st.floats(-1.5, 1.5))
        stick = draw(st.sampled_from([(bad, other), (other, bad)]))
    return fb.Segment(
        stick=stick,
        steps=draw(st.integers(1, 3) if kind == "not finite" else st.integers(20, 300)),
        turn=draw(st.floats(-0.1, 0.1)),
        age=draw(st.sampled_from([0.0] * 5 + [0.1, 0.25, 5.0, -0.01])),
        reset=draw(st.sampled_from(["", "", "fault", "fault", "both", "task"])),
    )


@settings(max_examples=20, deadline=None)
@given(segments=st.lists(_segment(), min_size=6, max_size=16), person=st.booleans(), pick=st.integers(0, 6))
def test_wild_sticks_never_bring_a_link_into_furniture_or_the_keep_out_zone(session, ref, starts, segments, person,
                                                                             pick):  # fmt: skip
    """From a start near the shelf or the person, any stick stream: at every 10 ms step coal finds every link
    cylinder clear of every furniture body (distance >= 0) and at least the keep-out distance less 1 mm from
    every body of the person (fuzz_bench.PERSON_TOLERANCE_M: the first-order rule's drift on curved paths)."""
    pool = starts[1] if person else starts[0]
    start = pool[pick % len(pool)]
    tally, _ = fb.drive(_fresh(session), ref, start.q, segments)
    # reference: coal through pinocchio on the URDF's collision cylinders (fuzz_bench.CoalReference)
    assert tally.penetrations == 0 and tally.keep_out_entries == 0, _no_violation(tally)
    event(f"start near {start.group}")
    event("separation step held" if tally.separation_held else "separation step idle")
    event(f"arm moved on {'over' if tally.moving > 500 else 'at most'} 500 steps")


def test_a_long_fixed_seed_run_stays_clear(session, ref, starts):
    """4,000 steps (eight 5-s episodes, alternating shelf and person starts) of random_segments(seed 7).
    The run is not vacuous: the separation step held, the arm moved, faults latched and were reset, stale
    sticks were refused, and coal saw links come within 2 cm of the protective distances."""
    near_shelf, near_person = starts
    pool = [x for pair in zip(near_shelf, near_person) for x in pair]
    t0 = time.perf_counter()
    tally = fb.fuzz(_fresh(session), ref, pool, 4000, seed=7, episode_steps=500)
    seconds = time.perf_counter() - t0
    s = session.arm.world.settings
    # reference: coal through pinocchio on the URDF's collision cylinders
    assert tally.penetrations == 0 and tally.keep_out_entries == 0, _no_violation(tally)
    assert tally.min_furniture_m >= 0.0
    assert tally.min_person_m >= s.keep_out - fb.PERSON_TOLERANCE_M
    assert tally.steps == 4000
    assert tally.separation_held > 200 and tally.moving > 1000 and tally.faulted > 0 and tally.stale > 0
    assert tally.min_furniture_m < s.clearance + 0.02 and tally.min_person_m < s.keep_out + 0.02
    print(f"{tally.steps} steps in {seconds:.1f} s ({tally.steps / seconds:.0f} steps/s); closest to furniture "
          f"{tally.min_furniture_m * 1000:.1f} mm, to the person {tally.min_person_m * 1000:.1f} mm (keep-out "
          f"{s.keep_out * 1000:.0f} mm); separation held {tally.separation_held} steps")


def test_the_check_sees_what_a_session_without_the_separation_step_does(bundle, ref, starts):
    """The same loop on the same bundle with the session's separation step taken out (no ArmWorld): coal now
    reports penetrations and keep-out entries, and describes them; the counts above are not zero by
    construction."""
    s = Session.open(bundle)
    s.arm = None  # Session.step passes no separation to the filter
    near_shelf, near_person = starts
    tally = fb.fuzz(s, ref, near_shelf[:2] + near_person[:2], 2000, seed=7, episode_steps=500)
    assert tally.penetrations > 0 and tally.keep_out_entries > 0, tally
    v = tally.violations[0]
    assert v["kind"] in ("penetration", "keep-out entry") and len(v["q"]) == 7 and v["closest"]


# ------------------------------------------------------------------------------------------ set_obstacles
class _Pusher:
    """Stands in for onnxruntime: returns whatever joint velocity the test put in `qd`."""

    qd = np.zeros(7)

    def run(self, names, feeds):
        return [self.qd[None].astype(np.float32)]


def _push_toward(session, ref, target, steps=400):
    """Drive the tool at the target (pinocchio's tool Jacobian, pseudo-inverse, far beyond the caps) with the
    stick held; returns coal's closest link-person distance at every reached state and the held steps."""
    pusher = _Pusher()
    session._ort = pusher
    model = ref.model
    data = model.createData()
    tool = model.getFrameId("tool")
    q = np.array(session.manifest.q_home)
    person, held = [], 0
    for i in range(steps):
        pin.forwardKinematics(model, data, q)
        pin.updateFramePlacements(model, data)
        jac = pin.computeFrameJacobian(model, data, q, tool, pin.LOCAL_WORLD_ALIGNED)[:3]
        err = np.asarray(target) - data.oMf[tool].translation
        pusher.qd = np.linalg.pinv(jac) @ (err / np.linalg.norm(err)) * 2.0
        q = q + session.step((0.9, 0.0), q, i * 0.01) * 0.01
        person.append(ref.closest(q)[1])
        held += session.last.separation_held
    return np.array(person), held


def test_set_obstacles_moves_the_head_and_the_filter_keeps_out_of_its_new_zone(bundle):
    # without the update the session does not know: pushed at the new place, the arm goes into the head there
    before = Session.open(bundle)
    ref_before = fb.reference_for(before)
    ref_before.move({"head": NEW_HEAD})  # coal sees the head at its new place, the session does not
    keep_out = ref_before.keep_out
    d_before, _ = _push_toward(before, ref_before, NEW_HEAD[0])
    assert d_before.min() < 0.0  # reference: coal, a link inside the head at its new place

    s = Session.open(bundle)
    s.set_obstacles({"head": NEW_HEAD})
    head = next(p for p in s.arm.world.person if p.name == "head")
    assert head.xyz == NEW_HEAD[0] and head.rpy == NEW_HEAD[1]
    ref = fb.reference_for(s)  # built from the session's world: the head at its new place
    d_after, held = _push_toward(s, ref, NEW_HEAD[0])
    # reference: coal; every reached state at least the keep-out distance (less 1 mm) from every person body
    assert d_after.min() >= keep_out - fb.PERSON_TOLERANCE_M, d_after.min()
    assert d_after.min() < keep_out + 0.01 and held > 100  # the filter, not the push, stopped the arm there
    print(f"head moved: closest {d_after.min() * 1000:.1f} mm (keep-out {keep_out * 1000:.0f} mm), held "
          f"{held} of 400 steps; not moved: {d_before.min() * 1000:.1f} mm")


@pytest.mark.parametrize("poses, match", [
    ({"nose": ((0.3, 0.5, 0.3), (0.0, 0.0, 0.0))}, "unknown body 'nose'"),
    ({"head": ((0.3, math.nan, 0.3), (0.0, 0.0, 0.0))}, "head xyz"),
    ({"head": ((0.3, 0.5, 0.3), (0.0, math.inf, 0.0))}, "head rpy"),
    ({"head": NEW_HEAD, "torso": ((0.0, 0.0, -math.inf), (0.0, 0.0, 0.0))}, "torso xyz"),  # one bad: none moves
    ({"head": ((0.3, 0.5), (0.0, 0.0, 0.0))}, "head xyz"),
    ({"head": (0.3, 0.5, 0.3)}, "expected \\(xyz \\[3\\], rpy \\[3\\]\\)"),
])  # fmt: skip
def test_set_obstacles_refuses_bad_poses_and_changes_nothing(session, poses, match):
    world = session.arm.world
    before = [(p.name, p.xyz, p.rpy) for p in world.furniture + world.person]
    packed = world.bodies
    with pytest.raises(DataError, match=match):
        session.set_obstacles(poses)
    assert [(p.name, p.xyz, p.rpy) for p in world.furniture + world.person] == before
    assert world.bodies is packed  # not even repacked


# ------------------------------------------------------------------------------------------------ latency
def test_runtime_bench_times_the_separation_step_where_it_acts(session, ref, bundle):
    """`coreach bench runtime`'s "separation" stage is timed at a state near furniture with a command the
    step must scale: coal puts a link within 5 cm beyond the clearance there, and keep_apart holds it."""
    from coreach.control.safety_filter import SafetyLimits
    from coreach.runtime.latency import near_furniture, run_runtime_bench

    q, qd, gap = near_furniture(session)
    s = session.arm.world.settings
    d_f, _ = ref.closest(q)
    assert 0.0 < gap < 0.01 and s.clearance <= d_f < s.clearance + 0.05, (gap, d_f)  # reference: coal
    _, held = SafetyLimits.keep_apart(qd, *session.arm.separation(q), session.manifest.lookahead_s)
    assert bool(held)
    out = run_runtime_bench(bundle, steps=100, warmup=10)
    assert set(out["stages_p50_us"]) >= {"kinematics", "decoder", "filter", "separation"}
    assert out["stages_p50_us"]["separation"] > 0 and out["session_p99_us"] >= out["session_p50_us"] > 0


# ---------------------------------------------------------------------------------------------- bench fuzz
def test_bench_fuzz_command_reports_the_coal_figures(bundle, workdir, capsys, monkeypatch):
    """`coreach --json bench fuzz`: on a given bundle and on the default random one, the same loop with coal's
    counts (0), closest approaches and the steps per second; `coreach bench --help` lists it."""
    import json

    from coreach.cli import main

    monkeypatch.setenv("CI", "true")
    assert main(["bench", "--help"]) == 0
    listed = capsys.readouterr().out
    assert "bench commands:" in listed and "\n  fuzz " in listed
    for extra in ([f"bundle={bundle}"], []):
        assert main(["--json", "bench", "fuzz", "steps=300", "episode_steps=150", *extra]) == 0
        out = json.loads(capsys.readouterr().out)["runs"][0]
        assert out["steps"] == 300 and out["penetrations"] == 0 and out["keep_out_entries"] == 0
        assert out["closest_furniture_m"] >= 0 and out["closest_person_m"] >= out["keep_out_m"] - 1e-3
        assert out["steps_per_s"] > 0 and out["checked_by"].startswith("coal ")
        assert (str(bundle.resolve()) == out["bundle"]) == bool(extra)
