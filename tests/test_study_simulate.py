"""Study sessions without a browser: simulated participants through the session code, resume after a kill,
withdraw, export, and the baselines as Sessions (checked against scipy)."""

from __future__ import annotations

import csv
import json
import os
import signal
import stat
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg

from coreach.errors import ConfigError, DataError
from coreach.runtime.session import Session
from coreach.study.baselines import BaselineSession, baseline_interface
from coreach.study.export import export_study
from coreach.study.plan import PLAN_FILE, build_plan, compose_study, read_plan
from coreach.study.rig import resolve_bundles
from coreach.study.session import StudySession, steps_of
from coreach.study.simulate import SIMULATION, simulate_study
from study_fixtures import study_bundle, tiny_overrides, tiny_plan

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def bundle(tmp_path_factory) -> Path:
    return study_bundle(tmp_path_factory.mktemp("study") / "bundle")


def _rows(path: Path) -> list[dict]:
    with open(path, newline="") as fh:
        return list(csv.DictReader(fh))


def _coreach(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(str(REPO / p) for p in ("pipeline", "plugins", "conf"))}
    return subprocess.run([sys.executable, "-m", "coreach.cli", *args], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=300)  # fmt: skip


def test_direct_condition_is_damped_least_squares_on_the_bundle_arm(bundle):
    """The direct baseline inside a Session commands, before the filters, the damped least-squares joint
    velocity of the mode's tool twist: the minimiser of |J qd - v|^2 + lambda^2 |qd|^2, which is the ordinary
    least-squares solution of the stacked system [J; lambda I] qd = [v; 0] (Wampler 1986), solved here by
    scipy.linalg.lstsq."""
    base = Session.open(bundle)
    direct = BaselineSession(base, baseline_interface("direct"))
    direct.start(0.02)
    q = base.manifest.q_home.astype(float)
    J = base.chain.jacobian(q)  # the runtime chain's Jacobian (checked against pinocchio in test_robot_kinematics)
    for mode, rows in enumerate(((0, 1), (2, 5), (3, 4))):  # direct control's axis pairs (x,y), (z,yaw), (roll,pitch)
        direct.mode = mode
        direct.step([0.8, -0.5], q, 1.0, 1.0)
        s = direct.last.stick  # the stick after the box and deadband, as the interface got it
        v = np.zeros(6)
        scale = [0.15 if r < 3 else 0.6 for r in rows]  # the shipped direct.yaml: speed 0.15 m/s, 0.6 rad/s
        v[rows[0]], v[rows[1]] = scale[0] * s[0], scale[1] * s[1]
        lam = 0.05  # direct.yaml damping
        ref = scipy.linalg.lstsq(np.vstack([J, lam * np.eye(7)]), np.concatenate([v, np.zeros(7)]))[0]
        np.testing.assert_allclose(direct.last.qd_decoder, ref, atol=1e-10)
    direct.mode = 0
    assert direct.switch_mode() == 1 and direct.n_modes == 3


def test_loosened_bundle_needs_a_pilot(bundle, tmp_path):
    """An untrained bundle has no gate record: refused unless the plan is a pilot, in one line naming it."""
    with pytest.raises(ConfigError, match="looser than shipped.*pilot: true"):
        build_plan(compose_study("bedside_shelf", tiny_overrides(bundle, "study.pilot=false")))
    r = _coreach("study", "plan", "bedside_shelf", "--root", str(tmp_path / "s"),
                 *tiny_overrides(bundle, "study.pilot=false"), cwd=tmp_path)  # fmt: skip
    assert r.returncode == 2 and "pilot: true" in r.stderr and len(r.stderr.strip().splitlines()) == 1
    assert "Traceback" not in r.stderr and not (tmp_path / "s").exists()
    plan = tiny_plan(tmp_path / "ok", bundle)["plan"]
    assert resolve_bundles(plan) == {"decoder": bundle}


def test_simulated_study_runs_every_step_and_writes_private_tables(bundle, tmp_path):
    root = tmp_path / "studies"
    made = tiny_plan(root, bundle)
    summary = simulate_study(root, "bedside_shelf", warn=pytest.fail)
    folder = root / "bedside_shelf" / "v1" / SIMULATION
    assert summary["simulated"] == 2 and summary["participants"] == 2
    for person in made["plan"]["participants"]:
        session = folder / "sessions" / person["code"]
        state = json.loads((session / "state.json").read_text())
        assert set(state["done"]) == {s.id for s in steps_of(person)} and state["in_progress"] is None
        assert state["consent_at"] is not None
        rows = _rows(session / "trials.csv")
        # two blocks of one practice and one measured trial, in the participant's Williams order
        assert [(r["condition"], r["practice"]) for r in rows] == [(L, p) for L in person["order"] for p in "10"]
        assert all(r["complete"] == "1" for r in rows)
        measured = [r for r in rows if r["practice"] == "0"]
        assert all(r["tlx_mental"] != "" and r["liking"] != "" and r["preference"] != "" for r in measured)
        assert sorted(int(r["preference"]) for r in measured) == [1, 2]
        for r in rows:  # a failed trial ends at the time limit (3 s at 10 Hz: 30 steps)
            assert 0 < float(r["time_s"]) <= 3.0 + 1e-9 and float(r["path_m"]) >= 0
        drives = sorted((session / "drives").glob("*.parquet"))
        assert len(drives) == 4
        for path in [session, session / "drives"]:
            assert stat.S_IMODE(path.stat().st_mode) == 0o700
        for path in [*drives, session / "trials.csv", session / "state.json", session / "responses.json"]:
            assert stat.S_IMODE(path.stat().st_mode) == 0o600
    assert (folder / "analysis" / "report.html").is_file()
    # the real participants' folder is untouched: a simulation is not a session of the plan
    assert not (root / "bedside_shelf" / "v1" / "sessions").exists()


def test_a_reopened_session_marks_the_interrupted_trial_incomplete(bundle, tmp_path):
    root = tmp_path / "studies"
    code = tiny_plan(root, bundle)["plan"]["participants"][0]["code"]
    s = StudySession.open(root, "bedside_shelf", code)
    with pytest.raises(ConfigError, match="consent"):
        s.begin_trial(s.steps[1].id)  # not the next step: consent comes first
    s.consent()
    first = s.current()
    s.begin_trial(first.id)
    again = StudySession.open(root, "bedside_shelf", code)  # as after a killed server
    assert again.state["done"][first.id]["status"] == "incomplete" and again.resumed_incomplete == first.id
    assert again.current().id == again.steps[2].id
    rows = _rows(again.folder / "trials.csv")
    assert rows[0]["complete"] == "0" and rows[0]["success"] == ""
    with pytest.raises(ConfigError, match="not a code"):
        StudySession.open(root, "bedside_shelf", "P99-NOPE")


def test_tlx_out_of_range_is_refused_and_nothing_is_stored(bundle, tmp_path):
    root = tmp_path / "studies"
    code = tiny_plan(root, bundle)["plan"]["participants"][0]["code"]
    s = StudySession.open(root, "bedside_shelf", code)
    s.consent()
    while s.current().kind == "trial":
        step = s.current()
        s.begin_trial(step.id)
        s.end_trial(step.id, {"success": 1, "time_s": 2.0}, None)
    step = s.current()
    assert step.kind == "tlx"
    before = (s.folder / "state.json").read_bytes()
    with pytest.raises(DataError, match="outside 0-100"):
        s.answer_tlx(step.id, dict(mental=150, physical=10, temporal=10, performance=10, effort=10, frustration=10))
    assert (s.folder / "state.json").read_bytes() == before
    # raw TLX is the plain mean of the six subscales (Hart 2006)
    assert s.answer_tlx(step.id, dict(mental=60, physical=30, temporal=45, performance=20, effort=50,
                                      frustration=35)) == pytest.approx(40.0)  # fmt: skip


def test_simulate_killed_mid_trial_resumes_with_that_trial_incomplete(bundle, tmp_path):
    """The real command, killed with SIGKILL while a trial is in progress, then run again."""
    root = tmp_path / "studies"
    code = tiny_plan(root, bundle, "study.participants=1", "study.trial_time_limit_s=5")["plan"]["participants"][0]["code"]
    state = root / "bedside_shelf" / "v1" / SIMULATION / "sessions" / code / "state.json"
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(str(REPO / p) for p in ("pipeline", "plugins", "conf"))}
    proc = subprocess.Popen([sys.executable, "-m", "coreach.cli", "study", "simulate", "bedside_shelf", "--root",
                             str(root), "--rate", "200"], cwd=tmp_path, env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE)  # fmt: skip
    killed_in = None
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and proc.poll() is None:
        try:
            progress = json.loads(state.read_text())
        except (OSError, ValueError):
            progress = {}
        if progress.get("in_progress") and len(progress.get("done", {})) >= 2:  # past consent and one trial
            os.kill(proc.pid, signal.SIGKILL)
            killed_in = progress["in_progress"]
            break
        time.sleep(0.01)
    proc.wait(timeout=30)
    assert killed_in is not None, f"never saw a trial in progress: {proc.stderr.read().decode()[-500:]}"
    leftovers = [p for p in state.parent.rglob("*.tmp")]
    assert leftovers == []  # every file whole: temporary files only exist inside a write
    r = _coreach("study", "simulate", "bedside_shelf", "--root", str(root), "--rate", "200", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    done = json.loads(state.read_text())["done"]
    assert done[killed_in]["status"] == "incomplete"
    assert all(v.get("status", "complete") == "complete" for k, v in done.items() if k != killed_in)


def test_withdraw_deletes_everywhere_and_export_leaves_out_free_text(bundle, tmp_path):
    root = tmp_path / "studies"
    plan = tiny_plan(root, bundle)["plan"]
    codes = [p["code"] for p in plan["participants"]]
    for i, code in enumerate(codes):  # two short sessions, answered by hand
        s = StudySession.open(root, "bedside_shelf", code)
        s.consent()
        while (step := s.current()) is not None:
            if step.kind == "trial":
                s.begin_trial(step.id)
                s.end_trial(step.id, {"success": 1, "time_s": 5.0 + i + (step.letter == "A")}, None)
            elif step.kind == "tlx":
                s.answer_tlx(step.id, {k: 40 + 10 * i for k in ("mental", "physical", "temporal", "performance",
                                                               "effort", "frustration")})  # fmt: skip
            elif step.kind == "liking":
                s.answer_liking(step.id, 5, comment=f"SECRET-COMMENT-{code}")
            else:
                s.answer_ranking(s.letters, comment="ranked by SECRET-RANK-NOTE")
    r = _coreach("study", "analyze", "bedside_shelf", "--root", str(root), "--bootstrap", "0", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    out = export_study(root, "bedside_shelf")
    exported = "".join(p.read_text() for p in Path(out["folder"]).rglob("*") if p.is_file())
    assert "SECRET" not in exported and "consent_at" not in exported and "written_at" not in exported
    assert codes[0] in exported and out["participants"] == 2
    assert '"ratings"' in exported  # the numbers stay

    r = _coreach("--json", "study", "withdraw", "bedside_shelf", codes[0], "--root", str(root), cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    folder = root / "bedside_shelf" / "v1"
    assert not (folder / "sessions" / codes[0]).exists() and not Path(out["folder"]).exists()
    everything = "".join(p.read_text(errors="ignore") for p in folder.rglob("*") if p.is_file()
                         and p.name not in (PLAN_FILE, "withdrawn.json"))  # fmt: skip
    assert codes[0] not in everything and codes[1] in everything
    summary = json.loads((folder / "analysis" / "summary.json").read_text())
    assert summary["participants"] == 1
    assert list(json.loads((folder / "withdrawn.json").read_text())["codes"]) == [codes[0]]
    with pytest.raises(ConfigError, match="withdrew"):
        StudySession.open(root, "bedside_shelf", codes[0])
    r = _coreach("study", "withdraw", "bedside_shelf", "P77-NONE", "--root", str(root), cwd=tmp_path)
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1
    assert read_plan(folder / PLAN_FILE)["plan"] == plan  # the plan itself is unchanged
