"""The command table: every command answers --help from its entry, person-facing ones carry the cautions, and
a new command is one entry (help, dispatch and summary follow from it)."""

from __future__ import annotations

import dataclasses
import json

import pytest

from coreach import cli
from coreach.commands import table
from coreach.commands.table import COMMANDS, Command
from coreach.runtime.cautions import CAUTIONS, RECORDING_CAUTION

# where a person acts on what coreach made: the issue names these; the table may add more, never drop one
PERSON_FACING = ("release", "promote", "rollback", "replay", "vet", "fetch", "test-drive")


def flat(text: str) -> str:
    """Help texts are wrapped; compare words, not line breaks."""
    return " ".join(text.split())


def main(capsys, *args: str) -> tuple[int, str, str]:
    code = cli.main(list(args))
    out, err = capsys.readouterr()
    return code, out, err


@pytest.mark.parametrize("name", list(COMMANDS))
def test_every_command_answers_help(capsys, name):
    code, out, err = main(capsys, *name.split(), "--help")
    assert code == 0 and err == ""
    assert out.startswith("usage: coreach") and name in out.splitlines()[0]
    assert flat(COMMANDS[name].help) in flat(out)


def test_the_overview_and_the_bench_group_list_every_command(capsys):
    code, out, _ = main(capsys, "--help")
    assert code == 0
    for name, cmd in COMMANDS.items():
        assert f"\n  {name} " in out and flat(cmd.about) in flat(out), name
    code, out, _ = main(capsys, "bench", "--help")
    assert code == 0 and out.startswith("usage: coreach bench WHAT")
    benches = [n.split(" ", 1)[1] for n in COMMANDS if n.startswith("bench ")]
    assert len(benches) == 5
    for sub in benches:
        assert f"\n  {sub} " in out, sub


@pytest.mark.parametrize("name", PERSON_FACING)
def test_person_facing_help_ends_with_the_cautions(capsys, name):
    assert COMMANDS[name].toward_person
    _, out, _ = main(capsys, name, "--help")
    tail = flat(out.split("\nCautions\n", 1)[1])
    for caution in CAUTIONS:
        assert flat(caution) in tail, caution
    assert flat(out).endswith(flat((RECORDING_CAUTION if COMMANDS[name].records_person else CAUTIONS[-1])))


def test_test_drive_help_asks_for_ethics_review_and_consent(capsys):
    _, out, _ = main(capsys, "test-drive", "--help")
    assert "ethics review" in flat(out) and "informed consent" in flat(out)


def test_compare_and_test_drive_help_list_every_option_they_parse(capsys):
    from coreach.commands.compare import _parser
    from coreach.testdrive.command import OPTIONS

    parsed = {s for a in _parser()._actions for s in a.option_strings if s.startswith("--") and s != "--help"}
    _, out, _ = main(capsys, "compare", "--help")
    assert parsed and all(option in out for option in parsed), parsed
    _, out, _ = main(capsys, "test-drive", "--help")
    assert all(option in out for option in OPTIONS), OPTIONS


def test_every_entry_names_functions_that_exist():
    for cmd in COMMANDS.values():
        assert callable(table.load_target(cmd.run)), cmd.name
        if cmd.show:
            assert callable(table.load_target(cmd.show)), cmd.name
        assert cmd.hydra or cmd.show is None, f"{cmd.name}: a plain command prints its own output"


def test_bad_command_lines_are_one_line(capsys):
    code, out, err = main(capsys, "try-bundle", "x")  # the old name is gone, not an alias
    assert code == 2 and out == "" and len(err.strip().splitlines()) == 1 and "unknown" in err
    code, out, err = main(capsys, "bench")
    assert code == 2 and out == "" and "which one? expected one of train, sweep, runtime, vet, fuzz" in err
    code, _, err = main(capsys, "promote", "some-model", "--back")
    assert code == 2 and "usage: coreach promote NAME VERSION" in err and "Traceback" not in err


@pytest.mark.parametrize("name", [n for n, c in COMMANDS.items() if c.hydra])
def test_json_of_a_person_facing_command_carries_the_cautions(capsys, name):
    """Through the summary printer, with a stand-in summary (what a stage returns is its own business)."""
    from coreach.commands.summaries import print_summary

    print_summary(COMMANDS[name], [{"exit_code": 0}], as_json=True)
    payload = json.loads(capsys.readouterr().out)
    if COMMANDS[name].toward_person or COMMANDS[name].records_person:
        assert payload["cautions"][: len(CAUTIONS)] == list(CAUTIONS)
    else:
        assert "cautions" not in payload


def test_vet_json_carries_the_cautions(capsys, tmp_path, monkeypatch):
    """A real, small run: the baselines on one episode of each goal-switch cell, nothing logged."""
    monkeypatch.chdir(tmp_path)
    code, out, err = main(capsys, "--json", "vet", "candidates=[direct]", "suite.episodes=1", "log=false",
                          f"report_dir={tmp_path / 'report'}")  # fmt: skip
    assert code == 0, err
    payload = json.loads(out)
    assert payload["cautions"] == list(CAUTIONS) and "direct" in payload["summaries"]


def test_the_robot_command_help_and_status_end_with_the_cautions(capsys, tmp_path):
    from coreach.runtime import robot_cli

    for args in ([], ["fetch"], ["status"]):
        with pytest.raises(SystemExit) as done:
            robot_cli.parser().parse_args([*args, "--help"])
        assert done.value.code == 0
        out = capsys.readouterr().out
        assert flat(CAUTIONS[0]) in flat(out) and flat(out).endswith(flat(CAUTIONS[-1])), args
    assert robot_cli.main(["status", "--cache", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert "no bundles fetched" in out and flat(out).endswith(flat(CAUTIONS[-1]))
    assert robot_cli.main(["status", "--cache", str(tmp_path), "--json"]) == 0
    assert json.loads(capsys.readouterr().out) == {"bundles": [], "cautions": list(CAUTIONS)}


# ---- adding a command is one entry


def hello_command(args: list[str], as_json: bool) -> int:
    print(json.dumps({"hello": args}) if as_json else f"hello {' '.join(args)}")
    return 7 if args == ["fail"] else 0


def hello_stage(cfg) -> dict:
    return {"seed": int(cfg.reach.seed)}


def show_hello(console, summaries: list[dict], name: str) -> None:
    for s in summaries:
        console.print(f"{name}: seed {s['seed']}")


def test_a_new_command_is_one_entry(capsys, monkeypatch, tmp_path):
    monkeypatch.chdir(tmp_path)
    extra = [
        Command("hello", f"{__name__}:hello_command", about="say hello (a test's command)",
                usage="coreach hello [WORD ...]", help="Prints its words.", toward_person=True),
        Command("bench hello", f"{__name__}:hello_stage", config="check_reach", show=f"{__name__}:show_hello",
                about="a test's benchmark", usage="coreach bench hello [key=value ...]", help="Returns its seed."),
    ]  # fmt: skip
    monkeypatch.setattr(table, "COMMANDS", {**COMMANDS, **{c.name: c for c in extra}})

    _, out, _ = main(capsys, "--help")
    assert "  hello " in out and "say hello (a test's command)" in out and "  bench hello " in out
    _, out, _ = main(capsys, "bench", "--help")
    assert "  hello " in out and "a test's benchmark" in out
    code, out, _ = main(capsys, "hello", "--help")
    assert code == 0 and out.startswith("usage: coreach hello [WORD ...]") and "Cautions" in out

    code, out, _ = main(capsys, "hello", "world")
    assert code == 0 and out.startswith("hello world\nCautions")  # a person-facing plain command ends with them
    assert main(capsys, "hello", "fail")[0] == 7
    code, out, _ = main(capsys, "--json", "hello", "world")
    assert code == 0 and json.loads(out) == {"hello": ["world"]}

    code, out, err = main(capsys, "bench", "hello", "reach.seed=3")
    assert code == 0, err
    assert "bench hello: seed 3" in out and "Cautions" not in out
    code, out, _ = main(capsys, "--json", "bench", "hello", "reach.seed=4")
    assert code == 0 and json.loads(out) == {"runs": [{"seed": 4}]}


def test_a_table_entry_can_be_changed_without_touching_the_cli(monkeypatch, capsys):
    changed = dataclasses.replace(COMMANDS["plugins"], about="a different line")
    monkeypatch.setattr(table, "COMMANDS", {**COMMANDS, "plugins": changed})
    assert "a different line" in main(capsys, "--help")[1]


def test_the_test_drive_page_carries_the_cautions_with_consent():
    from coreach.testdrive.server import page_html

    page = flat(page_html().decode())
    assert "<!--CAUTIONS-->" not in page
    for caution in (*CAUTIONS, RECORDING_CAUTION):
        assert flat(caution).replace("'", "&#x27;") in page, caution


def test_the_demo_says_a_relaxed_fielded_version_is_not_for_people():
    """The demo fields a version its relaxed gate passed; its output says the alias is a demonstration on a
    simulated robot, and says nothing of the kind for a version the shipped gate passed."""
    from rich.console import Console

    from coreach.commands.summaries import print_demo_release

    for relaxed, shown in ((["episodes 10 < 50"], True), ([], False)):
        console = Console(record=True, width=200)
        print_demo_release(console, {"attempts": [], "release": {}, "fielded": {
            "name": "m", "fielded": "3", "bundle": "b", "gate_relaxed": relaxed}})  # fmt: skip
        text = console.export_text()
        assert "fielded m version 3" in text
        assert ("NOT vetted, so no robot near a person may fetch it" in text) is shown
