"""The runtime-only distribution (pipeline/coreach-robot/pyproject.toml) ships exactly the modules the robot side
imports, and its version and dependencies follow the full package. Building and running it in a fresh venv is
tests/lab/test_robot_fetch_server.py."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tomllib
from pathlib import Path

from coreach.runtime.belief_manifest import BELIEF_MODELS

ROOT = Path(__file__).resolve().parents[1]
DIST = ROOT / "pipeline" / "coreach-robot"
SOURCES = [ROOT / d for d in ("pipeline", "plugins", "conf")]
ROBOT_ENTRY = ["coreach.runtime.session", "coreach.runtime.fetch", "coreach.runtime.robot_cli",
               "coreach.runtime.latency", "coreach.runtime.bundle"]  # fmt: skip


def _dist() -> dict:
    return tomllib.loads((DIST / "pyproject.toml").read_text())


def _imported_sources() -> tuple[set[str], set[str]]:
    """(repository files, top-level third-party packages) a fresh interpreter loads for the robot side,
    the allowed belief models included."""
    belief = [cls.__module__ for cls in BELIEF_MODELS.values()]
    code = (f"import importlib, json, sys\n"
            f"for m in {ROBOT_ENTRY + belief!r}: importlib.import_module(m)\n"
            "print(json.dumps([[k, getattr(v, '__file__', None)] for k, v in list(sys.modules.items())]))")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(map(str, SOURCES))}
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    ours, third = set(), set()
    for name, file in json.loads(out.stdout):
        if not file:
            continue
        path = Path(file).resolve()
        if any(path.is_relative_to(s) for s in SOURCES):
            ours.add(path.relative_to(ROOT).as_posix())
        elif "site-packages" in path.parts:
            third.add(name.split(".")[0])
    return ours, third


def test_the_distribution_ships_exactly_what_the_robot_side_imports():
    included = _dist()["tool"]["hatch"]["build"]["targets"]["wheel"]["force-include"]
    shipped = {(DIST / src).resolve().relative_to(ROOT).as_posix(): dest for src, dest in included.items()}
    ours, _ = _imported_sources()
    assert sorted(set(shipped) - ours) == []  # nothing the robot does not need
    assert sorted(ours - set(shipped)) == []  # nothing missing (an ImportError on the robot)
    for src, dest in shipped.items():  # each module lands at its import path
        assert src.split("/", 1)[1] == dest, (src, dest)


def test_robot_side_needs_only_the_declared_dependencies():
    _, third = _imported_sources()
    declared = {d.split(">")[0].split("=")[0].replace("-", "_") for d in _dist()["project"]["dependencies"]}
    assert declared == {"numpy", "onnxruntime", "array_api_compat"}
    # onnxruntime brings its own few (no torch, no mlflow); anything else here would be missing on the robot
    assert not third & {"torch", "lightning", "mlflow", "hydra", "omegaconf", "pandas", "pyarrow", "safetensors"}
    assert {"numpy", "onnxruntime", "array_api_compat"} <= third


def test_version_and_command_follow_the_full_package():
    dist, full = _dist(), tomllib.loads((ROOT / "pyproject.toml").read_text())
    assert (DIST / dist["tool"]["hatch"]["version"]["path"]).resolve() == ROOT / "pipeline" / "coreach" / "__init__.py"
    assert dist["project"]["scripts"] == {"coreach-robot": "coreach.runtime.robot_cli:main"}
    assert full["project"]["scripts"]["coreach-robot"] == "coreach.runtime.robot_cli:main"
    assert dist["build-system"]["build-backend"] == "hatchling.build"
