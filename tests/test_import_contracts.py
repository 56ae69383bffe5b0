"""The stage order and the host/plugin boundary as contracts (import-linter, configured in pyproject.toml),
plus a live check that the runtime really runs without torch."""

from __future__ import annotations

import os
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
SOURCES = os.pathsep.join(str(ROOT / d) for d in ("pipeline", "plugins", "conf"))
CONTRACTS = [(c["id"], c["name"]) for c in tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["importlinter"]["contracts"]]


def _env() -> dict:
    return {**os.environ, "PYTHONPATH": SOURCES + os.pathsep + os.environ.get("PYTHONPATH", "")}


@pytest.fixture(scope="module")
def lint_report() -> str:
    exe = Path(sys.executable).with_name("lint-imports")
    out = subprocess.run([str(exe), str(ROOT / "pyproject.toml"), "--no-cache"], cwd=ROOT, env=_env(),
                         capture_output=True, text=True, timeout=300)  # fmt: skip
    return out.stdout + out.stderr


@pytest.mark.parametrize("name", [n for _, n in CONTRACTS], ids=[i for i, _ in CONTRACTS])
def test_contract_is_kept(lint_report, name):
    # import-linter prints "<contract name> KEPT" or "... BROKEN" (names may wrap: compare without whitespace)
    flat = "".join(lint_report.split())
    assert "".join(name.split()) + "KEPT" in flat, lint_report[-4000:]


def test_the_contracts_are_configured():
    kinds = {c["type"] for c in tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["importlinter"]["contracts"]}
    assert len(CONTRACTS) == 6 and kinds == {"layers", "forbidden", "independence"}


def test_the_plugin_api_contract_forbids_every_other_host_module():
    """A host module added later must not slip past the plugin API contract: every top-level module and package
    of coreach (and every module of coreach.host but api) is on its forbidden list."""
    contracts = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["importlinter"]["contracts"]
    forbidden = set(next(c for c in contracts if c["id"] == "plugin-api")["forbidden_modules"])
    package = ROOT / "pipeline" / "coreach"
    top = {f"coreach.{p.stem}" for p in package.iterdir()
           if (p.suffix == ".py" and p.stem != "__init__") or (p / "__init__.py").is_file()} - {"coreach.host"}
    host = {f"coreach.host.{p.stem}" for p in (package / "host").glob("*.py")} - {"coreach.host.__init__",
                                                                                   "coreach.host.api"}
    assert top | host == forbidden


def test_runtime_session_imports_without_torch_or_plugins():
    """Import the robot-side modules in a fresh interpreter and list what came with them."""
    code = ("import sys, coreach.runtime.session, coreach.runtime.bundle; "
            "bad = sorted(m for m in sys.modules if m.split('.')[0] in "
            "('torch', 'lightning', 'mlflow', 'hydra', 'coreach_plugins')); print(bad)")  # fmt: skip
    out = subprocess.run([sys.executable, "-c", code], env=_env(), capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"
