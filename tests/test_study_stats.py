"""coreach study statistics against outside references: scipy, statsmodels, and published worked examples."""

from __future__ import annotations

import json
import stat

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from scipy import stats
from statsmodels.stats.multitest import multipletests

from coreach.errors import DataError
from coreach.study import models, paired
from coreach.study.holm import holm
from coreach.study.tlx import raw_tlx, tlx_column

# Hollander & Wolfe (1973), p. 29: Hamilton depression scale before (x) and after (y) a tranquilliser, nine
# patients; the example of R's `wilcox.test` help page (V = 40, two-sided exact p-value = 0.039), also used in
# scipy's documentation of scipy.stats.wilcoxon.
HW_X = [1.83, 0.50, 1.62, 2.48, 1.68, 1.88, 1.55, 3.06, 1.30]
HW_Y = [0.878, 0.647, 0.598, 2.05, 1.06, 1.29, 1.06, 3.14, 1.29]

# Hollander & Wolfe (1973), p. 140: times for 22 players rounding first base by three methods (round out,
# narrow angle, wide angle); the example of R's `friedman.test` help page (RoundingTimes), which reports
# Friedman chi-squared = 11.143, df = 2, p-value = 0.003805. Data and result quoted FROM MEMORY of that page.
ROUNDING = np.array([
    [5.40, 5.50, 5.55], [5.85, 5.70, 5.75], [5.20, 5.60, 5.50], [5.55, 5.50, 5.40], [5.90, 5.85, 5.70],
    [5.45, 5.55, 5.60], [5.40, 5.40, 5.35], [5.45, 5.50, 5.35], [5.25, 5.15, 5.00], [5.85, 5.80, 5.70],
    [5.25, 5.20, 5.10], [5.65, 5.55, 5.45], [5.60, 5.35, 5.45], [5.05, 5.00, 4.95], [5.50, 5.50, 5.40],
    [5.45, 5.55, 5.50], [5.55, 5.55, 5.35], [5.45, 5.50, 5.55], [5.50, 5.45, 5.25], [5.65, 5.60, 5.40],
    [5.70, 5.65, 5.55], [6.30, 6.30, 6.25],
])


def test_wilcoxon_on_the_hollander_wolfe_example():
    """Published: two-sided exact p = 0.039 (R: 0.03906), V = 40 (sum of positive ranks)."""
    w, p = paired.wilcoxon(np.array(HW_X), np.array(HW_Y))
    assert p == pytest.approx(0.039, abs=5e-4)
    assert p == pytest.approx(stats.wilcoxon(HW_X, HW_Y).pvalue)  # scipy called directly
    d = np.array(HW_X) - np.array(HW_Y)
    # rank-biserial: (T+ - T-) / (T+ + T-) with T+ = V = 40 and the total rank sum 9*10/2 = 45 (Kerby 2014)
    assert paired.rank_biserial(d) == pytest.approx((40 - 5) / 45)


def test_friedman_on_the_rounding_times_example():
    wide = pd.DataFrame(ROUNDING, columns=["round_out", "narrow", "wide"])
    f = paired.friedman(wide)
    assert f["statistic"] == pytest.approx(11.143, abs=1e-3) and f["p"] == pytest.approx(0.003805, abs=1e-6)
    direct = stats.friedmanchisquare(*ROUNDING.T)  # scipy called directly
    assert f["statistic"] == pytest.approx(direct.statistic) and f["p"] == pytest.approx(direct.pvalue)


def test_holm_against_statsmodels_and_by_hand():
    """By hand from Holm (1979)'s definition: p = (0.01, 0.04, 0.03, 0.005), m = 4: sorted 0.005*4 = 0.02,
    0.01*3 = 0.03, 0.03*2 = 0.06, 0.04*1 = 0.04 -> kept monotone at 0.06."""
    assert holm([0.01, 0.04, 0.03, 0.005]) == pytest.approx([0.03, 0.06, 0.06, 0.02])
    rng = np.random.default_rng(7)
    for m in (1, 2, 3, 6, 15):
        for p in (rng.uniform(0, 0.2, m), rng.uniform(0, 1, m), np.repeat(rng.uniform(0, 0.1), m)):
            expected = multipletests(p, method="holm")[1]
            assert holm(p) == pytest.approx(expected), p
    assert np.isnan(holm([0.01, np.nan, 0.02])[1])


def test_pairwise_matches_scipy_and_the_t_interval():
    rng = np.random.default_rng(3)
    wide = pd.DataFrame(rng.normal(10, 2, (10, 3)) + [0, 1.5, 3], columns=["A", "B", "C"])
    table = paired.pairwise(wide, np.random.default_rng(0), resamples=300)
    assert list(zip(table["first"], table["second"])) == [("A", "B"), ("A", "C"), ("B", "C")]
    for _, row in table.iterrows():
        x, y = wide[row["first"]].to_numpy(), wide[row["second"]].to_numpy()
        assert row["p"] == pytest.approx(stats.wilcoxon(x, y).pvalue)
        ci = stats.ttest_rel(x, y).confidence_interval(0.95)  # scipy's paired t interval
        assert (row["mean_difference_lo"], row["mean_difference_hi"]) == pytest.approx((ci.low, ci.high))
        assert row["rank_biserial_lo"] <= row["rank_biserial"] <= row["rank_biserial_hi"]
    assert table["p_holm"].to_numpy() == pytest.approx(multipletests(table["p"], method="holm")[1])


def _study_frame(seed: int = 11, people: int = 12, trials: int = 3, time_effect=(0.0, -3.0, -1.0),
                 logit_effect=(0.0, 1.0, 0.3)) -> pd.DataFrame:  # fmt: skip
    """A crafted long-format table with planted condition effects (direct is the reference)."""
    rng = np.random.default_rng(seed)
    conditions, tasks = ["direct", "decoder", "blend"], {"lamp": 0.0, "bottle": 4.0, "book": 2.0, "drawer": 6.0}
    rows = []
    for k in range(people):
        intercept, ability = rng.normal(0, 2.0), rng.normal(0, 0.4)
        for c, dt, dl in zip(conditions, time_effect, logit_effect):
            for task, base in tasks.items():
                for t in range(trials):
                    p_success = 1 / (1 + np.exp(-(0.6 + ability + dl)))
                    rows.append({"participant": f"P{k + 1:02d}", "condition": c, "task": task, "trial": t + 1,
                                 "success": int(rng.uniform() < p_success),
                                 "time_s": 20 + base + intercept + dt + rng.normal(0, 1.5)})  # fmt: skip
    return pd.DataFrame(rows)


def test_mixed_model_and_gee_match_statsmodels_called_directly():
    frame = _study_frame()
    conditions = ["direct", "decoder", "blend"]
    ours = models.time_model(frame, conditions, "direct")
    ok = frame[frame["success"] == 1]
    fit = smf.mixedlm("time_s ~ C(condition, Treatment(reference='direct')) + C(task)", ok,
                      groups=ok["participant"]).fit(reml=True)  # fmt: skip
    for e in ours["effects"]:
        name = f"C(condition, Treatment(reference='direct'))[T.{e['condition']}]"
        assert e["effect"] == pytest.approx(fit.params[name], rel=1e-6)
        assert (e["lo"], e["hi"]) == pytest.approx(tuple(fit.conf_int().loc[name]), rel=1e-6)
    ours = models.success_model(frame, conditions, "direct")
    model = smf.gee("success ~ C(condition, Treatment(reference='direct')) + C(task)", "participant", frame,
                    family=sm.families.Binomial(), cov_struct=sm.cov_struct.Exchangeable())  # fmt: skip
    # statsmodels' Mancl-DeRouen bias-reduced sandwich, and scipy's t quantile on G - 1 = 11 degrees of freedom
    gee, robust = model.fit(cov_type="bias_reduced"), model.fit()
    t = stats.t(df=frame["participant"].nunique() - 1)
    for e in ours["effects"]:
        name = f"C(condition, Treatment(reference='direct'))[T.{e['condition']}]"
        assert e["effect"] == pytest.approx(gee.params[name], rel=1e-5)
        assert e["odds_ratio"] == pytest.approx(np.exp(gee.params[name]), rel=1e-5)
        half = t.ppf(0.975) * gee.bse[name]
        assert (e["lo"], e["hi"]) == pytest.approx((gee.params[name] - half, gee.params[name] + half), rel=1e-5)
        assert e["p"] == pytest.approx(2 * t.sf(abs(gee.params[name]) / gee.bse[name]), rel=1e-5)
        # the correction widens the interval over the plain robust one (Mancl and DeRouen 2001: the sandwich
        # is biased low with few clusters)
        assert e["hi"] - e["lo"] > float(np.diff(robust.conf_int().loc[name])[0])


def test_a_planted_effect_is_found_with_the_right_sign_and_covered():
    """Decoder planted 3 s faster than direct and +1.0 log-odds more successful (blend: 1 s, +0.3)."""
    frame = _study_frame(seed=5, people=16)
    effects = {e["condition"]: e for e in models.time_model(frame, ["direct", "decoder", "blend"], "direct")["effects"]}
    assert effects["decoder"]["effect"] < 0 and effects["decoder"]["lo"] <= -3.0 <= effects["decoder"]["hi"]
    assert effects["blend"]["lo"] <= -1.0 <= effects["blend"]["hi"]
    odds = {e["condition"]: e for e in models.success_model(frame, ["direct", "decoder", "blend"], "direct")["effects"]}
    assert odds["decoder"]["effect"] > 0 and odds["decoder"]["lo"] <= 1.0 <= odds["decoder"]["hi"]
    wide = paired.per_participant(frame[frame["success"] == 1], "time_s", ["direct", "decoder", "blend"])
    diff = paired.pairwise(wide, np.random.default_rng(1), resamples=200).set_index(["first", "second"])
    row = diff.loc[("direct", "decoder")]  # direct minus decoder: planted +3 s
    assert row["mean_difference"] > 0 and row["mean_difference_lo"] <= 3.0 <= row["mean_difference_hi"]


def test_raw_tlx_is_the_mean_of_six_subscales_and_refuses_out_of_range():
    """Raw TLX (Hart 2006): the unweighted mean of the six 0-100 subscales."""
    rating = dict(mental=60, physical=10, temporal=40, performance=30, effort=50, frustration=20)
    assert raw_tlx(rating) == pytest.approx(35.0)
    with pytest.raises(DataError, match="outside 0-100") as err:
        raw_tlx({**rating, "effort": 120})
    assert "\n" not in str(err.value)
    frame = pd.DataFrame([{f"tlx_{k}": v for k, v in rating.items()}, {f"tlx_{k}": None for k in rating}])
    col = tlx_column(frame)
    assert col[0] == pytest.approx(35.0) and np.isnan(col[1])


def test_analyze_command_end_to_end_names_bad_rows_and_writes_owner_only(tmp_path, monkeypatch, capsys):
    """Plan the shipped study, write a trial table in its long format (one corrupt row, one file without the
    columns), run `coreach study analyze` in-process."""
    from coreach import cli

    monkeypatch.chdir(tmp_path)
    assert cli.main(["study", "plan", "bedside_shelf", "study.participants=6"]) == 0
    plan = json.loads((tmp_path / ".coreach/studies/bedside_shelf/v1/plan.json").read_text())["plan"]
    codes = [p["code"] for p in plan["participants"]]
    tasks = [t["name"] for t in plan["tasks"]]
    frame = _study_frame(seed=2, people=6, trials=2)
    frame["participant"] = frame["participant"].map({f"P{k + 1:02d}": c for k, c in enumerate(codes)})
    frame["task"] = frame["task"].map(dict(zip(["lamp", "bottle", "book", "drawer"], tasks)))
    frame["condition"] = frame["condition"].map({"direct": "direct", "blend": "blend", "decoder": "decoder"})
    rng = np.random.default_rng(0)
    for s in ("mental", "physical", "temporal", "performance", "effort", "frustration"):
        frame[f"tlx_{s}"] = rng.uniform(0, 100, len(frame)).round(1)
    csv = frame.to_csv(index=False).splitlines()
    csv.insert(5, csv[5].replace(csv[5].split(",")[5], "fast"))  # time_s "fast": a corrupt row
    data = tmp_path / "trials"
    data.mkdir()
    (data / "trials.csv").write_text("\n".join(csv) + "\n")
    (data / "notes.csv").write_text("who,what\nx,y\n")
    capsys.readouterr()
    assert cli.main(["study", "analyze", "bedside_shelf", "--trials", str(data), "--bootstrap", "100"]) == 0
    out, err = capsys.readouterr()
    assert "trials.csv line 6: left out, time_s 'fast'" in err and "notes.csv: left out" in err
    analysis = tmp_path / ".coreach/studies/bedside_shelf/v1/analysis"
    for name in ("report.html", "by_condition.csv", "pairwise.csv", "models.csv", "friedman.csv"):
        assert stat.S_IMODE((analysis / name).stat().st_mode) == 0o600, name
    html = (analysis / "report.html").read_text()
    assert "data:image/png;base64," in html and "informed consent" in html and "time_s &#x27;fast&#x27;" in html
    assert "Friedman" in out and "informed consent" in out
    # an out-of-range TLX value is refused in one line (exit 2)
    csv[7] = csv[7].rsplit(",", 1)[0] + ",140"
    (data / "trials.csv").write_text("\n".join(csv) + "\n")
    assert cli.main(["study", "analyze", "bedside_shelf", "--trials", str(data / "trials.csv")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len([line for line in err if "error" in line]) == 1 and "outside 0-100" in err[-1]


def test_the_aggregates_for_tracking_hold_no_participant():
    """What upload_to_tracking logs: per-condition and test figures only (the MLflow call itself was checked
    by hand against a sqlite store; importing MLflow here would double this file's time)."""
    from coreach.study.analysis import aggregates, analyse

    frame = _study_frame(seed=4, people=6, trials=2)
    plan = {"conditions": [{"name": c} for c in ("decoder", "direct", "blend")], "config": {"seed": 1}}
    metrics = aggregates(analyse(frame, plan, resamples=50))
    assert metrics and not any(code in key for key in metrics for code in set(frame["participant"]))
    assert "decoder/success_rate" in metrics and "time_model/decoder/effect" in metrics
