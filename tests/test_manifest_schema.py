"""The manifest schema: each declared field written once at its JSON place, read back equal, refused by name."""

from __future__ import annotations

import copy
import json
import math
from dataclasses import fields, replace
from pathlib import Path

import numpy as np
import pytest

from coreach.runtime.manifest import MANIFEST, BundleError, Manifest, onnx_interface

FOLDER = Path("/bundles/b1")
# a scene with one board and a person's head, and an arm of two spheres (coreach.world.scene_bodies.world_json)
WORLD = {"clearance": 0.02,
         "obstacles": [{"name": "board", "shape": "box", "size": [0.2, 0.6, 0.02], "xyz": [0.7, 0.0, 0.1],
                        "rpy_deg": [0.0, 0.0, 0.0]}],
         "person": {"bodies": [{"name": "head", "shape": "sphere", "size": [0.1], "xyz": [-0.3, 0.5, 0.6],
                                "rpy_deg": [0.0, 0.0, 0.0]}],
                    "speed": 0.5, "reaction_time": 0.1, "stopping_time": 0.2, "intrusion": 0.0,
                    "person_uncertainty": 0.02, "robot_uncertainty": 0.01},
         "links": {"links": ["b", "c"], "centres": [[0.0, 0.0, 0.1], [0.0, 0.0, 0.05]], "radii": [0.05, 0.04],
                   "self_pairs": []}}  # fmt: skip


def sample_manifest() -> Manifest:
    """A small hand-built manifest (3 joints, 2 goals, 2-d stick, 10 context columns), one joint unlimited."""
    return Manifest(
        folder=FOLDER, schema_version="2", created="2026-01-02T03:04:05+00:00",
        latent_dim=2, context_dim=10, action_dim=3, n_goals=2, context_blocks=("state", "goal"),
        onnx=onnx_interface(2, 10, 3), joint_names=("a", "b", "c"), goal_names=("cup", "door"),
        goal_pos=np.array([[0.5, 0.1, 0.3], [0.4, -0.2, 0.5]]),
        goal_quat=np.array([[1.0, 0.0, 0.0, 0.0], [0.7071068, 0.0, 0.7071068, 0.0]]),
        goal_fine=np.array([[0.03, 0.0, 0.0], [0.0, 0.0, 0.05]]),
        normalisation={"context_cols": np.array([0.0, 3.0, 4.0, 9.0]), "ctx_mean": np.array([0.1, 0.2, 0.3, 0.4]),
                       "ctx_std": np.array([1.0, 2.0, 0.5, 1.5]), "act_mean": np.zeros(3),
                       "act_std": np.array([0.2, 0.3, 0.4]), "stick_scale": np.array([0.9, 1.1])},
        stick_low=-1.0, stick_high=1.0, deadband=0.08,
        belief={"model": "boltzmann", "beta": 40.0, "floor": 0.0, "min_motion": 1e-3},
        robot_name="arm3", urdf="robot.urdf", tool_link="tool",
        q_lower=np.array([-math.inf, -2.0, -1.5]), q_upper=np.array([math.inf, 2.0, 1.5]),
        qd_max=np.array([1.0, 1.2, 1.5]), q_home=np.array([0.0, 0.3, -0.2]),
        tcp_speed_max=0.25, workspace_min=np.array([-0.3, -0.8, -0.1]), workspace_max=np.array([1.0, 0.8, 1.2]),
        watchdog_timeout_s=0.2, lookahead_s=0.1, speed_fraction=0.5, world=copy.deepcopy(WORLD),
        tolerances={"onnx_parity_max_abs_diff": 1e-5}, gate={"passed": True, "success_rate_low": 0.8},
        dataset_fingerprint="sha256:0123abcd", training_run_id="run-1", git_commit="0" * 40,
        onnx_parity={"n": 100, "max_abs_diff": 2e-7}, files={"decoder.onnx": "ab" * 32},
    )


def _through_file(data: dict) -> dict:
    """What a reader gets back from manifest.json; the json module as the reference for what JSON can hold."""
    return json.loads(json.dumps(data, indent=2, allow_nan=False))


def _declared_paths() -> list[str]:
    return [f.metadata["json"] for f in fields(Manifest) if "json" in f.metadata]


def _leaf_paths(node: dict, declared: set[str], prefix: str = "") -> list[str]:
    """Dotted paths in `node` down to the first declared path on each branch (undeclared leaves kept too)."""
    out = []
    for key, value in node.items():
        path = f"{prefix}{key}"
        if path not in declared and isinstance(value, dict):
            out += _leaf_paths(value, declared, path + ".")
        else:
            out.append(path)
    return out


def test_round_trip_gives_an_equal_manifest():
    m = sample_manifest()
    again = Manifest.from_json(FOLDER, _through_file(m.to_json()))
    assert again == m
    assert np.isneginf(again.q_lower[0]) and np.isposinf(again.q_upper[0])  # unlimited joint survives as +-inf
    assert again.raw == _through_file(m.to_json())
    assert Manifest.from_json(FOLDER, again.to_json()) == again


def test_equality_sees_every_kind_of_field():
    m = sample_manifest()
    changed = [replace(m, q_home=m.q_home + 1e-9), replace(m, deadband=0.09), replace(m, joint_names=("a", "b", "x")),
               replace(m, normalisation={**m.normalisation, "ctx_std": m.normalisation["ctx_std"] * 2}),
               replace(m, gate={"passed": False}), replace(m, folder=Path("/elsewhere"))]
    assert all(c != m for c in changed)


def test_every_declared_field_appears_in_the_json_exactly_once():
    declared = _declared_paths()
    assert len(set(declared)) == len(declared)
    assert not [a for a in declared for b in declared if b.startswith(a + ".")]  # no field inside another
    leaves = _leaf_paths(sample_manifest().to_json(), set(declared))
    assert sorted(leaves) == sorted(declared)


def test_infinite_limits_are_written_as_null():
    data = sample_manifest().to_json()
    assert data["robot"]["q_lower"] == [None, -2.0, -1.5] and data["robot"]["q_upper"] == [None, 2.0, 1.5]
    assert data["normalisation"]["context_cols"] == [0.0, 3.0, 4.0, 9.0]
    assert data["decoder"]["onnx"]["inputs"] == {"stick": ["batch", 2], "context": ["batch", 10]}


def _set(data: dict, dotted: str, value) -> None:
    *parents, key = dotted.split(".")
    for part in parents:
        data = data[part]
    if value is ...:
        del data[key]
    else:
        data[key] = value


@pytest.mark.parametrize("path, value, named", [
    ("decoder.latent_dim", 0, "decoder.latent_dim"),
    ("decoder.n_goals", True, "decoder.n_goals"),
    ("joint_names", ["a", "b"], "joint_names"),
    ("goal_names", ["cup", 3], "goal_names"),
    ("nominal_layout.goal_quat", [[1.0, 0.0, 0.0]] * 2, "nominal_layout.goal_quat"),
    ("normalisation.ctx_std", [1.0, 2.0, 3.0], "normalisation.ctx_std"),  # 3 entries for 4 context columns
    ("normalisation.context_cols", [0.0, 3.0, 4.0, 10.0], "normalisation.context_cols"),  # C = 10
    ("normalisation.act_mean", ..., "normalisation.act_mean' is missing"),
    ("stick.box_high", 2.0, "stick.box_low/box_high"),
    ("stick.deadband", 0.6, "stick.deadband"),
    ("robot.q_lower", [None, 2.5, -1.5], "robot.q_lower"),  # above its upper limit
    ("robot.qd_max", [1.0, None, 1.5], "robot.qd_max"),  # only joint limits may be unlimited
    ("robot.qd_max", [1.0, 0.0, 1.5], "robot.qd_max"),
    ("robot.urdf", "../arm.urdf", "robot.urdf"),
    ("safety.workspace_max", [1.0, -0.9, 1.2], "safety.workspace_min"),
    ("safety.lookahead_s", ..., "safety.lookahead_s' is missing"),
    ("safety.speed_fraction", 1.5, "safety.speed_fraction"),
    ("decoder.onnx", onnx_interface(2, 11, 3), "decoder.onnx"),
    ("onnx_parity", {"n": 0, "max_abs_diff": 0.0}, "onnx_parity.n"),
    ("belief", {"model": "boltzmann", "beta": "40"}, "belief.beta"),
    ("gate", [], "gate"),
    # the scene's bodies are checked as a scene file is (coreach.world.scene_bodies): size, shape, sphere indices
    ("safety.world", {**WORLD, "obstacles": [{**WORLD["obstacles"][0], "size": [0.2, -0.6, 0.02]}]},
     r"safety.world, option obstacles\[0\]\.size"),
    ("safety.world", {**WORLD, "obstacles": [{**WORLD["obstacles"][0], "shape": "cone"}]},
     r"safety.world, option obstacles\[0\]\.shape"),
    ("safety.world", {**WORLD, "links": {**WORLD["links"], "self_pairs": [[0, 5]]}}, "safety.world.links"),
])  # fmt: skip
def test_a_malformed_field_is_refused_by_name(path, value, named):
    data = copy.deepcopy(sample_manifest().to_json())
    _set(data, path, value)
    with pytest.raises(BundleError, match=f"field '{named}") as err:
        Manifest.from_json(FOLDER, data)
    assert err.value.where == str(FOLDER / MANIFEST) and "\n" not in str(err.value)
