"""A person's recorded drives next to the simulated operators in one vetting report, and one fine-tuning round
on them: drives of a released bundle (stepped through the bundle's own runtime Session by the test-drive
simulation, with a scripted stick and a fake clock instead of a browser), `coreach vet drives=...`, then the
drives relabelled by the scripted demonstrator, merged with the original demonstrations, trained and re-vetted.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from conftest import SMALL, cli_env

COREACH = str(Path(sys.executable).parent / "coreach")
NAME = "person-test"
QUICK_RELEASE = ["gate_suites=[nominal]", "episodes=1", "latency.steps=300", "latency.warmup=20", f"name={NAME}",
                 "gates.success_lo=0", "gates.recovery_lo=0", "gates.max_violations=1000000",
                 "gates.stick_gain_median=0", "gates.latency_p99_us=1000000"]  # fmt: skip

pytestmark = pytest.mark.slow


def run(args, cwd):
    res = subprocess.run([COREACH, *args], cwd=cwd, capture_output=True, text=True, env=cli_env(), timeout=900)
    assert res.returncode == 0, res.stderr
    return json.loads(res.stdout) if args[0] == "--json" else res


def _drive(bundle: Path, goal: int, out: Path, rate_hz: float, steps: int) -> str:
    """One recorded drive toward `goal`: each tick the stick whose predicted tool velocity (the page's action
    map, from the bundle's decoder) heads most directly for the goal's approach point, as a person would."""
    from coreach.runtime.session import Session
    from coreach.testdrive.sim import Drive

    now = [0.0]
    drive = Drive(Session.open(bundle), rate_hz=rate_hz, record_dir=out, clock=lambda: now[0])
    drive.pick_target(goal)
    drive.start_recording()
    for _ in range(steps):
        st = drive.state()
        to_goal = drive.manifest.goal_pos[goal] - np.asarray(st["links"][-1][0])  # the tool frame is the last link
        sticks, v = np.asarray(st["action_map"]["stick"]), np.asarray(st["action_map"]["tool_velocity"])
        score = v @ to_goal / (np.linalg.norm(v, axis=-1) * np.linalg.norm(to_goal) + 1e-12)
        drive.set_stick(sticks[int(np.argmax(score))].tolist(), "script")
        drive.tick()
        now[0] += drive.dt
    return drive.stop_recording()


def test_drives_beside_simulated_operators_and_one_finetuning_round(workdir):
    from coreach.episodes import load_parquet

    trained = run(["--json", "train", *SMALL, "+experiment=cvae_goal_entropy"], workdir)
    run_id = trained["runs"][0]["run_id"]
    released = run(["--json", "release", f"run={run_id}", *QUICK_RELEASE], workdir)
    assert released["released"], released
    bundle = workdir / "releases" / NAME / "v1"

    # drives at the demonstrations' rate (the scene's dt), so they merge with them without resampling
    demos = load_parquet(next((workdir / "data").rglob("*.parquet")))
    drives = workdir / "drives"
    paths = [_drive(bundle, g, drives, 1.0 / demos.dt, 60) for g in range(len(demos.goal_names))]
    assert all(Path(p).is_file() for p in paths)

    vetted = run(["--json", "vet", f"candidates=[{run_id}]", "suite=nominal", "suite.episodes=1", f"drives=[{drives}]",
                  "report_dir=rep"], workdir)  # fmt: skip
    person = vetted["summaries"]["person (recorded drives)"]
    assert person["n_episodes"] == len(paths) and person["success"]["n"] == len(paths)
    assert set(vetted["summaries"]) == {"cvae+goal_entropy", "person (recorded drives)"}
    html = (workdir / "rep" / "report.html").read_text()
    assert "person (recorded drives)" in html and "recorded drives" in html

    # one fine-tuning round: the person's states labelled with the demonstrator's action toward their goal,
    # merged with the original demonstrations (the command a lab runs)
    demos_file = next((workdir / "data").rglob("*.parquet"))
    relabel = run(["--json", "relabel-drives", f"drives=[{drives}]", "out=finetune.parquet", f"merge={demos_file}"],
                  workdir)["runs"][0]  # fmt: skip
    assert relabel["drives"] == len(paths) and relabel["episodes"] == len(demos) + len(paths)
    merged = load_parquet(workdir / "finetune.parquet")
    assert len(merged) == len(demos) + len(paths) and merged.dt == demos.dt
    # the relabelled drives keep their states, with new actions
    recorded = {ep.goal: ep for p in paths for ep in load_parquet(p)}  # one drive per goal
    relabelled = [ep for ep in merged if ep.episode_id >= 9_000_000]
    assert sorted(ep.goal for ep in relabelled) == sorted(recorded)
    for ep in relabelled:
        np.testing.assert_array_equal(ep.q, recorded[ep.goal].q)
        assert not np.allclose(ep.qd, recorded[ep.goal].qd)
    tuned = run(["--json", "train", "dataset=parquet_file", f"dataset.path={workdir / 'finetune.parquet'}",
                 *[o for o in SMALL if not o.startswith("dataset.")], "+experiment=cvae_goal_entropy"], workdir)  # fmt: skip
    tuned_id = tuned["runs"][0]["run_id"]
    assert tuned_id != run_id
    revetted = run(["--json", "vet", f"candidates=[{tuned_id}]", "suite=nominal", "suite.episodes=1",
                    f"drives=[{drives}]", "report_dir=rep2"], workdir)  # fmt: skip
    assert revetted["summaries"]["cvae+goal_entropy"]["success"]["n"] == 1


@pytest.mark.parametrize("command", [["vet", "candidates=[direct]", "suite=nominal", "suite.episodes=1"],
                                     ["relabel-drives", "out=x.parquet"]])
def test_a_missing_drives_path_is_refused_in_one_line(workdir, tmp_path, command):
    res = subprocess.run([COREACH, *command, f"drives=[{tmp_path / 'nowhere'}]"], cwd=workdir, capture_output=True,
                         text=True, env=cli_env(), timeout=300)  # fmt: skip
    assert res.returncode == 2 and len(res.stderr.strip().splitlines()) == 1, res.stderr
    assert "option drives" in res.stderr and "no such file or folder" in res.stderr
    assert not (workdir / "x.parquet").exists()
