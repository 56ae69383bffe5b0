"""coreach study plan: the Williams design, the frozen schedule (hash, versions, permissions, codes) and the
command's one-line refusals."""

from __future__ import annotations

import itertools
import json
import os
import stat
import subprocess
import sys
from pathlib import Path

import pytest

from coreach.errors import ConfigError
from coreach.runtime.manifest import BundleError
from coreach.study.codes import check_codes
from coreach.study.plan import PLAN_FILE, build_plan, compose_study, freeze, plan_hash, read_plan
from coreach.study.williams import carry_over_counts, williams_rows

REPO = Path(__file__).resolve().parents[1]


# ---- the Williams design


@pytest.mark.parametrize("n", [2, 3, 4, 5, 6])
def test_williams_design_is_balanced_for_first_order_carry_over(n):
    """Williams (1949): in a design balanced for residual (carry-over) effects every condition immediately
    follows every other one equally often, and each square is a Latin square (each condition once per row and
    once per position). Odd n needs the square and its mirror image, 2n sequences."""
    rows = williams_rows(n)
    assert len(rows) == (n if n % 2 == 0 else 2 * n)
    for row in rows:
        assert sorted(row) == list(range(n))
    squares = [rows] if n % 2 == 0 else [rows[:n], rows[n:]]
    for square in squares:
        for position in range(n):
            assert sorted(r[position] for r in square) == list(range(n))
    counts = carry_over_counts(rows, n)
    assert set(counts.values()) == {1 if n % 2 == 0 else 2}


def _same_up_to_relabelling(a: list[list], b: list[list]) -> bool:
    """Equal after renaming the conditions and reordering the rows (the sequences given to participants)."""
    symbols_a = sorted({x for r in a for x in r})
    symbols_b = sorted({x for r in b for x in r})
    target = sorted(tuple(r) for r in b)
    for perm in itertools.permutations(symbols_b):
        rename = dict(zip(symbols_a, perm))
        if sorted(tuple(rename[x] for x in r) for r in a) == target:
            return True
    return False


def test_the_four_condition_square_is_williams_1949():
    """Williams, E. J. (1949), "Experimental designs balanced for the estimation of residual effects of
    treatments", Aust. J. Sci. Res. A2:149-168: the square for four treatments, QUOTED FROM MEMORY as it is
    usually reproduced (rows are sequences, columns periods):
        A B D C / B C A D / C D B A / D A C B"""
    published = [list("ABDC"), list("BCAD"), list("CDBA"), list("DACB")]
    assert _same_up_to_relabelling(williams_rows(4), published)
    # and the comparison is not vacuous: a cyclic Latin square (not carry-over balanced) does not match
    assert not _same_up_to_relabelling([[(i + j) % 4 for j in range(4)] for i in range(4)], published)


# ---- the plan


@pytest.fixture(scope="module")
def study() -> dict:
    return compose_study("bedside_shelf", [])


def test_the_shipped_study_composes_and_plans(study):
    """The shipped example: a bundle reference, direct and blend; four tasks on the bedside shelf's goals
    (conf/coreach_conf/scenario/bedside_shelf.yaml), one with a goal change part-way."""
    assert [c["kind"] for c in study["conditions"]] == ["bundle", "direct", "blend"]
    assert len(study["tasks"]) == 4 and any(t["switch_to"] for t in study["tasks"])
    assert study["pilot"] is False and study["upload_to_tracking"] is False
    plan = build_plan(study)
    rows = plan["design"]["rows"]
    assert len(rows) == 6  # three conditions: the square and its mirror
    for k, person in enumerate(plan["participants"]):
        assert person["order"] == rows[k % len(rows)]  # participant k gets row k mod rows
        for block in person["blocks"]:
            assert sorted(block["task_order"]) == sorted(t["name"] for t in plan["tasks"])
            assert len(block["trials"]) == len(plan["tasks"]) * study["trials"]
    # the letters are a key over the conditions; pages show letters only
    assert sorted(plan["letters"]) == ["A", "B", "C"]
    assert sorted(plan["letters"].values()) == sorted(c["name"] for c in plan["conditions"])


def test_same_config_same_hash_and_a_new_seed_changes_it(study):
    a, b = build_plan(study), build_plan(dict(study))
    assert plan_hash(a) == plan_hash(b)
    assert plan_hash(build_plan({**study, "seed": study["seed"] + 1})) != plan_hash(a)


def test_codes_are_pseudonymous_and_unique(study):
    plan = build_plan({**study, "participants": 40})
    codes = [p["code"] for p in plan["participants"]]
    assert len(set(codes)) == 40
    assert all(c.startswith("P") and "-" in c and len(c.split("-")[1]) == 4 for c in codes)
    with pytest.raises(ConfigError, match="appears twice"):
        check_codes(["P01-AAAA", "p01-aaaa"], 2, "study")
    with pytest.raises(ConfigError, match="appears twice"):
        build_plan({**study, "participants": 2, "codes": ["S1", "S1"]})


def test_freezing_writes_owner_only_refuses_a_change_after_sessions_and_makes_a_new_version(study, tmp_path):
    root = tmp_path / "studies"
    plan = build_plan(study)
    first = freeze(plan, root)
    path = Path(first["path"])
    assert first["status"] == "written" and first["version"] == 1
    assert stat.S_IMODE(path.stat().st_mode) == 0o600
    assert stat.S_IMODE(path.parent.stat().st_mode) == 0o700
    assert read_plan(path)["sha256"] == plan_hash(plan)
    assert "informed consent" in " ".join(json.loads(path.read_text())["cautions"])
    assert freeze(build_plan(study), root)["status"] == "unchanged"
    # a changed config before any session replaces v1; after a session has started it is refused
    changed = build_plan({**study, "trials": study["trials"] + 1})
    assert freeze(changed, root)["status"].startswith("replaced") and freeze(changed, root)["version"] == 1
    (path.parent / "sessions" / plan["participants"][0]["code"]).mkdir(parents=True)
    before = path.read_bytes()
    with pytest.raises(ConfigError, match="session"):
        freeze(plan, root)
    assert path.read_bytes() == before
    again = freeze(plan, root, new_version=True)
    assert again["version"] == 2 and Path(again["path"]).parent.name == "v2" and path.read_bytes() == before


def test_bad_studies_are_refused_naming_the_option(study, tmp_path):
    cases = [
        ({"participants": 0}, "participants"),
        ({"trials": 0}, "trials"),
        ({"conditions": [{"kind": "bundle", "ref": str(tmp_path / "no-such-bundle")}, {"kind": "direct"}]},
         "does not exist"),
        ({"conditions": [{"kind": "joystick"}, {"kind": "direct"}]}, "unknown condition kind"),
        ({"tasks": [{"name": "x", "goal": "teapot", "switch_to": None, "switch_at_s": None}]}, "unknown goal"),
    ]
    for change, words in cases:
        with pytest.raises(ConfigError, match=words):
            build_plan({**study, **change})
    bundle = tmp_path / "bundle"
    bundle.mkdir()  # a folder, but not a release bundle: verified when the plan is made, not at the first session
    with pytest.raises(BundleError, match="manifest.json"):
        build_plan({**study, "conditions": [{"kind": "bundle", "ref": str(bundle)}, {"kind": "direct"}]})


# ---- the real command, in a subprocess: one line on stderr, exit 2


def _coreach(cwd: Path, *args: str) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(str(REPO / p) for p in ("pipeline", "plugins", "conf"))}
    return subprocess.run([sys.executable, "-m", "coreach.cli", *args], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=120)  # fmt: skip


def test_the_command_refuses_bad_input_in_one_line(tmp_path):
    r = _coreach(tmp_path, "study", "plan", "bedside_shelf", "study.participants=0")
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1 and "study.participants" in r.stderr
    r = _coreach(tmp_path, "study", "plan", "bedside_shelf", "study.conditions=[{kind:bundle,ref:./gone},{kind:blend}]")
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1 and "./gone does not exist" in r.stderr
    r = _coreach(tmp_path, "study", "plan", "bedside_shelf")
    assert r.returncode == 0 and "ethics review" in r.stdout and "informed consent" in r.stdout
    folder = tmp_path / ".coreach" / "studies" / "bedside_shelf" / "v1"
    (folder / "sessions" / "P01-TEST").mkdir(parents=True)
    before = (folder / PLAN_FILE).read_bytes()
    r = _coreach(tmp_path, "study", "plan", "bedside_shelf", "study.trials=5")
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1 and "--new-version" in r.stderr
    assert (folder / PLAN_FILE).read_bytes() == before and not (folder.parent / "v2").exists()
