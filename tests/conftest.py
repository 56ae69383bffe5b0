"""Shared fixtures: small training configs that run in seconds, each in its own working folder."""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest


@pytest.fixture(autouse=True)
def _store_only_where_asked(request):
    """COREACH_TRACKING_URI names the store every command uses first; .ci/run exports it (the lab server) for
    tests/lab. Elsewhere a test names its own store, so the variable is cleared there. Both variables are put
    back after every test: one test's store must not become the next one's."""
    saved = {v: os.environ.get(v) for v in ("COREACH_TRACKING_URI", "MLFLOW_TRACKING_URI")}
    if "lab" not in Path(str(request.node.fspath)).parts:
        os.environ.pop("COREACH_TRACKING_URI", None)
    yield
    for var, value in saved.items():
        if value is None:
            os.environ.pop(var, None)
        else:
            os.environ[var] = value


# Small enough for seconds on 2 cores, large enough that every goal appears in both splits.
FAST = ["trainer.max_epochs=2", "data.batch_size=128"]
SMALL = ["dataset.episodes=40", *FAST]


@pytest.fixture
def workdir(tmp_path, monkeypatch):
    """A fresh working folder: MLflow store, caches and run folders land here."""
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("MLFLOW_TRACKING_URI", raising=False)
    monkeypatch.delenv("COREACH_TRACKING_URI", raising=False)
    return tmp_path


@pytest.fixture
def small_cfg(workdir):
    from coreach.config.check import compose_config

    def make(*overrides: str):
        return compose_config("train", [*SMALL, *overrides])

    return make


def cli_env(**extra: str) -> dict:
    env = {k: v for k, v in os.environ.items() if k not in ("MLFLOW_TRACKING_URI", "COREACH_TRACKING_URI")}
    env.update(CI="true", **extra)
    if os.environ.get("PYTEST_XDIST_WORKER"):
        env.setdefault("OMP_NUM_THREADS", "1")
    return env


# Two xdist workers on two cores: one torch thread each, or they fight over the cores.
if os.environ.get("PYTEST_XDIST_WORKER"):
    import torch

    torch.set_num_threads(1)


def third_party_robots() -> Path:
    """example-robot-data's robots/ folder (a test extra, read where it is installed, never copied); skips
    the test when the package is missing, and fails it under CI, where it must be installed."""
    import importlib.metadata

    try:
        dist = importlib.metadata.distribution("example-robot-data")
    except importlib.metadata.PackageNotFoundError:
        if os.environ.get("CI"):
            pytest.fail("example-robot-data is not installed (pip install -e '.[test]')")
        pytest.skip("example-robot-data is not installed")
    return Path(dist.locate_file("cmeel.prefix/share/example-robot-data/robots"))


# The browser tests' Chromium: Debian's package, driven headless by Playwright's Python API (one launch rule for
# every page under test). In CI a missing browser or Playwright fails the test; elsewhere it is skipped.
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.fixture(scope="module")
def browser():
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        pytest.fail("playwright is not installed") if os.environ.get("CI") else pytest.skip("playwright missing")
    if CHROMIUM is None:
        # .ci/run installs Debian's chromium; in CI a missing browser is a failure, never a skip
        pytest.fail("chromium is not installed") if os.environ.get("CI") else pytest.skip("chromium missing")
    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, headless=True, args=["--no-sandbox"])
        yield b
        b.close()
