"""coreach falsify: the space's checks, the robustness score, the search against random search, per-episode
operator values, counterexample suites through `coreach vet`, and the command end to end on a tiny decoder."""

from __future__ import annotations

import json
import statistics
import subprocess
import sys
from pathlib import Path

import pytest
import torch
import yaml
from conftest import cli_env

from coreach.errors import ConfigError
from coreach.falsify.counterexamples import model_name, suite_data, write_suite
from coreach.falsify.robustness import robustness
from coreach.falsify.search import search
from coreach.falsify.space import space_from_config

COREACH = str(Path(sys.executable).parent / "coreach")
GOALS = ["lamp_switch", "bottle", "book", "drawer_knob"]
BOUNDS = {"switch_at": [0.1, 0.9], "beta": [100.0, 800.0], "tremor_std": [0.0, 0.4], "layout_shift_m": [-0.04, 0.04],
          "delay_steps": [0, 3]}  # fmt: skip


def run(args, cwd, timeout=600):
    return subprocess.run([COREACH, *args], cwd=cwd, capture_output=True, text=True, env=cli_env(), timeout=timeout)


def space(**bounds):
    return space_from_config({"name": "t", "bounds": {**BOUNDS, **bounds}}, GOALS, "falsify/t.yaml")


# ------------------------------------------------------------------------------------------------ the space
@pytest.mark.parametrize("key, value, words", [
    ("beta", [800.0, 100.0], "inverted bounds"),
    ("tremor_std", [0.2, 0.2], "empty interval"),
    ("tremor_std", [], "expected [low, high]"),
    ("head_tilt", [0.0, 1.0], "unknown parameter"),
    ("switch_at", [0.0, 0.5], "leaves the parameter's range"),
    ("delay_steps", [0.5, 2.0], "integer bounds"),
])  # fmt: skip
def test_bad_bounds_are_refused_naming_the_parameter(key, value, words):
    with pytest.raises(ConfigError) as exc:
        space(**{key: value})
    assert f"falsify/t.yaml.bounds.{key}" in exc.value.where and words in exc.value.problem


def test_a_case_stays_inside_the_bounds_and_always_switches_goal():
    sp = space()
    gen = torch.Generator().manual_seed(0)

    def draw(name, lo, hi, kind):
        u = float(torch.rand((), generator=gen))
        return round(lo + u * (hi - lo)) if kind == "int" else lo + u * (hi - lo)

    for _ in range(200):
        c = sp.case(lambda name, ch: ch[int(torch.randint(len(ch), (), generator=gen))], draw, 7)
        assert c["switch_to"] != c["goal"] and 0.1 <= c["switch_at"] <= 0.9
        assert 100.0 <= c["operator"]["beta"] <= 800.0 and c["operator"]["delay_steps"] in (0, 1, 2, 3)
        assert set(c["layout_shift"]) == set(GOALS)
        assert all(-0.04 <= x <= 0.04 for v in c["layout_shift"].values() for x in v)


def test_model_names_from_references():
    assert model_name("shelf@candidate") == "shelf" and model_name("models:/shelf@prod") == "shelf"
    assert model_name("models:/shelf/3") == "shelf" and model_name("0123456789abcdef0123456789abcdef") is None


# --------------------------------------------------------------------------------------------- the search
def _constructed(cases):
    """A known failure region (all four at once): a late switch (after 0.8) to the drawer knob, the knob
    shifted more than 3 cm forward, an operator less rational than beta 250. The score is the largest of the
    four margins, so it is negative exactly inside the region (the form of a robustness score of a
    conjunction: the smallest margin to leaving the region, as in signal temporal logic robustness)."""
    scores = [max(0.3 * (c["switch_to"] != "drawer_knob") - 0.05, 0.8 - c["switch_at"],
                  10 * (0.03 - c["layout_shift"]["drawer_knob"][0]), (c["operator"]["beta"] - 250) / 1000)
              for c in cases]  # fmt: skip
    return scores, [{} for _ in cases]


def test_the_search_finds_the_constructed_failure_before_random_search():
    """Fixed seeds, small budget: the median number of evaluations to the first failure over 5 seeds is
    smaller for TPE than for random search over the same space (the region holds about 1/300 of it:
    1/4 goal x 1/8 switch x 1/8 shift x 0.21 beta)."""
    sp = space()
    first = {}
    for sampler in ("tpe", "random"):
        found = [search(sp, _constructed, 1200, 50, seed, sampler, 7, stop_at_failure=True).first_failure
                 for seed in range(5)]  # fmt: skip
        first[sampler] = statistics.median(f if f is not None else 10_000 for f in found)
    assert first["tpe"] < first["random"], first


def _decoy(cases):
    """A failure island behind a decoy, the shape met on the bedside shelf with far starts (docs/falsify.md):
    toward the lamp switch the score falls to below 0 only where the first start offset is above +0.25 rad and
    the fourth below -0.25 rad (1/144 of the offsets, 1/576 of the space); toward the book it falls smoothly to
    +0.2 and never fails; the other goals score 0.8. The lamp's score is the larger of its two margins
    (a conjunction, as in _constructed)."""
    scores = []
    for c in cases:
        s = c["start_offset"]
        if c["goal"] == "lamp_switch":
            scores.append(2 * max(0.25 - s[0], s[3] + 0.25))
        elif c["goal"] == "book":
            scores.append(0.2 + 0.5 * (abs(s[2] + 0.3) + abs(s[4] + 0.3)))
        else:
            scores.append(0.8)
    return scores, [{} for _ in cases]


def test_one_search_per_goal_reaches_an_island_behind_a_decoy_in_a_fifth_of_random_search():
    """Median evaluations to the first failure over 5 fixed seeds, batches of 20: one TPE per goal needs at
    most a fifth of what random search needs (measured with strata seeded by SeedSequence(seed, i): 85 against
    534; with seed + i it was 93)."""
    sp = space_from_config({"name": "t", "switch": False, "bounds": {"start_offset_rad": [-0.3, 0.3],
                                                                    "beta": [300.0, 800.0]}}, GOALS, "t")  # fmt: skip
    first = {}
    for sampler in ("tpe_per_goal", "random"):
        found = [search(sp, _decoy, 3000, 20, seed, sampler, 7, stop_at_failure=True).first_failure
                 for seed in range(5)]  # fmt: skip
        first[sampler] = statistics.median(f if f is not None else 10_000 for f in found)
    assert 5 * first["tpe_per_goal"] <= first["random"], first


def _trap(cases):
    """Toward the lamp switch a broad valley for slow operators (0.2 at beta 300, never failing) hides the
    failure island of _decoy in a corner of the start offsets: the smaller of the two is the score, so a search
    can settle on the valley anywhere in the starts (the shape that left 4 of 10 far-start searches on the
    bedside shelf without a failure, docs/falsify.md). The other goals score the valley plus 0.1."""
    scores = []
    for c in cases:
        s = c["start_offset"]
        slow = 0.2 + 0.6 * (c["operator"]["beta"] - 300.0) / 500.0
        scores.append(min(slow, 2 * max(0.25 - s[0], s[3] + 0.25)) if c["goal"] == "lamp_switch" else slow + 0.1)
    return scores, [{} for _ in cases]


def test_restarting_a_stalled_goal_search_leaves_no_seed_without_the_failure():
    """Five fixed seeds, batches of 20, up to 600 scenarios: without restarts one seed's lamp search stays in
    the slow operators' valley and finds nothing (measured: 53, none, 129, 77, 93); restarted after 20 stalled
    trials every seed finds the island (53, 197, 129, 77, 93), the stuck seed after restarts, the others
    unchanged since they never stalled that long."""
    sp = space_from_config({"name": "t", "switch": False, "bounds": {"start_offset_rad": [-0.3, 0.3],
                                                                    "beta": [300.0, 800.0]}}, GOALS, "t")  # fmt: skip
    plain = [search(sp, _trap, 600, 20, seed, "tpe_per_goal", 7, stop_at_failure=True) for seed in range(5)]
    restarted = [search(sp, _trap, 600, 20, seed, "tpe_per_goal", 7, stop_at_failure=True, restart_after=20)
                 for seed in range(5)]  # fmt: skip
    assert any(r.first_failure is None for r in plain), [r.first_failure for r in plain]
    assert all(r.first_failure is not None for r in restarted), [r.first_failure for r in restarted]
    stuck = [i for i, r in enumerate(plain) if r.first_failure is None]
    assert all(restarted[i].restarts > 0 for i in stuck)
    assert [r.first_failure for i, r in enumerate(restarted) if r.restarts == 0] == \
        [r.first_failure for i, r in enumerate(plain) if restarted[i].restarts == 0]


def test_a_stratum_restarts_only_while_it_has_found_no_failure():
    """A score that never falls restarts every stratum, each from a fresh seed (its cases differ from the
    unrestarted search's after that); one that is always a failure never restarts."""
    sp = space(layout_shift_m=[-0.01, 0.01])
    flat = lambda score: lambda cases: ([score] * len(cases), [{} for _ in cases])  # noqa: E731
    plain = search(sp, flat(0.5), 200, 10, 3, "tpe_per_goal", 7)
    again = search(sp, flat(0.5), 200, 10, 3, "tpe_per_goal", 7, restart_after=15)
    assert plain.restarts == 0 and again.restarts >= 4
    assert [e.case for e in again.evaluations[:60]] == [e.case for e in plain.evaluations[:60]]
    assert [e.case for e in again.evaluations[100:]] != [e.case for e in plain.evaluations[100:]]
    assert search(sp, flat(-0.5), 200, 10, 3, "tpe_per_goal", 7, restart_after=15).restarts == 0


def test_strata_of_neighbouring_search_seeds_start_from_different_seeds():
    """With seed + i, stratum 1 of seed s repeated stratum 0 of seed s + 1; SeedSequence(seed, i) gives 40
    distinct seeds for 10 searches of 4 strata, and one search over everything keeps its own seed."""
    from coreach.falsify.search import _stratum_seed

    seeds = [_stratum_seed(s, i, 4) for s in range(10) for i in range(4)]
    assert len(set(seeds)) == 40
    assert _stratum_seed(7, 0, 1) == 7


def test_a_per_goal_search_takes_the_goals_in_turn():
    sp = space(layout_shift_m=[-0.01, 0.01])  # a switch space: strata are the goals switched to
    result = search(sp, lambda cases: ([0.5] * len(cases), [{} for _ in cases]), 40, 10, 0, "tpe_per_goal", 7)
    assert [e.case["switch_to"] for e in result.evaluations[:8]] == GOALS * 2


# ------------------------------------------------------------------------- cases, robustness, the operator
def _case_suite(tmp_path: Path, cases: list[dict], horizon: float = 30.0, episodes: int = 1) -> Path:
    from coreach.vetting.suite import load_suite

    base = load_suite("goal-switch")
    data = suite_data(base, "cx", cases, episodes, {"by": "test"})
    data["horizon_s"] = horizon
    return write_suite(tmp_path / "cx.yaml", data)


def test_robustness_is_negative_exactly_for_failed_episodes(tmp_path):
    """The direct baseline through explicit cases, one long enough to succeed and the same with a 3 s horizon
    that cannot: the score's sign follows success, and it lies in [-1, 1]."""
    from coreach.host.registry import build_plugin
    from coreach.safety import limits_from_config
    from coreach.config.check import compose_config
    from coreach.vetting.loop import rollout
    from coreach.vetting.stage import build_candidate
    from coreach.vetting.suite import load_suite

    cfg = compose_config("vet", [])
    robot, belief = build_plugin(cfg.robot, "robot"), build_plugin(cfg.belief, "belief")
    limits = limits_from_config(robot, cfg.safety)
    interface, _ = build_candidate("direct", None, "sqlite:///unused.db")
    cases = [{"goal": "bottle"}, {"goal": "book", "switch_to": "lamp_switch", "switch_at": 0.3}]
    for horizon in (30.0, 3.0):
        suite = load_suite(_case_suite(tmp_path, cases, horizon, episodes=2))
        record = rollout(robot, interface, suite.build_operator(), suite, belief, limits, suite.generator())
        score = robustness(record)["score"]
        assert ((score < 0) == ~record.success).all() and (score.abs() <= 1).all()
        assert bool(record.success.all()) == (horizon == 30.0)


def test_per_episode_operator_values_equal_to_its_own_reproduce_it():
    """`vary` with every episode at the operator's own values draws the same choices and sticks as the
    operator without it (the same random stream), and a per-episode delay of d gives no input for d steps."""
    from coreach_plugins.operator.boltzmann import NO_INPUT, BoltzmannOperator

    E = 6
    value = torch.randn(E, 1, 25, dtype=torch.float64) * 0.01
    stick = torch.zeros(E, 2, dtype=torch.float64)
    out = []
    for varied in (False, True):
        op = BoltzmannOperator(beta=300.0, tremor_std=0.2, noise_std=0.1, delay_steps=0)
        gen = torch.Generator().manual_seed(3)
        op.reset(E, gen, dt=0.1)
        if varied:
            op.vary({"beta": torch.full((E,), 300.0), "tremor_std": torch.full((E,), 0.2),
                     "noise_std": torch.full((E,), float("nan"))})  # fmt: skip
        out.append([(op.choose(value, t, gen), op.perturb(stick, t, gen)) for t in range(5)])
    for (c0, s0), (c1, s1) in zip(*out):
        assert torch.equal(c0, c1) and torch.allclose(s0, s1, atol=1e-8)  # the pole in float vs tensor arithmetic

    op = BoltzmannOperator(greedy=True)
    op.reset(3, torch.Generator(), dt=0.1)
    op.vary({"delay_steps": torch.tensor([0, 2, -1])})  # -1: the operator's own (0)
    picks = torch.stack([op.choose(value[:3], t, None) for t in range(4)])  # [T, 3]
    assert (picks[:2, 1] == NO_INPUT).all() and (picks[2:, 1] >= 0).all()
    assert (picks[:, 0] >= 0).all() and (picks[:, 2] >= 0).all()


def test_a_counterexample_suite_runs_through_vet_and_a_hand_edit_is_refused(tmp_path):
    cases = [{"goal": "bottle", "switch_to": "drawer_knob", "switch_at": 0.6, "layout_shift": {"drawer_knob": [0, 0.02, 0]},
              "operator": {"beta": 200.0, "delay_steps": 2}}, {"goal": "book", "operator": {"noise_std": 0.1}}]  # fmt: skip
    path = _case_suite(tmp_path, cases, horizon=5.0, episodes=2)
    res = run(["--json", "vet", f"suite={path}", "candidates=[direct]", "log=false", f"report_dir={tmp_path / 'r'}"],
              tmp_path)  # fmt: skip
    assert res.returncode == 0, res.stderr
    summary = json.loads(res.stdout)["summaries"]["direct"]
    assert summary["n_episodes"] == 4 and summary["suite"] == "cx"

    data = yaml.safe_load(path.read_text())
    data["cases"][0]["operator"]["betta"] = 100.0  # a typo made by hand
    path.write_text(yaml.safe_dump(data))
    res = run(["vet", f"suite={path}", "candidates=[direct]", "log=false"], tmp_path)
    assert res.returncode == 2 and len(res.stderr.strip().splitlines()) == 1, res.stderr
    assert "betta" in res.stderr and "Traceback" not in res.stderr


def test_goal_weights_under_sample_a_goal_by_largest_remainder():
    """Hamilton's (largest remainder) apportionment: 400 episodes at weights 1:1:1:0.1 give 400 x 0.3226 =
    129.03 each and 12.90 -> quotas 129, 129, 129, 12 plus the one seat left to the largest remainder (0.90):
    129/129/129/13; equal weights give round robin; a bad weight list is refused naming the option."""
    from coreach.demonstrator import rollout, weighted_goals

    assert torch.bincount(weighted_goals(400, [1, 1, 1, 0.1])).tolist() == [129, 129, 129, 13]
    assert weighted_goals(8, [1, 1, 1, 1]).tolist() == [0, 1, 2, 3, 0, 1, 2, 3]
    from coreach.host.registry import build_plugin
    from coreach.config.check import compose_config

    robot = build_plugin(compose_config("vet", []).robot, "robot")
    with pytest.raises(ConfigError) as exc:
        rollout(robot, "bedside_shelf", 4, goal_weights=[1, 1, 1])
    assert exc.value.where == "option goal_weights"


def test_the_model_card_records_the_search_or_says_none_ran():
    from coreach.runtime.model_card import model_card

    none = model_card({"name": "m"}, {}, {})
    assert "## Falsification" in none and "No falsification step ran" in none
    found = {"space": {"name": "bedside_shelf", "suite": "goal-switch", "bounds": {"beta": [150.0, 800.0]}},
             "budget": 400, "optimizer": "tpe (optuna)", "seed": 0, "failures": 3,
             "worst": {"robustness": -0.41, "case": {"goal": "bottle", "switch_to": "book", "switch_at": 0.79},
                       "cause": "oscillating"}}  # fmt: skip
    card = model_card({"name": "m", "falsification": found, "counterexample_suites": ["counterexamples/a"]}, {}, {})
    assert "Budget: 400 scenarios, optimizer tpe (optuna)" in card and "Failures found: 3" in card
    assert "robustness -0.410, goal bottle switching to book at 0.79" in card and "counterexamples/a" in card
