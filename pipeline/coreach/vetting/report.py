"""Vetting report: PNG plots (matplotlib, no display needed), one self-contained HTML file, a terminal table."""

from __future__ import annotations

import base64
import dataclasses
import html
import math
import os
import tempfile
from pathlib import Path

import numpy as np
import torch
from matplotlib.figure import Figure  # a bare Figure renders with Agg: no pyplot, no display, no global state
from rich.table import Table
from torch import Tensor

from coreach.context import build_context
from coreach.errors import ConfigError
from coreach.vetting.records import LoopState
from coreach.vetting.separation_metrics import FIGURES

CAUTION = (
    "coreach is research software, not a medical device. Nothing in this report shows that an interface is "
    "fit for use with people. That needs an ethics review, a hardware emergency stop, and speed and force "
    "limits set per ISO 10218-1/-2 and ISO/TS 15066 (and ISO 13482 for personal-care robots). Follow your "
    "local regulations and the judgement of qualified professionals."
)
SIM_NOTE = (
    "All figures come from simulated operators in simulation; intervals are 95% Wilson score intervals "
    "unless stated otherwise, and describe the simulation only."
)


def _save(fig: Figure, path: Path) -> Path:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, suffix=".png")
    os.close(fd)
    try:
        fig.savefig(tmp, format="png", dpi=110, bbox_inches="tight")
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.remove(tmp)
    return path


# ---- (a) latent action maps ----


def states_at_confidence(state, episode: int, goal: int, levels) -> object:
    """One episode's state copied once per level, with belief `level` on `goal` and the rest spread evenly
    over the other goals (None = uniform), and the context rebuilt to match. Returns a LoopState [L, ...]."""
    G = state.belief.shape[-1]
    rows = []
    for level in levels:
        if level is None or G == 1:
            b = torch.full((G,), 1.0 / G, dtype=state.belief.dtype)
        else:
            b = torch.full((G,), (1.0 - float(level)) / (G - 1), dtype=state.belief.dtype)
            b[goal] = float(level)
        rows.append(b)
    L = len(rows)

    def rep(x: Tensor) -> Tensor:
        return x[episode : episode + 1].expand(L, *x.shape[1:]).clone()

    belief = torch.stack(rows)  # [L, G]
    q, ee_pos, ee_rot, targets, goal_rot = (rep(x) for x in (state.q, state.ee_pos, state.ee_rot,
                                                              state.goal_targets, state.goal_rot))  # fmt: skip
    context = build_context(q, ee_pos, ee_rot, belief.to(q.dtype), targets, goal_rot)
    return dataclasses.replace(
        state, q=q, ee_pos=ee_pos, ee_rot=ee_rot, jac=rep(state.jac), belief=belief, goal_targets=targets,
        goal_rot=goal_rot, context=context.to(state.context.dtype), mode=torch.zeros(L, dtype=torch.long),
    )  # fmt: skip


def state_from_record(record, robot, episode: int = 0, step: int = 0, goal_rot: Tensor | None = None):
    """A visited state of a record as a one-episode LoopState (for `plot_action_maps`).

    Needs record.extras "q" [E, T+1, n] and "goal_targets" [E, G, 2, 3] (the loop stores both), and the
    approach orientations [E, G, 3, 3] from extras "goal_rot" or the `goal_rot` argument.
    """
    ex = record.extras if isinstance(record.extras, dict) else {}
    rot_goal = goal_rot if goal_rot is not None else ex.get("goal_rot")
    missing = [k for k, v in (("q", ex.get("q")), ("goal_targets", ex.get("goal_targets")), ("goal_rot", rot_goal))
               if v is None]  # fmt: skip
    if missing:
        raise ConfigError(f"record {record.interface}/{record.suite}", f"extras lack {missing} to rebuild a state")
    q = ex["q"][episode : episode + 1, step].to(torch.float64)  # [1, n]
    pos, rot = robot.fk(q)
    pos, rot, jac = pos.to(q.dtype), rot.to(q.dtype), robot.jacobian(q).to(q.dtype)
    belief = record.belief[episode : episode + 1, step].to(q.dtype)
    targets = ex["goal_targets"][episode : episode + 1].to(q.dtype)
    rot_goal = rot_goal[episode : episode + 1].to(q.dtype)
    context = build_context(q, pos, rot, belief, targets, rot_goal)
    return LoopState(step, q, pos, rot, jac, belief, targets, rot_goal, context, torch.zeros(1, dtype=torch.long),
                     float(record.dt))  # fmt: skip


def tool_velocities(interface, states, grid: int = 7) -> tuple[np.ndarray, np.ndarray]:
    """Stick points [K, 2] on a grid x grid lattice of the stick box, and the tool velocity J_lin @ act(stick)
    [L, K, 3] (m/s) at each of the L states in `states` (mode 0 for multi-mode interfaces)."""
    axis = torch.linspace(-1.0, 1.0, grid, dtype=torch.float64)
    s0, s1 = torch.meshgrid(axis, axis, indexing="xy")
    stick = torch.stack([s0.reshape(-1), s1.reshape(-1)], dim=-1)  # [K, 2]
    if hasattr(interface, "reset"):
        interface.reset(int(states.q.shape[0]), states)
    qd = interface.act(stick, states)[:, 0].to(torch.float64)  # [L, K, n]
    v = torch.einsum("lij,lkj->lki", states.jac[:, :3].to(torch.float64), qd)  # [L, K, 3]
    return stick.numpy(), v.numpy()


def draw_stick_panel(ax, stick: np.ndarray, v: np.ndarray, to_goal: np.ndarray, plane: tuple[int, int],
                     scale: float, title: str) -> None:  # fmt: skip
    """One projection of a velocity field over the stick box (v [K, 3]); the red arrow points to the goal."""
    a, b = plane
    ax.quiver(stick[:, 0], stick[:, 1], v[:, a], v[:, b], angles="xy", scale_units="xy", scale=scale, width=0.006)
    d = to_goal[[a, b]]
    if np.linalg.norm(d) > 0:
        d = d / np.linalg.norm(d) * 0.8
        ax.annotate("", xy=(d[0], d[1]), xytext=(0, 0), arrowprops={"color": "tab:red", "width": 1.5})
    ax.set_xlim(-1.25, 1.25)
    ax.set_ylim(-1.25, 1.25)
    ax.set_aspect("equal")
    ax.set_title(title, fontsize=9)
    ax.set_xlabel("stick axis 0")
    ax.set_ylabel("stick axis 1")


def arrow_scale(v: np.ndarray, grid: int) -> tuple[float, float]:
    """(longest speed, quiver scale): the fastest arrow spans 90% of a grid cell, the same in every panel."""
    top = float(np.linalg.norm(v, axis=-1).max()) or 1.0
    return top, top / (0.9 * 2.0 / max(grid - 1, 1))


PLANES = ((0, 1, "x-y"), (0, 2, "x-z"))


def plot_action_maps(
    interface,
    state,
    path: Path,
    *,
    episode: int = 0,
    goal: int = 0,
    levels=(None, 0.6, 0.95),
    goal_names: list[str] | None = None,
    grid: int = 7,
) -> Path:
    """Tool velocity J_lin @ act(stick) over a grid of the stick box, projected on x-y (top row) and x-z
    (bottom row), one column per belief level on `goal` (None = uniform); mode 0 for multi-mode interfaces.
    The red arrow points from the tool to the goal's approach point."""
    st = states_at_confidence(state, episode, goal, levels)
    stick, v = tool_velocities(interface, st, grid)
    to_goal = (st.goal_targets[0, goal, 0] - st.ee_pos[0]).to(torch.float64).numpy()
    top, scale = arrow_scale(v, grid)
    name = goal_names[goal] if goal_names else f"goal {goal}"

    fig = Figure(figsize=(3.4 * len(levels), 6.4), layout="constrained")
    axes = fig.subplots(2, len(levels), squeeze=False)
    for j, level in enumerate(levels):
        label = "uniform" if level is None else f"{float(level):.2f}"
        for i, (a, b, plane) in enumerate(PLANES):
            draw_stick_panel(axes[i][j], stick, v[j], to_goal, (a, b), scale,
                             f"{plane} velocity, belief on {name}: {label}")  # fmt: skip
    fig.suptitle(f"{interface.name}: tool velocity over the stick box (longest arrow {top:.3f} m/s)", fontsize=10)
    return _save(fig, path)


# ---- (b)-(d) comparisons across interfaces ----


def plot_belief_traces(summaries: dict[str, dict], path: Path) -> Path:
    """Mean belief on the final goal against time, one line per interface, shaded confidence interval."""
    fig = Figure(figsize=(6.4, 4.0), layout="constrained")
    ax = fig.subplots()
    for label, s in summaries.items():
        b = s["belief"]
        t = np.arange(len(b["trace_mean"])) * s["dt"]
        (line,) = ax.plot(t, b["trace_mean"], label=label)
        ax.fill_between(t, b["trace_lo"], b["trace_hi"], color=line.get_color(), alpha=0.2, linewidth=0)
    ax.set_xlabel("time (s)")
    ax.set_ylabel("belief on the final goal")
    ax.set_ylim(0, 1)
    ax.legend(fontsize=8)
    ax.set_title("Goal inference over time (mean, 95% interval of the mean)", fontsize=10)
    return _save(fig, path)


def plot_recovery(summaries: dict[str, dict], path: Path) -> Path:
    """Success against switch fraction per interface, Wilson error bars; no-switch success dashed."""
    fig = Figure(figsize=(6.4, 4.0), layout="constrained")
    ax = fig.subplots()
    n = max(len(summaries), 1)
    for i, (label, s) in enumerate(summaries.items()):
        cells = {k: v for k, v in s["recovery"].items() if k != "none"}
        xs = np.array([float(k) for k in cells])
        offset = (i - (n - 1) / 2) * 0.008  # side by side, so error bars at one fraction do not hide each other
        color = f"C{i}"
        if cells:
            y = np.array([c["value"] for c in cells.values()])
            lo, hi = np.array([c["lo"] for c in cells.values()]), np.array([c["hi"] for c in cells.values()])
            err = np.stack([y - lo, hi - y])  # [2, cells]: below and above
            ax.errorbar(xs + offset, y, yerr=err, fmt="o-", capsize=3, color=color, label=label)
        if "none" in s["recovery"]:
            ax.axhline(s["recovery"]["none"]["value"], color=color, linestyle="--", linewidth=1,
                       label=f"{label} (no switch)")  # fmt: skip
    ax.set_xlabel("goal switch at fraction of the horizon")
    ax.set_ylabel("success rate")
    ax.set_ylim(0, 1.05)
    ax.legend(fontsize=8)
    ax.set_title("Recovery after a goal switch (95% Wilson intervals)", fontsize=10)
    return _save(fig, path)


def plot_bounds(summaries: dict[str, dict], path: Path) -> Path:
    """Empirical ultimate bound w/k of the distance to the waypoint per belief-confidence bin, per interface."""
    fig = Figure(figsize=(6.4, 4.0), layout="constrained")
    ax = fig.subplots()
    bins: list[str] = []
    for s in summaries.values():
        bins += [r["bin"] for r in s["ultimate_bound"] if r["bin"] not in bins]
    x = {b: i for i, b in enumerate(bins)}
    for i, (label, s) in enumerate(summaries.items()):
        rows = [r for r in s["ultimate_bound"] if math.isfinite(r["bound"])]
        if rows:
            ax.plot([x[r["bin"]] for r in rows], [r["bound"] for r in rows], "o-", color=f"C{i}", label=label)
    ax.set_xticks(range(len(bins)), bins)
    ax.set_xlabel("belief confidence (largest goal probability)")
    ax.set_ylabel("distance bound w/k (m)")
    if ax.get_legend_handles_labels()[0]:
        ax.legend(fontsize=8)
    ax.set_title("Ultimate bound of the tool's distance to its waypoint, by belief confidence\n"
                 "(missing: too few steps, or no decay)", fontsize=10)
    return _save(fig, path)


def standard_plots(summaries: dict[str, dict], out_dir: Path) -> list[Path]:
    """Plots (b), (c), (d) for a set of summaries, written to out_dir."""
    out_dir = Path(out_dir)
    return [
        plot_belief_traces(summaries, out_dir / "belief_traces.png"),
        plot_recovery(summaries, out_dir / "recovery.png"),
        plot_bounds(summaries, out_dir / "ultimate_bound.png"),
    ]


# ---- text ----


def fmt_num(value, digits: int = 3) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "–"
    if isinstance(value, float) and math.isinf(value):
        return "∞"
    return f"{value:.{digits}g}" if isinstance(value, float) else str(value)


def fmt_rate(r: dict) -> str:
    """Rate, interval and count: 0.80 [0.63, 0.90] (n=30)."""
    if r["n"] == 0:
        return "– (n=0)"
    return f"{r['value']:.2f} [{r['lo']:.2f}, {r['hi']:.2f}] (n={r['n']})"


# Summary figure -> the words the HTML report and the terminal table both show for it (one wording, so a reader
# of either meets the same names; a summary's own keys stay internal).
LABELS = {
    "suite": "suite",
    "success": "success",
    "worst_recovery": "worst recovery after a goal switch",
    "time_to_success": "time to success, s: median [IQR]",
    "path_efficiency": "path efficiency (mean, successes)",
    "belief_at_switch": "belief on original goal at switch (mean)",
    "limit_share": "limit scalings: share of steps",
    "limit_episodes": "episodes with any limit scaling",
    "stick_gain": "stick gain, rad/s per stick: median / 5th pct",
    "stick_gain_median": "stick gain, rad/s per stick: median",
    "reachability": "states where every goal was reachable",
    "mode_switches": "mode switches per episode (mean)",
}


def _rows(s: dict) -> list[tuple[str, str]]:
    t, a, eff, b = s["time_to_success"], s["stick_gain"], s["path_efficiency"], s["belief"]
    flag = " — COLLAPSED" if a["collapsed"] else ""
    return [
        (LABELS["suite"], str(s["suite"])),
        (LABELS["success"], fmt_rate(s["success"])),
        (LABELS["time_to_success"], f"{fmt_num(t['median'])} [{fmt_num(t['q25'])}, {fmt_num(t['q75'])}] (n={t['n']})"),
        (LABELS["path_efficiency"], f"{fmt_num(eff['mean'])} (n={eff['n']})"),
        (LABELS["belief_at_switch"], f"{fmt_num(b['at_switch_original_mean'])} (n={b['at_switch_n']})"),
        (LABELS["limit_share"], fmt_num(s["limit_scaled"]["step_share"])),
        (LABELS["limit_episodes"], fmt_rate(s["limit_scaled"]["episodes_with_any"])),
        (LABELS["stick_gain"], f"{fmt_num(a['median'])} / {fmt_num(a['p05'])}{flag}"),
        (LABELS["reachability"], fmt_num(s["reachability"]["share"])),
        (LABELS["mode_switches"], fmt_num(s["mode_switches"]["mean"])),
    ]  # fmt: skip


# ---- separation from the scene's bodies (summary["separation"], coreach.vetting.separation_metrics) ----

# the figures a terminal shows (the report shows every figure of FIGURES)
TERMINAL_SEPARATION = ("min_furniture_m", "min_person_m", "contact_steps", "keep_out_steps", "zone_time_s",
                       "excess_steps", "held_share")  # fmt: skip


def fmt_separation(key: str, value) -> str:
    """A separation figure as a table shows it: distances in m to the millimetre ("none" where there was nothing
    to measure, e.g. no person in the scene), counts as integers, the zone time to 0.1 s, the share to 0.001."""
    if key.endswith("_m") and (value is None or math.isinf(value)):
        return "none"
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "–"
    if key.endswith("_m"):
        return f"{value:.3f}"
    if key == "zone_time_s":
        return f"{value:.1f}"
    if key == "held_share":
        return f"{value:.3f}"
    return str(int(value))


def separation_rows(summaries: dict[str, dict], keys, per_goal: bool = False) -> list[list[str]]:
    """Rows [interface, (goal,) figures...] of the summaries that carry separation figures."""
    rows = []
    for label, s in summaries.items():
        sep = s.get("separation")
        if not sep:
            continue
        scopes = list(sep["per_goal"].items()) if per_goal else [(None, sep["all"])]
        for goal, figs in scopes:
            rows.append([label] + ([goal] if per_goal else []) + [fmt_separation(k, figs.get(k)) for k in keys])
    return rows


def world_words(world: dict) -> str:
    """The world's distances in a sentence (plain text)."""
    def cm(v: float) -> str:
        return f"{v * 100:.0f} cm"

    furniture, person = world.get("furniture") or [], world.get("person") or []
    parts = [f"The scene has {len(furniture)} furniture bodies ({', '.join(furniture) or 'none'}) and "
             f"{len(person)} person bodies ({', '.join(person) or 'none'}). The separation filter keeps every link "
             f"at least {cm(world['clearance'])} from furniture and from the arm's other links (the clearance; a "
             "contact step is one with a link surface inside a body or another link)."]  # fmt: skip
    if person:
        parts.append(f"Around the person, no link may come closer than the keep-out distance of "
                     f"{cm(world['keep_out'])} (a step with a link closer is a keep-out step); within "
                     f"{cm(world['reduced_zone'])} of the person (the reduced-speed zone) a link may approach only "
                     f"as fast as its remaining distance allows, and an approach more than "
                     f"{world['excess_tol']:g} m/s faster than allowed counts as an excess step.")  # fmt: skip
    return " ".join(parts)


def separation_html(summaries: dict[str, dict]) -> str:
    """HTML section: the world's distances in words, the separation figures per interface and per interface
    and final goal ("" when no summary has a scene with bodies)."""
    worlds = [s["separation"]["world"] for s in summaries.values() if s.get("separation")]
    if not worlds:
        return ""
    keys = list(FIGURES)
    labels = [FIGURES[k] for k in keys]
    overall = _table(["interface"] + labels, separation_rows(summaries, keys))
    goals = _table(["interface", "final goal"] + labels, separation_rows(summaries, keys, per_goal=True))
    note = ("Distances are between link surfaces (the arm's links as spheres) and the bodies, the minimum over "
            "every step of every episode; negative is overlap. The spheres contain the real links, so the real "
            "distances are at least these.")  # fmt: skip
    return (f"<h2>Separation from the scene's bodies</h2><p>{html.escape(world_words(worlds[0]))}</p>"
            f"<p>{note}</p><h3>Per interface</h3>{overall}<h3>Per interface and final goal</h3>{goals}")  # fmt: skip


def separation_tables(summaries: dict[str, dict]) -> list:
    """Rich tables of the separation figures per interface, and per interface and final goal (none when no
    summary has a scene with bodies)."""
    if not any(s.get("separation") for s in summaries.values()):
        return []
    labels = [FIGURES[k] for k in TERMINAL_SEPARATION]
    out = []
    for title, per_goal in (("separation from the scene's bodies (link surfaces; m)", False),
                            ("separation per final goal", True)):  # fmt: skip
        table = Table(title=title)
        for col in ["interface"] + (["final goal"] if per_goal else []) + labels:
            table.add_column(col, justify="left" if col in ("interface", "final goal") else "right")
        for row in separation_rows(summaries, TERMINAL_SEPARATION, per_goal):
            table.add_row(*row)
        out.append(table)
    return out


def _table(header: list[str], rows: list[list[str]]) -> str:
    head = "".join(f"<th>{html.escape(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in r) + "</tr>" for r in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _image(path: Path) -> str:
    data = base64.b64encode(Path(path).read_bytes()).decode("ascii")
    alt = html.escape(Path(path).stem.replace("_", " "))
    return f'<figure><img alt="{alt}" src="data:image/png;base64,{data}"><figcaption>{alt}</figcaption></figure>'


STYLE = (
    "body{font-family:sans-serif;max-width:1100px;margin:2em auto;padding:0 1em;color:#222}"
    "table{border-collapse:collapse;margin:1em 0}td,th{border:1px solid #bbb;padding:4px 8px;text-align:left;"
    "font-size:0.9em}th{background:#eee}.caution{border:2px solid #b00;background:#fff4f4;padding:0.8em}"
    "img{max-width:100%}figure{margin:1em 0}"
)


def write_report(summaries: dict[str, dict], plots: list[Path], out_dir: Path, title: str, meta: dict,
                 sections: str = "") -> Path:  # fmt: skip
    """One self-contained HTML file (images inlined, no links) at out_dir/report.html; the separation figures
    when the summaries carry them; `sections` is more HTML placed before the plots (the failure diagnosis)."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    labels = list(summaries)
    metrics = [name for name, _ in _rows(next(iter(summaries.values())))] if summaries else []
    main = _table(["metric"] + labels, [[m] + [dict(_rows(s))[m] for s in summaries.values()] for m in metrics])
    cells = sorted({c for s in summaries.values() for c in s["recovery"]}, key=lambda c: (c != "none", c))
    recovery = _table(
        ["interface"] + [f"switch at {c}" if c != "none" else "no switch" for c in cells],
        [[k] + [fmt_rate(s["recovery"][c]) if c in s["recovery"] else "–" for c in cells]
         for k, s in summaries.items()],
    )
    bound_rows = [[k, r["bin"], fmt_num(r["k"]), fmt_num(r["w"]), fmt_num(r["bound"]), str(r["n"])]
                  for k, s in summaries.items() for r in s["ultimate_bound"]]  # fmt: skip
    bounds = _table(["interface", "confidence", "k (1/s)", "w (m/s)", "bound w/k (m)", "steps"], bound_rows)
    collapsed = [k for k, s in summaries.items() if s["stick_gain"]["collapsed"]]
    warn = ""
    if collapsed:
        warn = ('<p class="caution">Stick gain collapsed (median below threshold; the stick barely moves '
                f"the arm) for: {html.escape(', '.join(collapsed))}.</p>")  # fmt: skip
    meta_table = _table(["item", "value"], [[str(k), str(v)] for k, v in meta.items()])
    page = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title><style>{STYLE}</style></head>
<body>
<h1>{html.escape(title)}</h1>
<p class="caution"><strong>Caution.</strong> {html.escape(CAUTION)}</p>
<p>{html.escape(SIM_NOTE)}</p>
{warn}
<h2>Run</h2>{meta_table}
<h2>Summary</h2>{main}
<h2>Recovery after a goal switch</h2>{recovery}
<h2>Ultimate bound of the distance to the waypoint by belief confidence</h2>
<p>Fit of e' = -k e + d with |d| &le; w (w: 95th percentile of the fitted disturbance) on the steps whose
belief confidence falls in each bin; w/k is where the error settles.</p>{bounds}
{separation_html(summaries)}
{sections}
<h2>Plots</h2>
{"".join(_image(p) for p in plots)}
</body></html>
"""
    return write_text(out_dir / "report.html", page)


def write_text(path: Path, text: str) -> Path:
    """Write a file whole or not at all: a temp file beside it, then a rename (a killed command leaves no half
    file)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, suffix=".tmp")
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.remove(tmp)
    return path


def terminal_table(summaries: dict[str, dict]):
    """The headline metrics, one row per interface, as a rich Table."""
    table = Table(title="Closed-loop vetting (simulated operators; 95% Wilson intervals)")
    for col in ("interface", *(LABELS[k] for k in ("suite", "success", "worst_recovery", "time_to_success",
                                                   "stick_gain_median", "limit_share"))):
        table.add_column(col)
    for label, s in summaries.items():
        switched = {k: v for k, v in s["recovery"].items() if k != "none"}
        worst = min(switched.items(), key=lambda kv: kv[1]["value"] if not math.isnan(kv[1]["value"]) else 2.0) \
            if switched else None  # fmt: skip
        a = s["stick_gain"]
        gain = f"{fmt_num(a['median'])}" + (" [red]collapsed[/red]" if a["collapsed"] else "")
        table.add_row(
            label,
            str(s["suite"]),
            fmt_rate(s["success"]),
            f"{fmt_rate(worst[1])} at {worst[0]}" if worst else "–",
            f"{fmt_num(s['time_to_success']['median'])} [{fmt_num(s['time_to_success']['q25'])}, "
            f"{fmt_num(s['time_to_success']['q75'])}]",
            gain,
            fmt_num(s["limit_scaled"]["step_share"]),
        )
    return table
