"""Vetting report: valid PNG plots read back by matplotlib, one self-contained HTML file, the terminal table."""

from __future__ import annotations

import base64
import html
import io
import math
import re

import matplotlib.image as mpimg
import pytest
import torch
from rich.console import Console

from coreach.context import ContextSpec, build_context
from coreach.control.safety_filter import SEPARATION
from coreach.errors import ConfigError
from coreach.decoder.torch_interface import DecoderInterface
from coreach_plugins.interface.direct import DirectControl
from coreach.world.urdf_arm import UrdfArm
from coreach.decoder.policy import DecoderPolicy
from coreach.world.scenario import load_scenario
from coreach.vetting.metrics import summarise
from coreach.vetting.records import LoopState, RolloutRecord
from coreach.vetting.separation_metrics import FIGURES
from coreach.vetting.diagnosis import CAUSES
from coreach.vetting.diagnosis_report import cause_table
from coreach.vetting.report import (
    LABELS,
    TERMINAL_SEPARATION,
    plot_action_maps,
    separation_tables,
    standard_plots,
    state_from_record,
    states_at_confidence,
    terminal_table,
    write_report,
)

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # the PNG file signature (PNG specification, section 5.2)


def record(name: str, seed: int, E: int = 30, T: int = 40) -> RolloutRecord:
    """A random but well-formed record (3 goals, switch cells none / 0.3 / 0.7)."""
    g = torch.Generator().manual_seed(seed)
    success = torch.rand(E, generator=g) < 0.7
    success_step = torch.where(success, torch.randint(10, T, (E,), generator=g), torch.full((E,), -1))
    sf = torch.tensor([float("nan"), 0.3, 0.7]).repeat(E // 3)
    belief = torch.softmax(torch.cumsum(torch.randn(E, T + 1, 3, generator=g, dtype=torch.float64), 1), -1)
    error = torch.exp(-0.1 * torch.arange(T + 1, dtype=torch.float64))[None] + 0.01 * torch.rand(E, T + 1, generator=g)
    return RolloutRecord(
        interface=name, suite="unit", goal_names=["a", "b", "c"], dt=0.1,
        goal_initial=torch.zeros(E, dtype=torch.long), goal_final=torch.arange(E) % 3,
        switch_step=torch.full((E,), -1), switch_fraction=sf, success=success, success_step=success_step,
        ee_path=torch.cumsum(0.01 * torch.rand(E, T + 1, 3, generator=g, dtype=torch.float64), 1), belief=belief,
        belief_at_switch=torch.where(torch.isnan(sf), float("nan"), 0.5), error=error,
        limit_scaled=torch.rand(E, T, generator=g) < 0.05, reachable=torch.rand(E, T, generator=g) < 0.9,
        stick_gain=0.3 + 0.1 * torch.rand(E, T, generator=g, dtype=torch.float64), mode_switches=torch.zeros(E),
    )  # fmt: skip


@pytest.fixture(scope="module")
def summaries():
    return {"cvae": summarise(record("cvae", 0)), "direct": summarise(record("direct", 1))}


@pytest.fixture(scope="module")
def state():
    robot = UrdfArm()
    layout = load_scenario("bedside_shelf").sample_layouts(2, torch.Generator().manual_seed(0))
    q = robot.q_home.to(torch.float64).expand(2, -1).clone()
    pos, rot = robot.fk(q)
    belief = torch.full((2, 4), 0.25, dtype=torch.float64)
    ctx = build_context(q, pos, rot, belief, layout.targets, layout.approach_rot)
    return LoopState(0, q, pos, rot, robot.jacobian(q), belief, layout.targets, layout.approach_rot, ctx,
                     torch.zeros(2, dtype=torch.long), 0.1)  # fmt: skip


def read_png(path) -> None:
    data = path.read_bytes()
    assert data.startswith(PNG_SIGNATURE)
    img = mpimg.imread(path)  # matplotlib decodes it: a valid image
    assert img.ndim == 3 and img.shape[0] > 100 and img.shape[1] > 100


def test_standard_plots_are_valid_pngs(summaries, tmp_path):
    paths = standard_plots(summaries, tmp_path / "plots")
    assert [p.name for p in paths] == ["belief_traces.png", "recovery.png", "ultimate_bound.png"]
    for p in paths:
        read_png(p)
    assert sorted(x.name for x in (tmp_path / "plots").iterdir()) == sorted(p.name for p in paths)  # no temp left


def test_states_at_confidence_rebuild_the_context(state):
    st = states_at_confidence(state, episode=1, goal=2, levels=(None, 0.6, 0.95))
    assert torch.allclose(st.belief[:, 2], torch.tensor([0.25, 0.6, 0.95], dtype=torch.float64))
    assert torch.allclose(st.belief.sum(-1), torch.ones(3, dtype=torch.float64))
    cols = ContextSpec(dof=7, n_goals=4).columns(["belief"])
    assert torch.equal(st.context[:, cols], st.belief)
    assert torch.equal(st.q[0], state.q[1]) and st.context.shape == (3, state.context.shape[1])


def test_action_maps_for_decoder_and_direct(state, tmp_path):
    torch.manual_seed(0)
    policy = DecoderPolicy.build(
        {"_target_": "coreach_plugins.model.cvae.BeliefCVAE", "latent_dim": 2, "hidden": [32, 32]},
        ContextSpec(dof=7, n_goals=4), 7,
    )  # fmt: skip
    for iface in (DecoderInterface(policy, "cvae"), DirectControl()):
        path = plot_action_maps(iface, state, tmp_path / f"map_{iface.name}.png", goal=1, goal_names=list("abcd"))
        read_png(path)


def test_report_is_one_self_contained_html_file(summaries, tmp_path):
    plots = standard_plots(summaries, tmp_path / "plots")
    out = tmp_path / "report"
    path = write_report(summaries, plots, out, "Vetting <unit>", {"suite": "unit", "seed": 0})
    assert path.parent == out and [p.name for p in out.iterdir()] == ["report.html"]
    text = path.read_text(encoding="utf-8")
    srcs = re.findall(r'src="([^"]*)"', text)
    assert len(srcs) == len(plots) and all(s.startswith("data:image/png;base64,") for s in srcs)
    for s in srcs:
        data = base64.b64decode(s.split(",", 1)[1])
        assert data.startswith(PNG_SIGNATURE)
        assert mpimg.imread(io.BytesIO(data), format="png").ndim == 3
    assert "href=" not in text and "<link" not in text and "<script" not in text
    assert "Vetting &lt;unit&gt;" in text  # the title is escaped, not injected
    for phrase in ("not a medical device", "ISO 10218-1/-2", "ISO/TS 15066", "ethics review", "emergency stop"):
        assert phrase in text
    r = summaries["cvae"]["success"]
    assert f"{r['value']:.2f} [{r['lo']:.2f}, {r['hi']:.2f}] (n={r['n']})" in text  # intervals appear beside the rates


def test_terminal_table(summaries):
    table = terminal_table(summaries)
    assert table.row_count == 2
    console = Console(record=True, width=220)
    console.print(table)
    out = console.export_text()
    assert "cvae" in out and "direct" in out and "n=30" in out
    assert not math.isnan(summaries["cvae"]["success"]["value"])
    # the terminal names the figures as the HTML report does, never by the summary's keys
    assert LABELS["limit_share"] in out and LABELS["stick_gain_median"] in out
    assert "limit_scaled" not in out and "stick_gain" not in out


def test_cause_table_uses_the_reports_words():
    """The terminal's cause table names the causes with CAUSES' sentences, as the HTML section does."""
    diag = {"failures": 2, "causes": {c: 0 for c in CAUSES}, "cause_share": {c: 0.0 for c in CAUSES}}
    diag["causes"]["no_way"], diag["cause_share"]["no_way"] = 2, 1.0
    console = Console(record=True, width=80)
    console.print(cause_table({"cvae": {"n_episodes": 10, "diagnosis": diag}}))
    out = console.export_text()
    assert CAUSES["no_way"] in out and "no_way" not in out and "1.00" in out


def test_action_map_from_a_visited_state_of_a_record(state, tmp_path):
    robot = UrdfArm()
    rec = record("direct", 2, E=3, T=12)
    pick = torch.tensor([0, 1, 1])  # three recorded episodes from the two states of the fixture
    rec.extras = {"q": state.q[pick, None].expand(3, 13, 7).clone(), "goal_targets": state.goal_targets[pick]}
    with pytest.raises(ConfigError, match="goal_rot"):
        state_from_record(rec, robot)
    rec.belief = torch.full((3, 13, 4), 0.25, dtype=torch.float64)  # 4 goals, like the scene of `state`
    st = state_from_record(rec, robot, episode=1, step=3, goal_rot=state.goal_rot[pick])
    # The rebuilt context is the one the loop would have built (same function, same inputs).
    torch.testing.assert_close(st.context, state.context[1:2])
    read_png(plot_action_maps(DirectControl(), st, tmp_path / "map.png", goal=0))


# ---- separation from the scene's bodies ----

WORLD = {"furniture": ["shelf", "bed"], "person": ["head"], "clearance": 0.02, "keep_out": 0.18, "reduced_zone": 0.23,
         "excess_tol": 0.01}


def record_with_bodies(name: str, seed: int) -> RolloutRecord:
    """The random record above with constructed separation extras: episode 2 touches furniture for one step
    (4 mm deep), episode 4 (final goal b) spends the whole horizon in the reduced-speed zone and 3 steps in the
    keep-out zone, the separation filter scales episode 1's first 10 commands."""
    rec = record(name, seed)
    E, T = rec.limit_scaled.shape
    sep_f = torch.full((E, T + 1), 0.3, dtype=torch.float64)
    sep_f[2, 5] = -0.004
    sep_p = torch.full((E, T + 1), 0.5, dtype=torch.float64)
    sep_p[4] = 0.2
    sep_p[4, 7:10] = 0.15
    limits = torch.zeros(E, T, dtype=torch.uint8)
    limits[1, :10] = SEPARATION
    rec.extras = {"sep_furniture": sep_f, "sep_person": sep_p, "sep_self": torch.full((E, T + 1), 0.06),
                  "person_excess": torch.zeros(E, T, dtype=torch.bool), "limits": limits, "world": WORLD}  # fmt: skip
    return rec


def test_separation_tables_and_report_section(tmp_path):
    s = {"cvae": summarise(record_with_bodies("cvae", 0)), "direct": summarise(record("direct", 1))}
    tables = separation_tables(s)
    assert [t.title for t in tables] == ["separation from the scene's bodies (link surfaces; m)",
                                         "separation per final goal"]
    assert [t.row_count for t in tables] == [1, 3]  # only the record with bodies; its 3 final goals
    console = Console(record=True, width=400)
    for t in tables:
        console.print(t)
    text = console.export_text()
    for key in TERMINAL_SEPARATION:
        assert FIGURES[key] in text
    # rows by their first two cells: interface/closest furniture in the first table, interface/goal in the second
    rows = {ln.split("│")[1].strip() + "/" + ln.split("│")[2].strip(): [c.strip() for c in ln.split("│")[1:-1]]
            for ln in text.splitlines() if ln.startswith("│")}  # fmt: skip
    held = f"{10 / (30 * 40):.3f}"
    # closest furniture, closest person, contact steps, keep-out steps, zone time, excess steps, held share
    assert rows["cvae/-0.004"] == ["cvae", "-0.004", "0.150", "1", "3", f"{41 * 0.1 / 30:.1f}", "0", held]
    # final goal b: episodes 1, 4, 7, ... (goal e % 3), so both episode 1's held steps and episode 4's zone time
    assert rows["cvae/b"] == ["cvae", "b", "0.300", "0.150", "0", "3", f"{41 * 0.1 / 10:.1f}", "0",
                              f"{10 / (10 * 40):.3f}"]
    assert rows["cvae/a"][2:] == ["0.300", "0.500", "0", "0", "0.0", "0", "0.000"]
    assert rows["cvae/c"][2:5] == ["-0.004", "0.500", "1"]  # episode 2's goal: 2 % 3

    page = write_report(s, [], tmp_path, "unit", {}).read_text(encoding="utf-8")
    assert "Separation from the scene" in page and "keep-out distance of 18 cm" in page
    assert "at least 2 cm from furniture" in page and "within 23 cm of the person" in page
    for label in FIGURES.values():
        assert html.escape(label) in page
    assert "<td>-0.004</td>" in page and "<td>shelf" not in page  # figures in cells, names only in the words
    no_bodies = write_report({"direct": s["direct"]}, [], tmp_path / "plain", "unit", {}).read_text(encoding="utf-8")
    assert "Separation" not in no_bodies and separation_tables({"direct": s["direct"]}) == []
