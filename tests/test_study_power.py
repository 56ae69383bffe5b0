"""coreach study power: the planted-effect generator, coverage of the analysis' intervals and power by
simulation, against outside references (scipy, statsmodels, textbook formulas) and through the real CLI."""

from __future__ import annotations

import dataclasses
import json
import math
import os
import stat
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from scipy import stats
from scipy.special import expit

from coreach.errors import ConfigError
from coreach.study import coverage, planted, power
from coreach.study.plan import build_plan, compose_study, plan_hash

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def study() -> dict:
    return compose_study("bedside_shelf", [])


@pytest.fixture(scope="module")
def structure(study) -> planted.Structure:
    return planted.structure_of(build_plan(study))


def _population(study, structure, **planted_changes) -> planted.Population:
    return planted.population_from({**study["planted"], **planted_changes}, structure)


def _null(study, structure) -> planted.Population:
    """No condition effect at all, no participant spread in success: every true effect is exactly 0."""
    return _population(study, structure, effects={}, participant_sd_log_odds=0.0)


# ---- the generator and the true values


def test_the_shipped_population_and_the_plan_do_not_depend_on_each_other(study, structure):
    assert structure.conditions == ("decoder", "direct", "blend") and structure.sequences == 6
    pop = _population(study, structure)
    assert pop.time_s == {"decoder": -4.0, "direct": 0.0, "blend": -1.5}  # the config's numbers, 0 where none
    assert (pop.first, pop.second, pop.difference_s) == ("decoder", "direct", -2.0)
    # the simulation assumptions are not frozen: changing them leaves the plan's hash alone
    changed = {**study, "planted": {**study["planted"], "base_time_s": 99.0}}
    assert plan_hash(build_plan(changed)) == plan_hash(build_plan(study))
    assert "planted" not in build_plan(study)["config"]


def test_a_generated_study_has_the_plan_structure(study, structure):
    frame = planted.generate(_population(study, structure), structure, 7, np.random.default_rng(1))
    assert list(frame.columns) == ["participant", "condition", "task", "trial", "success", "time_s"]
    cells = frame.groupby(["participant", "condition", "task"]).size()
    assert len(cells) == 7 * 3 * 4 and set(cells) == {structure.trials}
    assert set(frame["success"]) <= {0, 1}


def test_generated_times_follow_the_planted_means_and_spreads(study, structure):
    """A large draw against the model's own moments: mean per condition (t interval, scipy), the within-
    participant residual sd (the pooled sd of a participant's trials in one cell)."""
    pop = _population(study, structure)
    frame = planted.generate(pop, structure, 400, np.random.default_rng(2))
    for c in structure.conditions:  # per-participant means of a condition are iid: a one-sample t test
        means = frame[frame["condition"] == c].groupby("participant")["time_s"].mean()
        expected = pop.base_time_s + pop.time_s[c] + np.mean(list(pop.task_time_s.values()))
        assert stats.ttest_1samp(means, expected).pvalue > 1e-3, c
    within = frame.groupby(["participant", "condition", "task"])["time_s"].var(ddof=1).mean()
    assert math.sqrt(within) == pytest.approx(pop.residual_sd_time_s, rel=0.03)


def test_marginal_success_is_the_integral_over_the_participant_intercept():
    """Against numpy's Gauss-Hermite rule (150 nodes, exact to ~1e-12 at these moderate spreads), the known
    answer 1/2 at eta = 0 for any spread (expit(-x) = 1 - expit(x) and a symmetric intercept), and the
    spread-free logistic."""
    nodes, weights = np.polynomial.hermite_e.hermegauss(150)
    for eta, sd in ((1.386, 0.5), (-2.0, 1.5), (0.3, 1.0)):
        rule = float(expit(eta + sd * nodes) @ weights / math.sqrt(2 * math.pi))
        assert float(planted.marginal_success(eta, sd)) == pytest.approx(rule, abs=1e-10)
    assert planted.marginal_success([0.0, 0.0], 4.0) == pytest.approx([0.5, 0.5], abs=1e-12)
    assert float(planted.marginal_success(2.0, 0.0)) == pytest.approx(1 / (1 + math.exp(-2.0)))


def test_population_averaged_log_odds_are_attenuated_as_the_textbook_says(study, structure):
    """Without a spread, the planted log-odds themselves; with one, attenuated by about 1 / sqrt(1 + c^2 sd^2),
    c = 16 sqrt(3) / (15 pi) (Zeger, Liang & Albert 1988, Biometrics 44:1049; the constant quoted from memory).
    It approximates the logistic by a normal cdf twice, so it is only good to a few per cent: 5% tolerance
    (measured here: within 0.7% at sd 0.5 and 1, 3.1% at sd 2, base success 0.8)."""
    pop = _population(study, structure, tasks={})
    exact = planted.true_log_odds_effects(dataclasses.replace(pop, participant_sd_log_odds=0.0), structure, "direct")
    assert exact["effects"] == pytest.approx({"decoder": 0.6, "blend": 0.2}, abs=1e-9)
    c = 16 * math.sqrt(3) / (15 * math.pi)
    for sd in (0.5, 1.0, 2.0):
        pa = planted.true_log_odds_effects(dataclasses.replace(pop, participant_sd_log_odds=sd), structure, "direct")
        assert pa["nonadditivity"] < 0.02  # no task effects: additive up to the small curvature of the logit
        for name, ss in (("decoder", 0.6), ("blend", 0.2)):
            assert pa["effects"][name] == pytest.approx(ss / math.sqrt(1 + c * c * sd * sd), rel=0.05)
            assert abs(pa["effects"][name]) < ss


# ---- coverage


def test_coverage_rows_are_statsmodels_called_directly_on_the_same_study(study, structure):
    pop = _population(study, structure)
    result = coverage.run_coverage(pop, structure, 12, studies=3, seed=5)
    rows = result["per_study"]
    frame = planted.generate(pop, structure, 12, planted.study_rng(5, (planted.COVERAGE_STREAM,), 2))
    ok = frame[frame["success"] == 1]
    fit = smf.mixedlm("time_s ~ C(condition, Treatment(reference='direct')) + C(task)", ok,
                      groups=ok["participant"]).fit(reml=True)  # fmt: skip
    gee = smf.gee("success ~ C(condition, Treatment(reference='direct')) + C(task)", "participant", frame,
                  family=sm.families.Binomial(), cov_struct=sm.cov_struct.Exchangeable()).fit(cov_type="bias_reduced")
    # the GEE's interval: statsmodels' bias-reduced (Mancl-DeRouen) standard error, scipy's t(G - 1) quantile
    half = stats.t.ppf(0.975, frame["participant"].nunique() - 1) * gee.bse
    intervals = {"time_s": fit.conf_int(), "log_odds": pd.DataFrame({0: gee.params - half, 1: gee.params + half})}
    for scale, conf in intervals.items():
        for c in ("decoder", "blend"):
            row = rows[(rows["study"] == 2) & (rows["scale"] == scale) & (rows["condition"] == c)].iloc[0]
            name = f"C(condition, Treatment(reference='direct'))[T.{c}]"
            assert (row["lo"], row["hi"]) == pytest.approx(tuple(conf.loc[name]), rel=1e-5)
            assert row["covered"] == (row["lo"] <= row["true"] <= row["hi"])
    assert rows[rows["scale"] == "time_s"].set_index(["study", "condition"])["true"].to_dict()[(0, "decoder")] == -4.0


def test_with_no_effect_the_signs_split_evenly_and_the_wilson_interval_is_the_formula(study, structure):
    """Planted 0: estimates fall either side of 0 about equally (scipy's binomial test), 'right sign' is
    undefined; the coverage interval is Wilson's (1927) score interval, computed here from its formula."""
    studies = 20
    table = coverage.run_coverage(_null(study, structure), structure, 12, studies, seed=9)["table"]
    assert len(table) == 4 and (table["true"] == 0).all() and table["right_sign"].isna().all()
    for _, row in table.iterrows():
        k = round(row["positive"] * row["fitted"])
        assert stats.binomtest(k, row["fitted"], 0.5).pvalue > 0.01, row["scale"]
        z, n, p = stats.norm.ppf(0.975), row["fitted"], row["coverage"]
        centre, half = (p + z * z / (2 * n)) / (1 + z * z / n), z / (1 + z * z / n) * math.sqrt(
            p * (1 - p) / n + z * z / (4 * n * n))
        assert (row["coverage_lo"], row["coverage_hi"]) == pytest.approx((centre - half, centre + half), abs=1e-12)
    # with a large planted effect every estimate has the right sign
    big = coverage.run_coverage(_population(study, structure, effects={"decoder": {"time_s": -10.0}}),
                                structure, 12, 5, seed=9)["table"].set_index(["scale", "condition"])  # fmt: skip
    assert big.loc[("time_s", "decoder"), "right_sign"] == 1.0


# ---- power


def test_power_rises_with_participants_and_with_the_difference(study, structure):
    pop = _population(study, structure)
    # by a normal approximation (docs/study.md) the mixed model's power is about 22% and 73% at -1.5 s, 88%
    # and ~100% at -4 s, for 6 and 30 participants: gaps far wider than 20 studies' noise
    table = power.run_power(pop, structure, [6, 30], studies=20, seed=3, differences=[-1.5, -4.0])
    mixed = table[table["test"] == "mixed"].set_index(["difference_s", "participants"])["power"]
    assert mixed[(-1.5, 30)] > mixed[(-1.5, 6)] and mixed[(-4.0, 30)] > mixed[(-1.5, 30)]
    assert mixed[(-4.0, 6)] > mixed[(-1.5, 6)] and mixed[(-4.0, 30)] >= 0.9
    # a known answer: with 6 people the exact two-sided Wilcoxon p is at least 2 / 2^6 = 0.03125 (scipy
    # below), and Holm over the 3 pairs multiplies the smallest by 3: 0.094 > 0.05, so it can never reject
    assert stats.wilcoxon(np.arange(1, 7), np.zeros(6)).pvalue == pytest.approx(2 / 2**6)
    wil = table[table["test"] == "wilcoxon_holm"].set_index(["difference_s", "participants"])["power"]
    assert wil[(-4.0, 6)] == 0 and wil[(-1.5, 6)] == 0 and wil[(-4.0, 30)] >= 0.8
    assert power.smallest_n(table)[-4.0]["wilcoxon_holm"] == 30


def test_bad_populations_are_refused_naming_the_option(study, structure):
    cases = [({"effects": {"teapot": {"time_s": 1.0}}}, "study.planted.effects.teapot"),
             ({"tasks": {"kettle": {"time_s": 1.0}}}, "study.planted.tasks.kettle"),
             ({"power": {"first": "direct", "second": "direct", "time_s": -2.0}}, "study.planted.power.first"),
             ({"base_time_s": 10.0}, "negative times"),
             ({"base_success": 1.0}, "study.planted.base_success")]  # fmt: skip
    for change, words in cases:
        with pytest.raises(ConfigError, match=words):
            _population(study, structure, **change)
    with pytest.raises(ConfigError, match="study.planted.power.time_s"):  # a stated difference too large
        planted.with_difference(_population(study, structure), -40.0)


# ---- the real command


def _coreach(cwd: Path, *args: str) -> subprocess.CompletedProcess:
    env = {**os.environ, "CI": "true",
           "PYTHONPATH": os.pathsep.join(str(REPO / p) for p in ("pipeline", "plugins", "conf"))}  # fmt: skip
    return subprocess.run([sys.executable, "-m", "coreach.cli", *args], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=300)  # fmt: skip


def test_the_command_writes_owner_only_files_and_refuses_bad_input_in_one_line(tmp_path, monkeypatch, capsys):
    """Bad input through the real CLI in a subprocess (one line on stderr, exit 2, nothing written); the rest
    in-process, which is the same code path without paying for a fresh interpreter each time."""
    from coreach import cli

    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("CI", "true")
    assert cli.main(["study", "plan", "bedside_shelf", "study.participants=6"]) == 0
    folder = tmp_path / ".coreach" / "studies" / "bedside_shelf" / "v1" / "power"
    for args, words in ((["--studies", "0"], "--studies"), (["--participants", "1,6"], "--participants"),
                        (["study.planted.effects.teapot.time_s=1"], "study.planted.effects.teapot")):  # fmt: skip
        r = _coreach(tmp_path, "study", "power", "bedside_shelf", *args)
        assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1 and words in r.stderr, (args, r.stderr)
        assert not folder.exists()
    capsys.readouterr()
    for args, words in ((["--participants", "6,x"], "--participants"), (["--fast"], "unrecognized")):
        assert cli.main(["study", "power", "bedside_shelf", *args]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and words in err[0] and not folder.exists()
    assert cli.main(["--json", "study", "power", "bedside_shelf", "--studies", "3", "--participants", "6,12"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["participants"] == 6 and [row["participants"] for row in summary["power"]] == [6, 6, 12, 12]
    assert "informed consent" in " ".join(summary["cautions"])
    for name in ("coverage.csv", "power.csv", "power.png", "power.html"):
        assert stat.S_IMODE((folder / name).stat().st_mode) == 0o600, name
    assert stat.S_IMODE(folder.stat().st_mode) == 0o700
    html = (folder / "power.html").read_text()
    assert "data:image/png;base64," in html and "invented" in html and "informed consent" in html
    assert len(pd.read_csv(folder / "coverage.csv")) == 4
