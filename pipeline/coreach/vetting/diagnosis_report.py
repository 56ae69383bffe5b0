"""Why episodes fail, shown: failed tool paths by cause, action maps where failures end, reach per goal, and the
HTML sections and terminal tables of the diagnosis."""

from __future__ import annotations

import html
from collections import Counter
from pathlib import Path

import numpy as np
import torch
from matplotlib.figure import Figure
from rich.table import Table

from coreach.vetting.diagnosis import CAUSES
from coreach.vetting.report import (PLANES, _save, arrow_scale, draw_stick_panel, plot_action_maps, state_from_record,
                                    tool_velocities)
from coreach.vetting.report import _table, fmt_rate

__all__ = ["diagnosis_plots", "plot_failure_paths", "plot_failure_action_maps", "plot_reach_by_goal", "failure_end_episodes"]

# by name, so a cause added to CAUSES keeps the others' colours (and a missing one fails here, not in a plot)
_COLOURS = {"limited": "tab:red", "progressing": "tab:green", "pressed": "black", "separation_held": "tab:olive",
            "no_way": "tab:pink", "stuck": "tab:gray", "oscillating": "tab:purple", "fine_motion": "tab:orange",
            "orientation": "tab:brown", "approach": "tab:blue"}  # fmt: skip
assert set(_COLOURS) == set(CAUSES), "give every cause a colour"


def plot_failure_paths(record, diag: dict, path: Path, label: str) -> Path:
    """Tool paths of every failed episode from its last goal switch on, top view (x-y) and side view (x-z),
    coloured by cause; goals' approach points are stars (mean over episodes), path ends are crosses."""
    fig = Figure(figsize=(11, 5), layout="constrained")
    axes = fig.subplots(1, 2)
    ee = record.ee_path.to(torch.float64).numpy()  # [E, T+1, 3]
    approach = record.extras["goal_targets"].to(torch.float64)[:, :, 0].mean(0).numpy()  # [G, 3]
    seen = set()
    for row in diag["episodes"]:
        e, cause = row["episode"], row["cause"]
        start = max(int(record.switch_step[e]), 0)
        colour = _COLOURS[cause]
        for ax, (a, b, _) in zip(axes, PLANES):
            ax.plot(ee[e, start:, a], ee[e, start:, b], color=colour, alpha=0.5, linewidth=0.9,
                    label=CAUSES[cause] if cause not in seen and ax is axes[0] else None)  # fmt: skip
            ax.plot(ee[e, -1, a], ee[e, -1, b], "x", color=colour, markersize=5)
        seen.add(cause)
    for ax, (a, b, plane) in zip(axes, PLANES):
        ax.plot(approach[:, a], approach[:, b], "*", color="black", markersize=12)
        for g, name in enumerate(record.goal_names):
            ax.annotate(name, (approach[g, a], approach[g, b]), textcoords="offset points", xytext=(6, 6), fontsize=8)
        ax.set_aspect("equal", adjustable="datalim")
        ax.set_xlabel(f"{plane[0]} (m)")
        ax.set_ylabel(f"{plane[-1]} (m)")
        ax.set_title(f"{'top' if plane == 'x-y' else 'side'} view ({plane})", fontsize=9)
    if seen:
        axes[0].legend(fontsize=7, loc="best")
    n = record.n_episodes
    fig.suptitle(f"{label}: {diag['failures']} of {n} episodes failed; paths after the last goal switch "
                 "(x: where the episode ended)", fontsize=10)  # fmt: skip
    return _save(fig, path)


def failure_end_episodes(diag: dict, most: int = 3) -> list[dict]:
    """Up to `most` failed episodes to draw action maps at: one per (cause, final goal) pair, commonest first."""
    pairs = Counter((r["cause"], r["goal_final"]) for r in diag["episodes"])
    out = []
    for (cause, goal), _ in pairs.most_common(most):
        out.append(next(r for r in diag["episodes"] if r["cause"] == cause and r["goal_final"] == goal))
    return out


def plot_failure_action_maps(interface, record, robot, goal_rot, diag: dict, path: Path, label: str,
                             grid: int = 7, most: int = 3) -> Path | None:  # fmt: skip
    """Action maps at the states where failed episodes ended, with the belief they had there: one column per
    episode (see `failure_end_episodes`), x-y on top, x-z below; the red arrow points to the final goal's
    approach point. None when nothing failed."""
    picks = failure_end_episodes(diag, most)
    if not picks:
        return None
    T = record.limit_scaled.shape[1]
    states = [state_from_record(record, robot, episode=r["episode"], step=T, goal_rot=goal_rot) for r in picks]
    fields = [tool_velocities(interface, st, grid) for st in states]
    top, scale = arrow_scale(np.concatenate([v for _, v in fields]), grid)
    names = list(record.goal_names)
    fig = Figure(figsize=(3.4 * len(picks), 6.6), layout="constrained")
    axes = fig.subplots(2, len(picks), squeeze=False)
    for j, (r, st, (stick, v)) in enumerate(zip(picks, states, fields)):
        g = names.index(r["goal_final"])
        to_goal = (st.goal_targets[0, g, 0] - st.ee_pos[0]).to(torch.float64).numpy()
        belief = float(st.belief[0, g])
        for i, (a, b, plane) in enumerate(PLANES):
            title = (f"ep {r['episode']} {r['goal_final']}: {r['cause']}\n{plane}, belief {belief:.2f}, "
                     f"{r['end_distance_m'] * 100:.0f} cm to go")  # fmt: skip
            draw_stick_panel(axes[i][j], stick, v[0], to_goal, (a, b), scale, title)
    fig.suptitle(f"{label}: tool velocity over the stick box where failed episodes ended "
                 f"(longest arrow {top:.3f} m/s)", fontsize=10)  # fmt: skip
    return _save(fig, path)


def plot_reach_by_goal(summaries: dict[str, dict], path: Path) -> Path | None:
    """Per goal, the share of visited states from which some stick input makes progress toward it, grouped
    bars per interface. None when no summary has a diagnosis."""
    diags = {k: s["diagnosis"] for k, s in summaries.items() if s.get("diagnosis") and s["diagnosis"]["reach_by_goal"]}
    if not diags:
        return None
    goals = list(next(iter(diags.values()))["reach_by_goal"])
    fig = Figure(figsize=(max(6.4, 1.3 * len(goals) * max(len(diags), 2) / 2), 4.0), layout="constrained")
    ax = fig.subplots()
    width = 0.8 / len(diags)
    x = np.arange(len(goals))
    for i, (label, d) in enumerate(diags.items()):
        ax.bar(x + (i - (len(diags) - 1) / 2) * width, [d["reach_by_goal"].get(g, np.nan) for g in goals], width,
               label=label, color=f"C{i}")  # fmt: skip
    ax.set_xticks(x, goals)
    ax.set_ylim(0, 1.05)
    ax.set_ylabel("share of visited states")
    ax.legend(fontsize=8)
    ax.set_title("Per goal: visited states from which some stick input makes progress toward it", fontsize=10)
    return _save(fig, path)


def diagnosis_plots(label: str, record, interface, robot, goal_rot, summary: dict, out: Path) -> list[Path]:
    """An interface's pictures: its action map at the start of episode 0, and, when episodes failed, the
    failed tool paths by cause and the action maps where they ended."""
    slug = "".join(c if c.isalnum() or c in "-_" else "_" for c in label)  # a file name
    state = state_from_record(record, robot, episode=0, step=0, goal_rot=goal_rot)
    goal = int(record.goal_initial[0])
    plots = [plot_action_maps(interface, state, out / f"action-map-{slug}.png", goal=goal,
                              goal_names=record.goal_names)]  # fmt: skip
    diag = summary.get("diagnosis")
    if diag and diag["failures"]:
        plots.append(plot_failure_paths(record, diag, out / f"failed-paths-{slug}.png", label))
        plots.append(plot_failure_action_maps(interface, record, robot, goal_rot, diag,
                                              out / f"action-map-at-failures-{slug}.png", label))  # fmt: skip
    return plots


# ---- text: HTML sections and terminal tables ----


def diagnosis_html(summaries: dict[str, dict]) -> str:
    """HTML sections: cause shares per interface, success per goal x switch cell, and what to fix."""
    diags = {k: s["diagnosis"] for k, s in summaries.items() if s.get("diagnosis")}
    if not diags:
        return ""
    causes = _table(
        ["interface", "failed"] + list(CAUSES.values()),
        [[k, f"{d['failures']} of {summaries[k]['n_episodes']}"]
         + [f"{d['cause_share'][c]:.2f} ({d['causes'][c]})" for c in CAUSES] for k, d in diags.items()],
    )  # fmt: skip
    rules = ", ".join(f"{k} {v:g}" for k, v in next(iter(diags.values()))["rules"].items())
    parts = ["<h2>Why episodes failed</h2>",
             "<p>One cause per failed episode, read from its last seconds, first matching rule in this order "
             "(coreach.vetting.diagnosis); thresholds: " + html.escape(rules) + ". Share of failures (count).</p>",
             causes]  # fmt: skip
    for label, d in diags.items():
        cells = sorted({c for row in d["by_goal_cell"].values() for c in row}, key=lambda c: (c != "none", c))
        grid = _table(
            ["final goal"] + [("no switch" if c == "none" else f"switch at {c}") for c in cells]
            + ["reach (share of visited states)"],
            [[g] + [fmt_rate(row[c]) if c in row else "–" for c in cells]
             + [f"{d['reach_by_goal'].get(g, float('nan')):.2f}"] for g, row in d["by_goal_cell"].items()],
        )  # fmt: skip
        fixes = "".join(f"<li>{html.escape(a)}</li>" for a in d["advice"]) or "<li>nothing stands out</li>"
        parts += [f"<h3>{html.escape(label)}</h3>", grid, f"<p>What to look at:</p><ul>{fixes}</ul>"]
    return "\n".join(parts)


def cause_table(summaries: dict[str, dict]):
    """Rich table: failures and the share of each cause, one column per interface.

    Causes are rows named with the HTML section's words (CAUSES), not the internal keys; as rows, the
    sentences stay readable in a terminal as narrow as 80 columns."""
    diags = {k: s["diagnosis"] for k, s in summaries.items() if s.get("diagnosis")}
    table = Table(title="why episodes failed (share of failed episodes)")
    table.add_column("cause")
    for k in diags:
        table.add_column(k, justify="right")
    table.add_row("failed", *[f"{d['failures']}/{summaries[k]['n_episodes']}" for k, d in diags.items()])
    for c, words in CAUSES.items():
        table.add_row(words, *[f"{d['cause_share'][c]:.2f}" if d["causes"][c] else "-" for d in diags.values()])
    return table


def goal_table(summaries: dict[str, dict]):
    """Rich table: per interface, success per final goal over all switch cells, with the goal's reach."""
    diags = {k: s["diagnosis"] for k, s in summaries.items() if s.get("diagnosis")}
    goals = list(next(iter(diags.values()))["per_goal"]) if diags else []
    table = Table(title="success per final goal, all switch cells (reach: visited states with a stick toward it)")
    table.add_column("interface")
    for g in goals:
        table.add_column(g)
    for k, d in diags.items():
        row = []
        for g in goals:
            r, reach = d["per_goal"].get(g), d["reach_by_goal"].get(g, float("nan"))
            row.append(f"{r['value']:.2f} [{r['lo']:.2f}, {r['hi']:.2f}] reach {reach:.2f}" if r else "-")
        table.add_row(k, *row)
    return table
