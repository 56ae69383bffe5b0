"""`coreach bench fuzz`: the runtime Session driven with wild sticks, every step checked against coal.

A Session (coreach.runtime.session) on a bundle whose manifest has scene bodies drives a simulated arm
(q += qd * dt at 100 Hz) from start states near each body of the scene. The sticks are wild on purpose:
beyond the box by up to nine orders of magnitude, NaN or infinite now and then, stale or from the future,
with the latched fault reset at random. After every step the reached state is measured with the coal
collision library on the arm's real collision geometry (the URDF's <collision> elements, placed by
pinocchio): nothing of coreach's own kinematics, sphere model or distance code takes part in the check, so a
bug there cannot hide itself. A step counts as
- a penetration when a link's collision shape overlaps furniture (coal distance < 0);
- a keep-out entry when a link comes closer to a body of the person than the keep-out distance, less
  PERSON_TOLERANCE_M (see there).
Both counts must be 0. tests/test_separation_runtime.py runs the same loop (this module) as a property
test; the benchmark runs it for a million steps and reports the steps per second.
"""

from __future__ import annotations

import logging
import math
import os
import sys
import tempfile
import time
from dataclasses import dataclass, field
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Callable, Iterable

import numpy as np
import torch
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

from coreach.context import ContextSpec
from coreach.decoder.policy import DecoderPolicy
from coreach.errors import ConfigError
from coreach.host.registry import build_plugin, builtin_option
from coreach.release.bundle_store import bundle_folder
from coreach.release.bundle_writer import write_bundle
from coreach.release.metadata import _nominal_layout, _world_section
from coreach.runtime.session import Session
from coreach.world.scenario import load_scenario

log = logging.getLogger("coreach.bench")

# The separation rule is first order: it keeps the linear prediction of every sphere's distance at or above
# the keep-out distance. The arm moves on arcs, so between two 10 ms steps a sphere held at the zone's edge can
# drift inward by a second-order amount (micrometres per step at the tool speed cap of 0.25 m/s), which can add
# up while the arm slides along the edge. 1 mm bounds that with room to spare and is small beside what the
# keep-out distance already holds for measurement error (Z_d + Z_r = 3 cm in the shipped scene). Furniture
# gets no tolerance: the rule keeps the spheres a clearance (2 cm) away, so coal must never see an overlap.
PERSON_TOLERANCE_M = 1e-3
DT = 0.01  # s, the control period (100 Hz)
EPISODE_STEPS = 1000  # steps from one start state before the next (10 s of simulated time)
# A workspace box beyond the arm's reach (0.92 m from a shoulder 0.18 m above the base) for the random
# bundle: the box acts on the tool only, and a box around the shelf would keep the tool from the person on
# its own; without it the separation step is the only thing between the arm and every body.
REACH_BOX = ((-1.2, -1.2, -1.0), (1.2, 1.2, 1.3))
STICK_SCALE = 30.0  # the random decoder's stick gain (see random_bundle)


# --------------------------------------------------------------------------------------------- the bundle
def random_bundle(folder: str | Path, robot, scene, world: bool = True, seed: int = 0,
                  workspace=REACH_BOX) -> Path:  # fmt: skip
    """A bundle in the new folder `folder` (its parent must exist) with an untrained cVAE decoder (2 x 32,
    latent 2) for `robot` (a robot plugin with urdf_text) on `scene`'s goals; with `world`, the manifest's
    safety.world holds the scene's bodies and the arm's sphere model as a release writes them. The decoder's
    action normalisation asks for about 1 rad/s, more than the caps allow, so the filters have work to do."""
    folder = Path(folder)
    spec = ContextSpec(dof=robot.dof, n_goals=len(scene.goal_names))
    torch.manual_seed(seed)
    model = builtin_option("model", "cvae")
    model.update({"latent_dim": 2, "hidden": [32, 32]})  # pinned: a small net, whatever the yaml says
    policy = DecoderPolicy.build(model, spec, robot.dof)
    policy.set_normalisation(torch.randn(400, spec.width) * 0.5, torch.randn(400, robot.dof) * 1.0)
    # An untrained net barely hears 2 stick inputs beside the context's ~100 and drifts the same way whatever
    # the stick says; scaled up, the stick turns the command in every direction, as a trained decoder does.
    policy.stick_scale.fill_(STICK_SCALE)
    meta = {
        "goal_names": list(scene.goal_names),
        "nominal_layout": _nominal_layout(scene),
        "dataset_fingerprint": "sha256:feed", "training_run_id": "run-fuzz", "git_commit": "0" * 40,
        "q_home": [float(v) for v in robot.q_home],
        "safety": {"workspace_min": list(workspace[0]), "workspace_max": list(workspace[1])},
        "world": _world_section(robot, scene) if world else {},
        "parity_n": 500,
    }  # fmt: skip
    urdf = folder.parent / f"{folder.name}.urdf"
    urdf.write_text(robot.urdf_text(), encoding="utf-8")
    return write_bundle(folder, policy, urdf, meta, {}, {"passed": True})


# --------------------------------------------------------------------------------------- coal reference
def _coal_shape(p):
    """coal's shape for a scene Primitive: Box(x, y, z) full side lengths, Cylinder(radius, full length),
    Capsule(radius, length without the caps), Sphere(radius), all along the body's local z."""
    import coal  # late: optional (the test extra), for the reference check only

    s = p.size
    return {"box": lambda: coal.Box(*s), "cylinder": lambda: coal.Cylinder(s[0], s[1]),
            "sphere": lambda: coal.Sphere(s[0]), "capsule": lambda: coal.Capsule(s[0], s[1])}[p.shape]()  # fmt: skip


class CoalReference:
    """The arm's URDF collision geometry (pinocchio places it) against the scene's bodies, measured by coal.

    Two geometry models, one per group (furniture, person), each with every (link, body) pair, so one
    pinocchio.computeDistances call per group measures all pairs in C++ and names the closest."""

    def __init__(self, urdf_text: str, joint_names, furniture, person, keep_out: float):
        try:
            import pinocchio as pin  # late: optional (test extra); else says what to install
        except ImportError:
            raise ConfigError("coreach bench fuzz", "needs pinocchio and coal (the independent reference): "
                                                    "pip install -e '.[test]'") from None  # fmt: skip
        self._pin = pin
        self.keep_out = float(keep_out)
        self.model = pin.buildModelFromXML(urdf_text)
        self.data = self.model.createData()
        self._slots = []  # (idx_q, continuous) per joint of the chain, in the chain's order
        for name in joint_names:
            j = self.model.joints[self.model.getJointId(name)]
            self._slots.append((j.idx_q, j.nq == 2))  # pinocchio keeps a continuous joint as (cos, sin)
        self._neutral = pin.neutral(self.model)
        self.groups = {}
        for group, bodies in (("furniture", list(furniture)), ("person", list(person))):
            geom = pin.buildGeomFromUrdfString(self.model, urdf_text, pin.GeometryType.COLLISION)
            n_links = len(geom.geometryObjects)
            self.links = [self.model.frames[g.parentFrame].name for g in geom.geometryObjects]
            index = {}
            for p in bodies:
                index[p.name] = geom.addGeometryObject(pin.GeometryObject(f"scene/{p.name}", 0, 0, self._se3(p),
                                                                          _coal_shape(p)))  # fmt: skip
            for i in range(n_links):
                for name in index:
                    geom.addCollisionPair(pin.CollisionPair(i, index[name]))
            gdata = geom.createData()
            for req in gdata.distanceRequests:
                req.enable_signed_distance = True  # overlaps come out negative (penetration depth)
            self.groups[group] = (geom, gdata, index, [p.name for p in bodies])

    def _se3(self, p):
        pin = self._pin
        return pin.SE3(pin.rpy.rpyToMatrix(*p.rpy), np.array(p.xyz, dtype=np.float64))

    def sync(self, world) -> None:
        """Take the bodies' current poses from a coreach World (after Session.set_obstacles): the data only,
        none of its distance code."""
        for group, bodies in (("furniture", world.furniture), ("person", world.person)):
            geom, _, index, _ = self.groups[group]
            for p in bodies:
                geom.geometryObjects[index[p.name]].placement = self._se3(p)

    def move(self, poses: dict) -> None:
        """Put named bodies at {name: (xyz, rpy)} in the reference only (a test moves a body the session does
        not know about)."""
        pin = self._pin
        for name, (xyz, rpy) in poses.items():
            for geom, _, index, _ in self.groups.values():
                if name in index:
                    geom.geometryObjects[index[name]].placement = pin.SE3(pin.rpy.rpyToMatrix(*rpy),
                                                                          np.asarray(xyz, dtype=np.float64))

    def _place(self, q) -> None:
        full = self._neutral.copy()
        for (i, continuous), v in zip(self._slots, np.asarray(q, dtype=np.float64).tolist()):
            if continuous:
                full[i: i + 2] = math.cos(v), math.sin(v)
            else:
                full[i] = v
        self._pin.forwardKinematics(self.model, self.data, full)

    def closest(self, q) -> tuple[float, float]:
        """(closest link-furniture distance, closest link-person distance) at q (m, coal; inf without bodies)."""
        self._place(q)
        out = []
        for geom, gdata, index, _ in self.groups.values():
            if not index:
                out.append(math.inf)
                continue
            self._pin.updateGeometryPlacements(self.model, self.data, geom, gdata)
            k = self._pin.computeDistances(geom, gdata)
            out.append(float(gdata.distanceResults[k].min_distance))
        return out[0], out[1]

    def pairs(self, q) -> list[tuple[str, str, str, float]]:
        """Every (group, link, body, coal distance) at q: for reports and the start search."""
        self._place(q)
        rows = []
        for group, (geom, gdata, _, names) in self.groups.items():
            if not names:
                continue
            self._pin.updateGeometryPlacements(self.model, self.data, geom, gdata)
            self._pin.computeDistances(geom, gdata)
            for pair, res in zip(geom.collisionPairs, gdata.distanceResults):
                rows.append((group, self.links[pair.first], geom.geometryObjects[pair.second].name[6:],
                             float(res.min_distance)))  # fmt: skip
        return rows

    def body_distance(self, q, group: str, name: str) -> float:
        """Closest link to one body at q (m, coal)."""
        return min(d for g, _, b, d in self.pairs(q) if g == group and b == name)

    def violation(self, d_furniture: float, d_person: float) -> str | None:
        if d_furniture < 0.0:
            return "penetration"
        if d_person < self.keep_out - PERSON_TOLERANCE_M:
            return "keep-out entry"
        return None


def reference_for(session) -> CoalReference:
    """The coal reference of a Session's bundle: its robot.urdf and its scene bodies (safety.world)."""
    if session.arm is None:
        raise ConfigError(f"bundle {session.manifest.folder}", "has no scene bodies (manifest safety.world is {}); "
                                                               "the fuzz needs furniture or a person")  # fmt: skip
    m = session.manifest
    w = session.arm.world
    return CoalReference(m.path("robot.urdf").read_text(encoding="utf-8"), m.joint_names, w.furniture, w.person,
                         w.settings.keep_out)


# ------------------------------------------------------------------------------------------ start states
@dataclass(frozen=True)
class Start:
    """A clear state q near one body: coal's distance from the closest link to it (m)."""

    group: str  # furniture | person
    body: str
    q: np.ndarray
    distance_m: float


def _acceptable(session, ref: CoalReference, qs: np.ndarray) -> np.ndarray:
    """[B] bool: the sphere model clear of everything (so the filter starts without holding), the tool inside
    the workspace box (so the box is not what holds the arm) and coal's geometry clear too."""
    arm, m = session.arm, session.manifest
    ok = arm.clear(arm.geometry(qs, grad=False))
    pos, _ = session.chain.fk(qs)
    ok &= ((pos >= m.workspace_min) & (pos <= m.workspace_max)).all(axis=-1)
    for i in np.nonzero(ok)[0]:
        d_f, d_p = ref.closest(qs[i])
        ok[i] = d_f > 0.0 and d_p > ref.keep_out
    return ok


def find_starts(session, ref: CoalReference, seed: int = 0, samples: int = 3000, climb: int = 60,
                near_m: float = 0.05) -> list[Start]:  # fmt: skip
    """A clear start state next to each scene body the arm can come near: uniform samples within the joint
    limits, the closest acceptable one to the body, then a random descent toward it (each move acceptable).
    Kept when coal puts a link within `near_m` of the body's protective distance (the clearance for furniture,
    the keep-out distance for the person). Deterministic for a seed."""
    m = session.manifest
    rng = np.random.default_rng(seed)
    lo, hi = np.clip(m.q_lower, -np.pi, np.pi), np.clip(m.q_upper, -np.pi, np.pi)
    qs = rng.uniform(lo, hi, size=(samples, len(lo)))
    qs = qs[_acceptable(session, ref, qs)]
    table: dict[tuple[str, str], list[float]] = {}
    for q in qs:
        per_body: dict[tuple[str, str], float] = {}
        for group, _, body, d in ref.pairs(q):
            per_body[(group, body)] = min(d, per_body.get((group, body), math.inf))
        for key, d in per_body.items():
            table.setdefault(key, []).append(d)
    settings = session.arm.world.settings
    starts = []
    for (group, body), dists in table.items():
        target = settings.clearance if group == "furniture" else settings.keep_out
        q = qs[int(np.argmin(dists))].copy()
        d = min(dists)
        step = 0.1
        for _ in range(climb):
            if d <= target + 0.01:
                break
            cand = np.clip(q + rng.normal(0.0, step, size=(8, len(q))), m.q_lower, m.q_upper)
            cand = cand[_acceptable(session, ref, cand)]
            dc = [ref.body_distance(c, group, body) for c in cand]
            if dc and min(dc) < d:
                q, d = cand[int(np.argmin(dc))].copy(), min(dc)
            else:
                step = max(step * 0.7, 0.005)
        if d <= target + near_m:
            starts.append(Start(group, body, q, float(d)))
    return starts


# ------------------------------------------------------------------------------------------- the sticks
@dataclass(frozen=True)
class Segment:
    """A run of steps with one stick: `stick` [d] turned by `turn` rad per step in its first two axes (any
    floats, NaN and infinities included), sampled `age` s before the control clock (> watchdog: stale, < 0:
    from the future), after `reset` ("fault": reset_fault, "task": reset, "both", or "")."""

    stick: tuple[float, ...]
    steps: int
    turn: float = 0.0
    age: float = 0.0
    reset: str = ""

    def stick_at(self, k: int) -> list[float]:
        s = list(self.stick)
        if len(s) >= 2 and self.turn:
            c, n = math.cos(self.turn * k), math.sin(self.turn * k)
            # an infinite stick turned may come out NaN: wild input either way
            s[0], s[1] = c * s[0] - n * s[1], n * s[0] + c * s[1]
        return s


def random_segments(rng: np.random.Generator, steps: int, d: int, watchdog_s: float) -> list[Segment]:
    """Segments covering `steps` steps: mostly sticks in or just past the box, a quarter up to 1e9, a few NaN
    or infinite (a glitch of one to three steps), released sticks; a tenth of the segments stale, one in twenty
    from the future, one in twenty old but within the watchdog; the fault is reset before half of them."""
    out, total = [], 0
    while total < steps:
        n = int(rng.integers(1, 150))
        kind = rng.random()
        if kind < 0.55:
            stick = rng.uniform(-1.3, 1.3, d)
        elif kind < 0.8:
            stick = rng.uniform(-1.0, 1.0, d) * 10 ** rng.uniform(0.3, 9.0)
        elif kind < 0.88:
            stick = rng.uniform(-1.0, 1.0, d)
            stick[rng.integers(d)] = rng.choice([math.nan, math.inf, -math.inf])
            n = int(rng.integers(1, 4))
        else:
            stick = rng.uniform(-0.05, 0.05, d)  # inside the deadband: a released stick
        clock = rng.random()
        age = 0.0
        if clock < 0.1:
            age = watchdog_s * (1.0 + rng.uniform(0.01, 5.0))  # stale
        elif clock < 0.15:
            age = -rng.uniform(1e-4, 0.1)  # from the future
        elif clock < 0.2:
            age = watchdog_s * rng.uniform(0.0, 1.0)  # old but within the watchdog
        reset = rng.choice(["", "fault", "task", "both"], p=[0.45, 0.4, 0.05, 0.1])
        n = min(n, steps - total)
        out.append(Segment(tuple(float(v) for v in stick), n, float(rng.normal(0.0, 0.03)), float(age), str(reset)))
        total += n
    return out


# ------------------------------------------------------------------------------------------ the loop
@dataclass
class Tally:
    """What the coal check saw over the run (distances in m)."""

    steps: int = 0
    penetrations: int = 0
    keep_out_entries: int = 0
    min_furniture_m: float = math.inf
    min_person_m: float = math.inf
    separation_held: int = 0
    moving: int = 0
    faulted: int = 0
    stale: int = 0
    session_s: float = 0.0
    check_s: float = 0.0
    violations: list[dict] = field(default_factory=list)  # the first few, described

    def add(self, other: Tally) -> None:
        for k in ("steps", "penetrations", "keep_out_entries", "separation_held", "moving", "faulted", "stale",
                  "session_s", "check_s"):  # fmt: skip
            setattr(self, k, getattr(self, k) + getattr(other, k))
        self.min_furniture_m = min(self.min_furniture_m, other.min_furniture_m)
        self.min_person_m = min(self.min_person_m, other.min_person_m)
        self.violations += other.violations[: max(0, 5 - len(self.violations))]


def drive(session, ref: CoalReference, q0, segments: Iterable[Segment], dt: float = DT, t0: float = 0.0,
          tally: Tally | None = None, progress: Callable[[int], None] | None = None,
          every: int = 1000) -> tuple[Tally, np.ndarray]:  # fmt: skip
    """Drive `session` from q0 through the segments, q += qd * dt, and check every reached state with coal
    (the start too). Returns the tally and the last q. `progress(steps)` is called every `every` steps."""
    tally = Tally() if tally is None else tally
    q = np.asarray(q0, dtype=np.float64).copy()
    clock = time.perf_counter
    if session.arm is not None:  # the bodies where the session has them (set_obstacles may have moved them)
        ref.sync(session.arm.world)

    def check(q_now) -> str | None:
        d_f, d_p = ref.closest(q_now)
        tally.min_furniture_m = min(tally.min_furniture_m, d_f)
        tally.min_person_m = min(tally.min_person_m, d_p)
        kind = ref.violation(d_f, d_p)
        if kind == "penetration":
            tally.penetrations += 1
        elif kind:
            tally.keep_out_entries += 1
        return kind

    def describe(kind, q_now, **detail):
        if len(tally.violations) < 5:
            # the pairs nearest to (or deepest past) their limit, as coal measures them
            worst = sorted(ref.pairs(q_now), key=lambda r: r[3] - (ref.keep_out if r[0] == "person" else 0.0))
            tally.violations.append({"kind": kind, "q": q_now.tolist(), "closest": worst[:3], **detail})

    kind = check(q)
    if kind:
        describe(kind, q, step="start")
    now = t0
    k_total = 0
    for seg in segments:
        if seg.reset in ("fault", "both"):
            session.reset_fault()
        if seg.reset in ("task", "both"):
            session.reset()
        for k in range(seg.steps):
            stick = seg.stick_at(k)
            t_a = clock()
            qd = session.step(stick, q, now, now - seg.age)
            t_b = clock()
            info = session.last
            q_before = q
            q = q + qd * dt
            now += dt
            kind = check(q)
            tally.check_s += clock() - t_b
            tally.session_s += t_b - t_a
            if kind:
                describe(kind, q, step=k_total, q_before=q_before.tolist(), qd=qd.tolist(), stick=stick,
                         stick_age_s=seg.age, separation_held=info.separation_held, fault=info.fault)  # fmt: skip
            tally.steps += 1
            tally.separation_held += info.separation_held
            tally.moving += bool(np.any(qd != 0.0))
            tally.faulted += info.fault is not None
            tally.stale += info.stale
            k_total += 1
            if progress is not None and k_total % every == 0:
                progress(every)
    if progress is not None and k_total % every:
        progress(k_total % every)
    return tally, q


def fuzz(session, ref: CoalReference, starts: list[Start], steps: int, seed: int = 0, dt: float = DT,
         episode_steps: int = EPISODE_STEPS, progress: Callable[[int], None] | None = None) -> Tally:  # fmt: skip
    """`steps` steps in episodes of `episode_steps`, each from the next start state (round robin, furniture
    and person starts alternating, so a short run has both), the session's belief and fault reset between
    episodes; sticks from random_segments(seed)."""
    if not starts:
        raise ConfigError(f"bundle {session.manifest.folder}", "no clear start state near any scene body was found")
    groups = [[s for s in starts if s.group == g] for g in ("furniture", "person")]
    starts = [g[k] for k in range(max(map(len, groups))) for g in groups if k < len(g)]
    rng = np.random.default_rng(seed)
    m = session.manifest
    total = Tally()
    done, episode = 0, 0
    while done < steps:
        n = min(episode_steps, steps - done)
        start = starts[episode % len(starts)]
        session.reset()
        session.reset_fault()
        segments = random_segments(rng, n, m.latent_dim, m.watchdog_timeout_s)
        tally, _ = drive(session, ref, start.q, segments, dt, t0=episode * 1000.0, progress=progress)
        for v in tally.violations:
            v["start"] = f"{start.group} {start.body}, episode {episode}"
        total.add(tally)
        done += n
        episode += 1
    return total


# ----------------------------------------------------------------------------------------- the command
def _coal_version() -> str:
    try:
        return version("coal")
    except PackageNotFoundError:
        import coal  # late: optional (the test extra)

        return getattr(coal, "__version__", "?")


def _show_progress() -> bool:
    """A rich bar for a person at a terminal; CI (CI=true) and pipes stay quiet."""
    return sys.stderr.isatty() and os.environ.get("CI", "").lower() not in ("1", "true", "yes")


def run(cfg) -> dict:
    """`coreach bench fuzz`: cfg.bundle (a folder, NAME@ALIAS or NAME/VERSION; empty: a random bundle on
    cfg.scenario for cfg.robot, written to a temporary folder), cfg.steps, cfg.seed, cfg.episode_steps."""
    steps, episode_steps = int(cfg.steps), int(cfg.episode_steps)
    if steps < 1 or episode_steps < 1:
        raise ConfigError("option steps/episode_steps", f"expected positive integers, got {cfg.steps!r}, "
                                                        f"{cfg.episode_steps!r}")  # fmt: skip
    if not float(cfg.dt) > 0:
        raise ConfigError("option dt", f"expected a control period > 0 s, got {cfg.dt!r}")
    bundle = str(cfg.get("bundle") or "")
    with tempfile.TemporaryDirectory(prefix="coreach-fuzz-") as tmp:
        if bundle:
            folder = bundle_folder(bundle, uri=cfg.get("tracking", {}).get("uri"))
            label = str(folder.resolve())
        else:
            scene = load_scenario(str(cfg.scenario))
            box = (tuple(cfg.workspace_min), tuple(cfg.workspace_max))
            folder = random_bundle(Path(tmp) / "bundle", build_plugin(cfg.robot, "robot"), scene, True,
                                   int(cfg.seed), box)  # fmt: skip
            label = f"random cVAE on {scene.name} (temporary bundle; workspace box {[list(b) for b in box]})"
        session = Session.open(folder)
        ref = reference_for(session)
        t0 = time.perf_counter()
        starts = find_starts(session, ref, seed=int(cfg.seed))
        search_s = time.perf_counter() - t0
        log.info("fuzz: %d start states (%.1f s to find): %s", len(starts), search_s,
                 ", ".join(f"{s.body} {s.distance_m:.3f} m" for s in starts))
        bar = None
        if _show_progress():
            bar = Progress(TextColumn("fuzz"), BarColumn(), MofNCompleteColumn(), TimeRemainingColumn(),
                           transient=True)  # fmt: skip
            bar.start()
            task = bar.add_task("fuzz", total=steps)
        try:
            t0 = time.perf_counter()
            tally = fuzz(session, ref, starts, steps, int(cfg.seed), float(cfg.dt), episode_steps,
                         None if bar is None else (lambda n: bar.advance(task, n)))  # fmt: skip
            seconds = time.perf_counter() - t0
        finally:
            if bar is not None:
                bar.stop()
    out = {
        "bundle": label,
        "checked_by": f"coal {_coal_version()} via pinocchio {ref._pin.__version__}: the URDF's collision geometry",
        "steps": tally.steps,
        "seed": int(cfg.seed),
        "start_states": [f"{s.group} {s.body} ({s.distance_m:.3f} m)" for s in starts],
        "penetrations": tally.penetrations,
        "keep_out_entries": tally.keep_out_entries,
        "closest_furniture_m": tally.min_furniture_m,
        "closest_person_m": tally.min_person_m,
        "keep_out_m": ref.keep_out,
        "person_tolerance_m": PERSON_TOLERANCE_M,
        "separation_held_steps": tally.separation_held,
        "moving_steps": tally.moving,
        "faulted_steps": tally.faulted,
        "stale_steps": tally.stale,
        "steps_per_s": tally.steps / seconds if seconds > 0 else math.inf,
        "session_share": tally.session_s / seconds if seconds > 0 else math.nan,
        "coal_check_share": tally.check_s / seconds if seconds > 0 else math.nan,
        "seconds": seconds,
        "violations": tally.violations,
    }
    if tally.penetrations or tally.keep_out_entries:
        out["exit_code"] = 3  # a verdict: the filter let the arm into a body
    return out
