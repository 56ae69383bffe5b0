"""`coreach recipes`: recipes x training seeds, vetted with the baselines, as one table (Markdown, CSV, JSON)."""

from __future__ import annotations

import csv
import io
import json
import shlex
import statistics
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import cli_env
from mlflow.tracking import MlflowClient
from omegaconf import OmegaConf

from coreach.commands import recipes as rc
from coreach.errors import ConfigError
from coreach.vetting.rates import wilson_interval

COREACH = str(Path(sys.executable).parent / "coreach")


def run(args, cwd):
    return subprocess.run([COREACH, *args], cwd=cwd, capture_output=True, text=True, env=cli_env(), timeout=600)


def _rate(k: int, n: int) -> dict:
    lo, hi = wilson_interval(k, n)
    return {"value": k / n, "lo": lo, "hi": hi, "n": n}


def _summary(success: tuple[int, int], late: tuple[int, int] | None = None, per_goal=None) -> dict:
    s = {"success": _rate(*success), "recovery": {"none": _rate(*success)}}
    if late is not None:
        s["recovery"].update({"0.2": _rate(1, 1), "0.8": _rate(*late)})
    if per_goal is not None:
        s["diagnosis"] = {"per_goal": per_goal, "causes": {"timeout": 0.75, "wrong_goal": 0.25}}
    return s


def _plan(**over):
    base = {"recipes": {"a": {"command": "train", "overrides": ["model=linear"]},
                        "b": {"command": "train", "overrides": []}},
            "select": None, "seeds": [0, 1, 2], "vet_suites": ["nominal", "goal-switch"], "episodes": None,
            "baselines": ["direct"], "train_overrides": [], "vet_overrides": [], "out": "res"}  # fmt: skip
    base.update(over)
    return rc.plan_from(OmegaConf.create(base))


def _fixture_result():
    """Recipe a: nominal successes 3, 9, 6 of 10 per seed; goal-switch late recovery 1, 4, 2 of 5."""
    plan = _plan()
    trained = [{"recipe": r, "seed": s, "command": "train", "run_id": f"{r}{s}" * 8, "seconds": 1.0}
               for r in ("a", "b") for s in (0, 1, 2)]  # fmt: skip
    nominal = {"a": [3, 9, 6], "b": [5, 5, 7]}
    late = {"a": [1, 4, 2], "b": [0, 5, 3]}
    goals = {"shelf": _rate(2, 4), "cup": 0.5}
    vetted = {
        "nominal": {"summaries": {}, "vet_runs": {}},
        "goal-switch": {"summaries": {}, "vet_runs": {}},
    }
    for t in trained:  # vet names candidates by their training label; the recipes stage must not rely on it
        i = t["seed"]
        label = f"label-{t['run_id']}"
        vetted["nominal"]["summaries"][label] = _summary((nominal[t["recipe"]][i], 10), per_goal=goals)
        vetted["nominal"]["vet_runs"][label] = f"vn-{t['run_id']}"
        vetted["goal-switch"]["summaries"][label] = _summary((i, 20), (late[t["recipe"]][i], 5))
    vetted["nominal"]["summaries"]["direct"] = _summary((1, 10))
    vetted["goal-switch"]["summaries"]["direct"] = _summary((0, 20), (0, 5))
    return rc.assemble(plan, trained, vetted, "cmd", [])


def test_rows_columns_and_spread_from_per_seed_values():
    result = _fixture_result()
    kinds = [(r["kind"], r["recipe"], r["seed"]) for r in result["rows"]]
    assert kinds == [("seed", r, s) for r in "ab" for s in (0, 1, 2)] + [("baseline", "direct", None)]
    ids = [c["id"] for c in result["columns"]]
    assert ids == ["nominal/success", "nominal/goal:shelf", "nominal/goal:cup", "goal-switch/success",
                   "goal-switch/recovery@0.8"]  # fmt: skip
    a = next(s for s in result["spread"] if s["recipe"] == "a")["columns"]
    assert (a["nominal/success"]["min"], a["nominal/success"]["median"], a["nominal/success"]["max"]) == (0.3, 0.6, 0.9)
    assert a["nominal/success"]["worst_lo"] == pytest.approx(wilson_interval(3, 10)[0])
    assert (a["goal-switch/recovery@0.8"]["min"], a["goal-switch/recovery@0.8"]["median"],
            a["goal-switch/recovery@0.8"]["max"]) == (0.2, 0.4, 0.8)  # fmt: skip
    assert a["nominal/goal:cup"] == {"min": 0.5, "median": 0.5, "max": 0.5, "worst_lo": None, "seeds": 3}
    # the baseline's cells are its own, and vetting run ids follow the candidates' order
    direct = result["rows"][-1]["suites"]
    assert direct["nominal"]["success"]["value"] == 0.1 and direct["goal-switch"]["recovery"]["0.8"]["value"] == 0.0
    assert result["rows"][0]["suites"]["nominal"]["vetting_run"] == "vn-" + "a0" * 8
    assert result["rows"][0]["suites"]["nominal"]["diagnosis"]["causes"] == {"timeout": 0.75, "wrong_goal": 0.25}


def test_markdown_and_csv_carry_the_same_numbers():
    result = _fixture_result()
    md = rc.markdown(result).splitlines()
    assert md[:3] == ["```sh", "cmd", "```"]
    table = [ln for ln in md if ln.startswith("| a |")]
    assert len(table) == 4  # three seeds and the spread
    assert "0.30 / 0.60 / 0.90" in table[3] and "0.20 / 0.40 / 0.80" in table[3]
    assert "| 0.30 [0.11, 0.60] |" in table[0]
    rows = list(csv.DictReader(io.StringIO(rc.csv_text(result))))
    per_seed = [float(r["value"]) for r in rows if r["kind"] == "seed" and r["recipe"] == "b"
                and r["suite"] == "goal-switch" and r["metric"] == "recovery@0.8"]  # fmt: skip
    (sp,) = [r for r in rows if r["kind"] == "spread" and r["recipe"] == "b" and r["metric"] == "recovery@0.8"]
    assert per_seed == [0.0, 1.0, 0.6]
    assert (float(sp["min"]), float(sp["median"]), float(sp["max"])) == (0.0, 0.6, 1.0)


def test_per_goal_shapes_and_absence():
    assert rc.per_goal({"success": {}}) == {}
    listed = {"diagnosis": {"per_goal": [{"goal": "cup", "value": 0.5, "lo": 0.1, "hi": 0.9, "n": 4}]}}
    assert rc.per_goal(listed) == {"cup": {"value": 0.5, "lo": 0.1, "hi": 0.9, "n": 4}}
    nested = {"diagnosis": {"per_goal": {"cup": {"success": {"value": 0.25, "lo": 0.0, "hi": 0.7, "n": 4}}}}}
    assert rc.per_goal(nested)["cup"]["value"] == 0.25
    assert rc.latest_switch({"none": {}, "0.2": {}, "0.8": {}, "0.5": {}}) == "0.8"
    assert rc.latest_switch({"none": {}}) is None


@pytest.mark.parametrize(
    "over, needle",
    [
        ({"seeds": []}, "option seeds: expected a non-empty list of training seeds"),
        ({"seeds": [0, 10000]}, "option seeds"),
        ({"select": ["a", "zz"]}, "known recipes: a, b"),
        ({"recipes": {"a": {"command": "fly"}}}, "expected one of train, aggregate"),
        ({"recipes": {"a": {"command": "train", "extra": 1}}}, "recipes.a.extra"),
        ({"baselines": ["direct", "nope"]}, "blend, direct"),
        ({"episodes": 0}, "option episodes"),
    ],
)
def test_bad_options_name_the_option(over, needle):
    with pytest.raises(ConfigError) as err:
        _plan(**over)
    assert needle in str(err.value)


def test_recipe_commands_go_through_the_command_table(monkeypatch):
    import dataclasses

    from coreach.commands import table
    from coreach.training.run import train

    monkeypatch.delitem(table.COMMANDS, "aggregate", raising=False)
    with pytest.raises(ConfigError, match="'aggregate' is not available"):
        rc.stage_command("aggregate", "option recipes.x.command")
    stand_in = dataclasses.replace(table.COMMANDS["train"], name="aggregate")
    monkeypatch.setitem(table.COMMANDS, "aggregate", stand_in)
    assert rc.stage_command("aggregate", "w") == ("train", train)


@pytest.mark.parametrize(
    "args, needle",
    [
        (["seeds=[]"], "coreach: error: option seeds: expected a non-empty list of training seeds"),
        (["select=[cvae,nope]"], "known recipes: cvae, cvae+goal_entropy"),
        (["recipes.cvae.command=fly"], "expected one of train, aggregate"),
        (['recipes.cvae.overrides=["model=nope"]'], "recipe cvae (seed 0)"),
        (["vet_suites=[no-such-suite]"], "option vet_suites"),
    ],
    ids=["empty seeds", "unknown label", "unknown command", "bad recipe override", "unknown suite"],
)
def test_bad_input_through_the_cli_is_one_line(workdir, args, needle):
    res = run(["recipes", *args], workdir)
    assert res.returncode == 2
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("coreach: error:") and needle in lines[0], res.stderr
    assert "Traceback" not in res.stderr and res.stdout == ""
    assert not (workdir / "mlflow.db").exists()  # nothing trained, nothing recorded


TINY_SUITE = """name: tiny
scenario: bedside_shelf
operator: expert
switch_fractions: [null]
episodes: 5
seed: 10000
horizon_s: 6.0
dt: 0.1
layout_jitter: 0.02
start_jitter: 0.05
"""


@pytest.mark.slow
def test_two_recipes_two_seeds_end_to_end(workdir):
    (workdir / "tiny.yaml").write_text(TINY_SUITE)
    args = ['+recipes.lin={command:train,overrides:["model=linear","loss=[reconstruction]"]}',
            "select=[lin,cvae]", "seeds=[3,5]", f"vet_suites=[{workdir / 'tiny.yaml'}]", "episodes=2",
            "baselines=[direct,blend]", 'train_overrides=["dataset.episodes=24","trainer.max_epochs=1"]',
            "out=res"]  # fmt: skip
    res = run(["--json", "recipes", *args], workdir)
    assert res.returncode == 0, res.stderr
    out = json.loads(res.stdout)
    assert "[1/4] train lin seed 3" in res.stderr and "[4/4] train cvae seed 5" in res.stderr

    # rows: every recipe-seed and baseline, in that order; spreads from the per-seed values
    assert [(r["kind"], r["recipe"], r["seed"]) for r in out["rows"]] == [
        ("seed", "lin", 3), ("seed", "lin", 5), ("seed", "cvae", 3), ("seed", "cvae", 5),
        ("baseline", "direct", None), ("baseline", "blend", None)]  # fmt: skip
    for sp in out["spread"]:
        values = [r["suites"]["tiny"]["success"]["value"] for r in out["rows"] if r["recipe"] == sp["recipe"]]
        s = sp["columns"]["tiny/success"]
        assert s["min"] <= s["median"] <= s["max"]
        assert (s["min"], s["median"], s["max"]) == (min(values), statistics.median(values), max(values))
        assert s["worst_lo"] == min(r["suites"]["tiny"]["success"]["lo"] for r in out["rows"]
                                    if r["recipe"] == sp["recipe"])  # fmt: skip
    assert all(r["suites"]["tiny"]["success"]["n"] == 2 for r in out["rows"])

    # the files: Markdown starts with the command that reproduces it, CSV and JSON agree with stdout
    folder = workdir / "res"
    md = (folder / "results.md").read_text().splitlines()
    assert md[0] == "```sh"
    words = shlex.split(md[1])
    assert words[:2] == [".venv/bin/coreach", "recipes"] and words[2:] == args
    from coreach.config.check import compose_config

    again = compose_config("recipes", words[2:])
    assert list(again.select) == ["lin", "cvae"] and list(again.seeds) == [3, 5]
    assert OmegaConf.to_container(again.recipes.lin) == out["recipes"]["lin"]
    main, _, after = "\n".join(md).partition("Simulated operators in simulation.")
    assert sum(ln.startswith(("| lin |", "| cvae |")) for ln in main.splitlines()) == 6  # 2 x (2 seeds + spread)
    # the separation table: one row per seed (no spread rows) and baseline, one cell per suite, with the
    # contact and keep-out counts first (the tiny suite's scene has the shelf's bodies)
    sep = [ln for ln in after.splitlines() if ln.startswith(("| lin |", "| cvae |"))]
    assert len(sep) == 4 and all(len(ln.split("|")) == 5 for ln in sep)
    assert all(ln.split("|")[3].strip().split(" / ")[:2] == ["0", "0"] for ln in sep)
    assert json.loads((folder / "results.json").read_text())["rows"] == out["rows"]
    rows = list(csv.DictReader((folder / "results.csv").open()))
    # a no-switch suite gets a success column per goal its episodes ended at (2 episodes: 2 goals), from the
    # vetting diagnosis; each seed row's goal rates pool back to its overall success
    goal_cols = [c for c in out["columns"] if c["metric"] == "goal"]
    assert len(goal_cols) == 2
    for r in out["rows"]:
        per_goal = r["suites"]["tiny"]["per_goal"]
        assert sum(g["value"] * g["n"] for g in per_goal.values()) == pytest.approx(r["suites"]["tiny"]["success"]["value"] * 2)
    per_row = 1 + len(goal_cols)
    assert len([r for r in rows if r["kind"] == "seed"]) == 4 * per_row
    assert len([r for r in rows if r["kind"] == "spread"]) == 2 * per_row

    # MLflow: a parent run with the files; every training and vetting run nested under it
    client = MlflowClient(f"sqlite:///{workdir / 'mlflow.db'}")
    parent = client.get_run(out["parent_run"])
    assert parent.data.tags["coreach.stage"] == "recipes" and parent.info.status == "FINISHED"
    assert {a.path for a in client.list_artifacts(parent.info.run_id)} == {
        "results.md", "results.csv", "results.json", "runs.json"}  # fmt: skip
    runs_file = json.loads(Path(client.download_artifacts(parent.info.run_id, "runs.json", str(workdir))).read_text())
    assert [t["run_id"] for t in runs_file["trainings"]] == [r["training_run"] for r in out["rows"][:4]]
    assert len(runs_file["vettings"]["tiny"]) == 6
    for r in out["rows"]:
        vet_run = client.get_run(r["suites"]["tiny"]["vetting_run"])
        assert vet_run.data.tags["mlflow.parentRunId"] == parent.info.run_id
        if r["training_run"]:
            train_run = client.get_run(r["training_run"])
            assert train_run.data.tags["coreach.recipe"] == r["recipe"]
            assert train_run.data.params["seed"] == str(r["seed"])


def test_terminal_summary_prints_table_and_command(capsys):
    from coreach.commands.summaries import print_summary

    result = _fixture_result()
    result.update(command=rc.command_line(["seeds=[0,1]", "vet_suites=[/x/[y].yaml]"]), parent_run="p" * 32,
                  tracking="sqlite:///m.db", files={"markdown": "res/results.md"})  # fmt: skip
    print_summary("recipes", [result], as_json=False)
    out = capsys.readouterr().out
    assert "0.30 / 0.60 / 0.90" in out and "direct" in out
    assert "reproduce with: .venv/bin/coreach recipes 'seeds=[0,1]' 'vet_suites=[/x/[y].yaml]'" in out
