"""coreach falsify as a command: end to end on a tiny decoder, the release gate's step and kept counterexample
suites, and its bad-input lines (a file of its own, so the test runner can place it beside the unit tests)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import SMALL, cli_env

from coreach.falsify.counterexamples import suite_data, write_suite

COREACH = str(Path(sys.executable).parent / "coreach")


def run(args, cwd, timeout=600):
    return subprocess.run([COREACH, *args], cwd=cwd, capture_output=True, text=True, env=cli_env(), timeout=timeout)


# -------------------------------------------------------------------------------------------- the command
@pytest.fixture(scope="module")
def decoder(tmp_path_factory):
    cwd = tmp_path_factory.mktemp("falsify")
    res = run(["--json", "train", *SMALL], cwd)
    assert res.returncode == 0, res.stderr
    return cwd, json.loads(res.stdout)["runs"][0]["run_id"]


def test_falsify_end_to_end_on_a_tiny_decoder(decoder):
    """Two small searches (TPE and random, 20 scenarios each): the figures, the report and, when
    something failed, a counterexample suite that vet runs."""
    cwd, run_id = decoder
    res = run(["--json", "falsify", f"decoder={run_id}", "budget=20", "batch=10", "report_dir=out",
               "falsify.bounds.switch_at=[0.3,0.7]"], cwd)  # fmt: skip
    assert res.returncode == 0, res.stderr
    s = json.loads(res.stdout)
    assert set(s["searches"]) == {"tpe", "random"} and s["budget"] == 20
    assert all(v > 0 for v in s["scenarios_per_minute"].values())
    assert Path(s["report"]).is_file() and (cwd / "out" / "evaluations.csv").read_text().count("\n") == 41
    assert s["worst"]["robustness"] == min(r["lowest_robustness"] for r in s["searches"].values())
    if s["counterexample_suite"]:
        res = run(["--json", "vet", f"suite={s['counterexample_suite']}", "candidates=[direct]", "log=false",
                   "suite.episodes=1", "report_dir=vet"], cwd)  # fmt: skip
        assert res.returncode == 0, res.stderr


@pytest.mark.parametrize("args, words", [
    (["budget=0"], "option budget"),
    (["restart_after=0"], "option restart_after"),
    (["decoder=direct"], "is a baseline interface, not a decoder"),
    (["falsify.bounds.beta=[800,100]"], "inverted bounds"),
    (["+falsify.bounds.head_tilt=[0,1]"], "unknown parameter"),
])  # fmt: skip
def test_bad_input_gets_one_line_and_exit_2(tmp_path, args, words):
    res = run(["falsify", "decoder=0123456789abcdef0123456789abcdef", *args], tmp_path)
    assert res.returncode == 2, res.stderr
    assert len(res.stderr.strip().splitlines()) == 1 and words in res.stderr, res.stderr


def test_the_gate_with_the_step_refuses_a_decoder_that_fails_inside_the_budget(decoder):
    """A barely trained decoder, every other gate loosened so that only the new rows can refuse it: the
    falsification step finds a failure within 20 scenarios and the release is refused (exit 3) naming it; a
    counterexample suite kept for the model name runs as a gate suite of its own."""
    cwd, run_id = decoder
    short = cwd / "nominal-short.yaml"
    short.write_text("scenario: bedside_shelf\noperator: expert\nname: nominal-short\nepisodes: 1\nhorizon_s: 10.0\n"
                     "seed: 10000\n")  # fmt: skip
    kept = cwd / ".coreach" / "counterexamples" / "falsify-test"
    cases = [{"goal": "bottle", "switch_to": "book", "switch_at": 0.5, "operator": {"delay_steps": 1}}]
    from coreach.vetting.suite import load_suite

    write_suite(kept / "earlier.yaml", suite_data(load_suite("goal-switch"), "cx", cases, 1, {"by": "test"}))
    loose = ["gates.success_lo=0", "gates.recovery_lo=0", "gates.max_violations=1000000", "gates.stick_gain_median=0",
             "gates.latency_p99_us=1000000", "gates.max_contacts=1000000", "gates.max_keep_out=1000000",
             "gates.min_separation_m=0", "gates.max_excess=1000000"]  # fmt: skip
    res = run(["--json", "release", f"run={run_id}", f"gate_suites=[{short}]", "name=falsify-test",
               "latency.steps=300", "latency.warmup=20", *loose, "falsification.enabled=true",
               "falsification.budget=20", "falsification.batch=10", "falsification.restart_after=5"], cwd)  # fmt: skip
    assert res.returncode == 3, res.stderr
    out = json.loads(res.stdout)
    gates = out["gates"]
    assert "success[counterexamples/earlier]" in gates
    row = gates["falsification[bedside_shelf]"]
    assert not row["passed"] and row["value"] >= 1 and out["released"] is False
    assert "falsification[bedside_shelf]" in out["failed"]
