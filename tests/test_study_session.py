"""`coreach study session`: bad input through the real command (one line, exit 2, nothing written), and the
helpers the browser test shares (a tiny plan on tests/study_fixtures.py's untrained bundle, the server
started as the real command in a subprocess)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from coreach import cli
from study_fixtures import study_bundle

ROOT = Path(__file__).resolve().parents[1]
STUDY = "bedside_shelf"
BUNDLE_CONDITION = "candidate"  # the bundle condition's name: the page must never show it


def make_plan(root: Path, bundle: Path, *overrides: str, pilot: bool = True, participants: int = 2) -> dict:
    """A tiny plan made by `coreach study plan`: the bundle and direct control, the lamp task, one practice and
    one measured trial per block, trials ending at 3 s."""
    args = ["--json", "study", "plan", STUDY, "--root", str(root),
            f"study.conditions=[{{kind:bundle,ref:'{bundle}',name:{BUNDLE_CONDITION}}},{{kind:direct}}]",
            "study.tasks=[{name:lamp,goal:lamp_switch}]", "study.trials=1", "study.practice_trials=1",
            f"study.participants={participants}", f"study.pilot={str(pilot).lower()}",
            "study.trial_time_limit_s=3", *overrides]  # fmt: skip
    assert cli.main(args) == 0
    return json.loads((root / STUDY / "v1" / "plan.json").read_text())["plan"]


def command(*args: str) -> list[str]:
    return [sys.executable, "-m", "coreach.cli", *args]


def env() -> dict:
    out = dict(os.environ, CI=os.environ.get("CI", ""))
    # the subprocess resolves coreach from the same source folders as this test run
    out["PYTHONPATH"] = os.pathsep.join([str(ROOT / "pipeline"), str(ROOT / "plugins"), str(ROOT / "conf"),
                                         out.get("PYTHONPATH", "")])  # fmt: skip
    return out


def start_session(root: Path, code: str) -> tuple[subprocess.Popen, dict]:
    """The real `coreach --json study session` on any free port; its one JSON line says where it listens."""
    proc = subprocess.Popen(command("--json", "study", "session", STUDY, code, "--root", str(root), "--port", "0"),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env())  # fmt: skip
    line = proc.stdout.readline()
    if not line:
        proc.kill()
        pytest.fail(f"study session did not start: {proc.stderr.read()}")
    return proc, json.loads(line)


def run_once(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run(command(*args), capture_output=True, text=True, env=env(), timeout=120)


def one_line_error(proc: subprocess.CompletedProcess) -> str:
    """The CLI's contract for bad input: exit 2, one line on stderr, no traceback, nothing on stdout."""
    lines = proc.stderr.strip().splitlines()
    assert proc.returncode == 2, proc.stderr
    assert len(lines) == 1 and lines[0].startswith("coreach: error:"), proc.stderr
    assert "Traceback" not in proc.stderr and proc.stdout == ""
    return lines[0]


@pytest.fixture(scope="module")
def bundle(tmp_path_factory) -> Path:
    return study_bundle(tmp_path_factory.mktemp("bundle") / "bundle")


def test_an_unknown_code_is_one_line_and_writes_nothing(bundle, tmp_path):
    make_plan(tmp_path, bundle)
    line = one_line_error(run_once("study", "session", STUDY, "P99-NOPE", "--root", str(tmp_path), "--port", "0"))
    assert "P99-NOPE" in line and "not a code" in line
    assert not (tmp_path / STUDY / "v1" / "sessions").exists()


def test_a_loosened_bundle_is_refused_outside_a_pilot(bundle, tmp_path):
    """Refused when the plan is made (the bundle folder is verified then), before any session exists; a
    registry reference is checked the same way when a session resolves it (coreach.study.rig)."""
    line = one_line_error(run_once(
        "study", "plan", STUDY, "--root", str(tmp_path),
        f"study.conditions=[{{kind:bundle,ref:'{bundle}',name:{BUNDLE_CONDITION}}},{{kind:direct}}]",
        "study.tasks=[{name:lamp,goal:lamp_switch}]", "study.pilot=false"))  # fmt: skip
    assert "looser than shipped" in line and "pilot" in line
    assert not (tmp_path / STUDY).exists()


def test_a_second_server_for_the_same_participant_is_refused(bundle, tmp_path):
    plan = make_plan(tmp_path, bundle)
    code = plan["participants"][0]["code"]
    first, info = start_session(tmp_path, code)
    try:
        assert info["participant"] == code and info["version"] == 1 and info["cautions"]
        line = one_line_error(run_once("study", "session", STUDY, code, "--root", str(tmp_path), "--port", "0"))
        assert "already running" in line and str(first.pid) in line
        # the other participant's session is not blocked by it
        other = plan["participants"][1]["code"]
        second, _ = start_session(tmp_path, other)
        second.terminate()
        assert second.wait(timeout=20) == 0
    finally:
        first.terminate()
        assert first.wait(timeout=20) == 0
    assert not (tmp_path / STUDY / "v1" / "sessions" / code / ".lock").exists()  # released on SIGTERM


def test_a_bad_port_is_one_line(bundle, tmp_path):
    make_plan(tmp_path, bundle)
    line = one_line_error(run_once("study", "session", STUDY, "P01-X", "--root", str(tmp_path), "--port", "70000"))
    assert "--port" in line and "0..65535" in line


def test_the_study_page_carries_the_cautions_and_the_shared_drawing():
    """One copy of the cautions (coreach.runtime.cautions, with the consent and study lines) and one drawing
    code (the test-drive page's draw.js), both filled in when the page is served."""
    from coreach.runtime.cautions import CAUTIONS, RECORDING_CAUTION, STUDY_CAUTION
    from coreach.study.server import study_page

    page = " ".join(study_page().decode().split())
    assert "<!--CAUTIONS-->" not in page and "/*SHARED*/" not in page
    for caution in (*CAUTIONS, RECORDING_CAUTION, STUDY_CAUTION):
        assert " ".join(caution.split()).replace("'", "&#x27;") in page, caution
    assert "function drawScene()" in page and "SIMULATION ONLY" in page
