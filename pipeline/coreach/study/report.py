"""The study's self-contained HTML report: tables and plots (PNG inlined as base64), no outside files."""

from __future__ import annotations

import base64
import html
import io
import math

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from coreach.runtime.cautions import cautions


STYLE = ("body{font-family:sans-serif;max-width:1100px;margin:2em auto;font-size:14px}"
         "table{border-collapse:collapse;margin:.5em 0}td,th{border:1px solid #ccc;padding:2px 6px;"
         "text-align:right}th{background:#eee}.warn{color:#8a4b00}img{max-width:100%}")  # fmt: skip


def _png(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=96, bbox_inches="tight")
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def paired_plot(wide: pd.DataFrame, title: str) -> str:
    """One line per participant across the conditions, over a box per condition with its points: the
    within-subject differences the paired tests judge are the slopes of the lines."""
    fig = Figure(figsize=(9, 3.4))  # a bare Figure renders with Agg: no pyplot, no display, no global state
    left, right = fig.subplots(1, 2)
    xs = np.arange(wide.shape[1])
    for _, row in wide.iterrows():
        left.plot(xs, row.to_numpy(float), color="0.55", lw=0.9, marker="o", ms=3)
    left.plot(xs, wide.mean().to_numpy(float), color="C3", lw=2.2, marker="s", label="mean")
    left.set_xticks(xs, [str(c) for c in wide.columns])
    left.set_title("paired: one line per participant", fontsize=9)
    left.legend(fontsize=8)
    right.boxplot([wide[c].to_numpy(float) for c in wide.columns], positions=xs, widths=0.5, showfliers=False)
    jitter = np.random.default_rng(0).uniform(-0.12, 0.12, size=wide.shape)  # fixed: the same picture each run
    for j, c in enumerate(wide.columns):
        right.scatter(xs[j] + jitter[:, j], wide[c].to_numpy(float), s=12, color="C0", alpha=0.7, zorder=3)
    right.set_xticks(xs, [str(c) for c in wide.columns])
    right.set_title("box and strip per condition", fontsize=9)
    fig.suptitle(title, fontsize=10)
    return _png(fig)


def _table(frame: pd.DataFrame) -> str:
    if frame is None or frame.empty:
        return "<p><em>none</em></p>"

    def fmt(v):
        if isinstance(v, float):
            return "" if math.isnan(v) else f"{v:.4g}"
        return html.escape(str(v))

    head = "".join(f"<th>{html.escape(str(c))}</th>" for c in frame.columns)
    body = "".join("<tr>" + "".join(f"<td>{fmt(v)}</td>" for v in row) + "</tr>" for row in frame.itertuples(index=False))
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _model(result: dict, title: str, units: str) -> str:
    note = "" if result.get("fitted") else f"<p><em>not fitted: {html.escape(result.get('note', ''))}</em></p>"
    rows = pd.DataFrame(result["effects"])
    extra = ""
    if result.get("fitted"):
        extra = (f"<p>formula <code>{html.escape(result['formula'])}</code>, {result['n']} trials, "
                 f"{result['groups']} participants; effects are {units} against the reference, 95% intervals."
                 + (" Warnings: " + html.escape("; ".join(result["warnings"])) if result.get("warnings") else "")
                 + "</p>")  # fmt: skip
    return f"<h3>{html.escape(title)}</h3>{note}{extra}{_table(rows)}"


def render(result: dict, plan: dict, version: int, warnings: list[str]) -> str:
    """The report page for one analysis of version `version` of a study."""
    name = html.escape(plan["name"])
    parts = [f"<h1>Study {name}, plan v{version}{' (PILOT)' if plan.get('pilot') else ''}</h1>",
             f"<p>Plan sha256 <code>{html.escape(plan.get('_sha256', ''))}</code>. Conditions: "
             + ", ".join(html.escape(c) for c in result["conditions"])
             + f"; reference for the models: <b>{html.escape(result['reference'])}</b>.</p>"]  # fmt: skip
    if plan.get("pilot"):
        parts.append("<p class=warn>A pilot: its figures size and debug the study; they are not its result.</p>")
    if warnings:
        items = "".join(f"<li>{html.escape(w)}</li>" for w in warnings)
        parts.append(f"<h2>Left out ({len(warnings)})</h2><ul class=warn>{items}</ul>")
    parts += ["<h2>Per condition</h2>", _table(result["by_condition"]),
              "<h2>Per condition and task</h2>", _table(result["by_condition_task"])]  # fmt: skip
    for outcome, o in result["outcomes"].items():
        f = o["friedman"]
        parts.append(f"<h2>{html.escape(o['about'])}</h2>")
        parts.append(f"<p>Participant means per condition; {f['n']} participants with every condition"
                     + (f", left out for a missing condition: {html.escape(', '.join(o['incomplete']))}"
                        if o["incomplete"] else "")
                     + (f". Friedman chi-square = {f['statistic']:.3f}, p = {f['p']:.4g} (k = {f['k']})."
                        if not math.isnan(f["p"]) else f". Friedman: {html.escape(f['note'])}.")
                     + "</p>")  # fmt: skip
        if len(o["wide"]):
            parts.append(f"<img alt='{html.escape(outcome)}' src='{paired_plot(o['wide'], o['about'])}'>")
        parts.append("<p>Pairwise: Wilcoxon signed-rank (two-sided), p Holm-adjusted over the pairs; mean "
                     "difference first minus second with a t interval; matched-pairs rank-biserial "
                     "correlation with a percentile bootstrap interval (participants resampled).</p>")
        parts.append(_table(o["pairwise"]))
    parts.append("<h2>Models over all trials</h2>")
    parts.append(_model(result["time_model"], "Completion time: linear mixed model, random intercept per "
                                              "participant (successful trials)", "seconds"))  # fmt: skip
    parts.append(_model(result["success_model"], "Success: GEE, binomial, exchangeable within participant; "
                        "bias-reduced (Mancl-DeRouen) covariance, t(participants - 1) intervals",
                        "log-odds (and odds ratios)"))  # fmt: skip
    items = "".join(f"<li>{html.escape(c)}</li>" for c in cautions(recording=True, study=True))
    parts.append(f"<h2>Cautions</h2><ul>{items}</ul>")
    return (f"<!doctype html><html><head><meta charset='utf-8'><title>Study {name}</title><style>{STYLE}"
            f"</style></head><body>{''.join(parts)}</body></html>\n")  # fmt: skip
