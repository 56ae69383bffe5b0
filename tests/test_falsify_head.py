"""The person's head position as a falsification parameter: per-episode body shifts in the vetting loop
(checked against the coal collision library), the zero shift reproducing the unshifted loop exactly, the
head shift surviving the counterexample suite file, and bad input refused in one line through the CLI."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import coal
import numpy as np
import pytest
import torch
import yaml
from conftest import cli_env

from coreach.errors import ConfigError
from coreach.falsify.counterexamples import suite_data, write_suite
from coreach.falsify.space import space_from_config

COREACH = str(Path(sys.executable).parent / "coreach")
SHIFTS = [[0.0, 0.0, 0.0], [0.05, -0.05, -0.05], [-0.03, 0.04, 0.02], [0.3, -0.35, -0.3]]


def run(args, cwd, timeout=300):
    return subprocess.run([COREACH, *args], cwd=cwd, capture_output=True, text=True, env=cli_env(), timeout=timeout)


@pytest.fixture(scope="module")
def setup():
    from coreach.config.check import compose_config
    from coreach.host.registry import build_plugin
    from coreach.safety import limits_from_config
    from coreach.vetting.stage import build_candidate

    cfg = compose_config("vet", [])
    robot, belief = build_plugin(cfg.robot, "robot"), build_plugin(cfg.belief, "belief")
    limits = limits_from_config(robot, cfg.safety)
    interface, _ = build_candidate("direct", None, "sqlite:///unused.db")
    return robot, belief, limits, interface


def test_link_spheres_to_the_shifted_head_match_coal(setup):
    """Every link sphere of the arm at a few poses against the head moved by each shift, one episode per shift
    in one batch: the filter's distance (World.shifted, measure) equals coal's sphere-sphere distance (coal
    3.0.3, coal.distance) within 1e-9 m, and the furniture's distances do not move."""
    from coreach.control.separation import measure
    from coreach.world.scene_arm import arm_world
    from coreach.world.scenario import load_scenario

    robot, _, limits, _ = setup
    scene = load_scenario("bedside_shelf")
    arm = arm_world(robot, scene, limits.tcp_speed_max)
    head = next(b for b in scene.person if b.name == "head")
    o = arm.world.body_names.index("head")
    rng = np.random.default_rng(7)
    home = robot.q_home.numpy()
    for _ in range(3):
        q = np.repeat((home + rng.uniform(-0.6, 0.6, home.shape))[None], len(SHIFTS), axis=0)  # [E, n]
        centres, jac = arm.spheres(q)
        shifted = arm.shifted({"head": np.array(SHIFTS)})
        geo = measure(shifted.world, torch.as_tensor(centres), torch.as_tensor(jac))
        plain = measure(arm.world, torch.as_tensor(centres))
        for e, s in enumerate(SHIFTS):
            pose = coal.Transform3s(np.eye(3), np.asarray(head.xyz) + np.asarray(s))
            for k, (c, r) in enumerate(zip(centres[e], arm.world.radii)):
                ref = coal.distance(coal.Sphere(r), coal.Transform3s(np.eye(3), c), coal.Sphere(head.size[0]), pose,
                                    coal.DistanceRequest(), coal.DistanceResult())  # fmt: skip
                assert abs(float(geo.body_d[e, k, o]) - ref) <= 1e-9, (s, k, float(geo.body_d[e, k, o]), ref)
        furniture = ~torch.as_tensor(arm.world.is_person)
        assert torch.equal(geo.body_d[..., furniture], plain.body_d[..., furniture])


def _suite(tmp_path: Path, cases: list[dict], name: str, horizon: float = 4.0):
    from coreach.vetting.suite import load_suite

    data = suite_data(load_suite("goal-switch"), name, cases, 1, {"by": "test"})
    data["horizon_s"] = horizon
    return load_suite(write_suite(tmp_path / f"{name}.yaml", data))


def _figures(record, e: int) -> dict:
    x = record.extras
    return {"q": x["q"][e], "qd": x["qd"][e], "sep_person": x["sep_person"][e], "sep_furniture": x["sep_furniture"][e],
            "limits": x["limits"][e], "ee_path": record.ee_path[e], "belief": record.belief[e]}  # fmt: skip


def test_a_zero_head_shift_reproduces_the_unshifted_loop_exactly(setup, tmp_path):
    """Two cases in one batch: the first with no shift (or a zero one), the second with its head moved toward
    the arm. The first case's figures are identical, element for element, to the same batch without any
    shift; the second's distance to the person at the start is coal's distance from the arm's spheres to the
    moved head (it is then the nearest person body), closer than without the shift."""
    from coreach.vetting.loop import rollout
    from coreach.world.scene_arm import arm_world
    from coreach.world.scenario import load_scenario

    robot, belief, limits, interface = setup
    a = {"goal": "lamp_switch", "operator": {"beta": 300.0}}
    b = {"goal": "book", "switch_to": "bottle", "switch_at": 0.5}
    toward = [0.2, -0.2, -0.2]  # the head sits behind, left of and above the arm's base: this brings it closer
    runs = {}
    for name, cases in {"plain": [a, b], "zero": [dict(a, body_shift={"head": [0.0, 0.0, 0.0]}), b],
                        "moved": [a, dict(b, body_shift={"head": toward})]}.items():  # fmt: skip
        suite = _suite(tmp_path, cases, name)
        runs[name] = rollout(robot, interface, suite.build_operator(), suite, belief, limits, suite.generator())
    for name in ("zero", "moved"):
        ref, got = _figures(runs["plain"], 0), _figures(runs[name], 0)
        for key in ref:
            assert torch.equal(ref[key], got[key]), (name, key)
    assert torch.equal(runs["plain"].success, runs["zero"].success)
    assert torch.equal(runs["plain"].extras["q"][1, 0], runs["moved"].extras["q"][1, 0])  # the same start pose
    # reference: coal 3.0.3 sphere-sphere distance, every link sphere at the start pose to the moved head
    arm = arm_world(robot, load_scenario("bedside_shelf"), limits.tcp_speed_max)
    head = next(p for p in arm.world.person if p.name == "head")
    centres, _ = arm.spheres(runs["moved"].extras["q"][1, 0].numpy()[None], jacobian=False)
    pose = coal.Transform3s(np.eye(3), np.asarray(head.xyz) + np.asarray(toward))
    ref = min(coal.distance(coal.Sphere(r), coal.Transform3s(np.eye(3), c), coal.Sphere(head.size[0]), pose,
                            coal.DistanceRequest(), coal.DistanceResult()) for c, r in zip(centres[0], arm.world.radii))
    moved, plain = float(runs["moved"].extras["sep_person"][1, 0]), float(runs["plain"].extras["sep_person"][1, 0])
    assert abs(moved - ref) <= 1e-6 and moved < plain - 0.02, (moved, ref, plain)  # 1e-6: measured in float32


def test_a_head_shift_round_trips_through_the_counterexample_suite(tmp_path):
    """A case drawn from a space with head_shift_m carries the head's shift in body_shift, inside the bounds;
    written as a counterexample suite and read back, the plan moves exactly that body by exactly that shift."""
    goals = ["lamp_switch", "bottle", "book", "drawer_knob"]
    sp = space_from_config({"name": "t", "bounds": {"head_shift_m": [-0.05, 0.05]}}, goals, "falsify/t.yaml",
                           ["shelf_back", "head", "torso"])  # fmt: skip
    gen = torch.Generator().manual_seed(1)
    draw = lambda name, lo, hi, kind: lo + float(torch.rand((), generator=gen)) * (hi - lo)  # noqa: E731
    case = sp.case(lambda name, ch: ch[0], draw, 7)
    shift = case["body_shift"]["head"]
    assert set(case["body_shift"]) == {"head"} and all(-0.05 <= x <= 0.05 for x in shift) and len(shift) == 3
    suite = _suite(tmp_path, [dict(case, robustness=-0.2), {"goal": "bottle"}], "cx")
    text = (tmp_path / "cx.yaml").read_text()
    assert yaml.safe_load(text)["cases"][0]["body_shift"] == {"head": shift}
    plan = suite.episodes_plan(suite.generator(), _robot())
    assert list(plan.body_shift) == ["head"]
    assert plan.body_shift["head"].tolist() == [shift, [0.0, 0.0, 0.0]]


def _robot():
    from coreach.config.check import compose_config
    from coreach.host.registry import build_plugin

    return build_plugin(compose_config("vet", []).robot, "robot")


@pytest.mark.parametrize("shift, words", [({"nose": [0.0, 0.0, 0.0]}, "body_shift.nose"),
                                          ({"head": [0.0, 0.1]}, "expected [dx, dy, dz]")])  # fmt: skip
def test_a_bad_body_shift_in_a_suite_file_is_one_line_and_exit_2(tmp_path, shift, words):
    from coreach.vetting.suite import load_suite

    data = suite_data(load_suite("goal-switch"), "cx", [{"goal": "bottle", "body_shift": shift}], 1, {})
    path = write_suite(tmp_path / "cx.yaml", data)
    with pytest.raises(ConfigError) as exc:
        load_suite(path)
    assert words in f"{exc.value.where}: {exc.value.problem}"
    res = run(["vet", f"suite={path}", "candidates=[direct]", "log=false"], tmp_path)
    assert res.returncode == 2 and len(res.stderr.strip().splitlines()) == 1, res.stderr
    assert words in res.stderr and "Traceback" not in res.stderr


@pytest.mark.parametrize("override, words", [("falsify.bounds.head_shift_m=[0.1,-0.1]", "inverted bounds"),
                                             ("falsify.bounds.head_shift_m=[-0.3,0.3]", "leaves the parameter's range"),
                                             ("falsify.head_body=nose", "unknown body 'nose'")])  # fmt: skip
def test_a_bad_head_shift_space_is_one_line_and_exit_2(tmp_path, override, words):
    """Refused while the space is checked, before any decoder is loaded (the decoder folder does not exist)."""
    res = run(["falsify", f"decoder={tmp_path / 'no-decoder'}", "falsify=bedside_shelf", override, "log=false"],
              tmp_path)  # fmt: skip
    assert res.returncode == 2 and len(res.stderr.strip().splitlines()) == 1, res.stderr
    assert words in res.stderr and "Traceback" not in res.stderr


def test_the_report_row_and_the_model_card_print_the_head_shift():
    from coreach.falsify.search import Evaluation
    from coreach.falsify.stage import _failure_row
    from coreach.runtime.model_card import model_card

    case = {"goal": "bottle", "switch_to": "book", "switch_at": 0.5, "layout_shift": {}, "start_offset": [],
            "body_shift": {"head": [0.03, -0.01, 0.0]}, "operator": {}}  # fmt: skip
    row = _failure_row("tpe", Evaluation(0, case, -0.2, {"cause": "oscillating"}))
    assert row[-1] == "head [+0.030, -0.010, +0.000]"
    found = {"space": {"name": "s", "suite": "goal-switch", "bounds": {"head_shift_m": [-0.05, 0.05]}}, "budget": 10,
             "optimizer": "tpe (optuna)", "seed": 0, "failures": 1,
             "worst": {"robustness": -0.2, "case": case, "cause": "oscillating"}}  # fmt: skip
    assert "switching to book at 0.50 of the horizon, head moved by [+0.030, -0.010, +0.000] m (oscillating)" in \
        model_card({"name": "m", "falsification": found}, {}, {})


def test_the_failure_plot_outlines_the_head_where_the_case_moved_it():
    """Every point of the moved head's outline, from above and from the side, lies on the moved head sphere's
    silhouette: coal's distance (coal 3.0.3) from that point, at the moved centre's depth, to the moved sphere
    is 0 within 1e-9 m. A case without a shift draws no extra outline."""
    from coreach.falsify.report import moved_outlines
    from coreach.world.scenario import load_scenario

    scene = load_scenario("bedside_shelf")
    bodies = {b.name: b for b in (*scene.obstacles, *scene.person)}
    head = bodies["head"]
    shift = [0.04, -0.03, 0.05]
    centre = np.add(head.xyz, shift)
    sphere = coal.Sphere(head.size[0])
    for plane in [(0, 1), (0, 2)]:
        (hull,) = moved_outlines({"body_shift": {"head": shift}}, bodies, plane)
        for p2 in hull:
            p = centre.copy()
            p[list(plane)] = p2
            req, res = coal.DistanceRequest(), coal.DistanceResult()
            d = coal.distance(coal.Sphere(1e-12), coal.Transform3s(np.eye(3), p), sphere,
                              coal.Transform3s(np.eye(3), centre), req, res)
            assert abs(d) < 1e-9, (plane, p2, d)
        assert np.allclose(hull[:-1].mean(axis=0), centre[list(plane)], atol=1e-9)  # a regular polygon: mean = centre
        assert moved_outlines({"body_shift": {}}, bodies, plane) == []
