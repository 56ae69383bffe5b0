"""The power analysis' plot and its self-contained HTML page (PNG inlined as base64)."""

from __future__ import annotations

import base64
import html
import io

import pandas as pd
from matplotlib.figure import Figure

from coreach.runtime.cautions import cautions
from coreach.study.power import TARGET, TESTS
from coreach.study.report import STYLE, _table


def power_figure(table: pd.DataFrame) -> Figure:
    """Power against participants, one line per test (and difference), Wilson 95% bars, the 80% line."""
    fig = Figure(figsize=(6.4, 3.8))  # a bare Figure renders with Agg: no pyplot, no display
    ax = fig.subplots()
    several = table["difference_s"].nunique() > 1
    for (difference, test), g in table.groupby(["difference_s", "test"], sort=False):
        g = g.sort_values("participants")
        label = f"{test} ({difference:+g} s)" if several else test
        below = (g["power"] - g["power_lo"]).clip(lower=0)  # at 0 or all studies, the rounding can cross over
        above = (g["power_hi"] - g["power"]).clip(lower=0)
        ax.errorbar(g["participants"], g["power"], yerr=[below, above], marker="o", capsize=3, label=label)
    ax.axhline(TARGET, color="0.4", ls="--", lw=1)
    ax.text(table["participants"].min(), TARGET + 0.015, f"{TARGET:.0%}", fontsize=8, color="0.3")
    ax.set_xticks(sorted(table["participants"].unique()))
    ax.set_ylim(-0.02, 1.02)
    ax.set_xlabel("participants")
    ax.set_ylabel("power (share of simulated studies rejecting)")
    first, second = table["first"].iloc[0], table["second"].iloc[0]
    ax.set_title(f"time of {first} minus {second}" + ("" if several else f": {table['difference_s'].iloc[0]:+g} s"),
                 fontsize=10)  # fmt: skip
    ax.legend(fontsize=8, loc="lower right")
    ax.grid(alpha=0.3)
    return fig


def figure_png(fig: Figure) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=96, bbox_inches="tight")
    return buf.getvalue()


def render(summary: dict, coverage: pd.DataFrame, power: pd.DataFrame, png: bytes) -> str:
    """The page: what was simulated, the coverage table, the power curve and table, the limits, the cautions."""
    name = html.escape(summary["study"])
    truth = summary["truth"]
    parts = [f"<h1>Study {name}, plan v{summary['version']}: planted effects and power</h1>",
             "<p class=warn>Simulated outcomes from a statistical model whose numbers come from the study config's "
             "<code>planted</code> section (the shipped ones are invented for demonstration). No person's data "
             "is used. The figures are only as good as those assumptions.</p>",
             f"<p>Plan sha256 <code>{html.escape(summary['plan_sha256'])}</code>; {summary['studies']} simulated "
             f"studies per cell, seed {summary['seed']}; {summary['seconds']:.1f} s.</p>",
             f"<h2>Coverage of the 95% intervals ({summary['participants']} participants, reference "
             f"{html.escape(summary['reference'])})</h2>",
             "<p>Each simulated study is analysed by the same mixed model (time, seconds) and GEE (success, "
             "log-odds) as <code>coreach study analyze</code>. <b>coverage</b>: share of studies whose interval "
             "holds the true value, with its Wilson 95% interval; target 93-97%. The true time effects are the "
             "planted seconds. The true success effects are <em>population-averaged</em> log-odds (the planted "
             "subject-specific log-odds integrated over the participant intercept), which is what a GEE "
             f"estimates; largest departure of the integrated rates from an additive logit model: "
             f"{truth['nonadditivity']:.2g} log-odds.</p>", _table(coverage),
             "<h2>Power</h2>",
             "<p>Share of simulated studies rejecting at alpha 0.05, per number of participants; Wilson 95% "
             "intervals. Tests: " + "; ".join(f"<b>{html.escape(k)}</b>: {html.escape(v)}" for k, v in TESTS.items())
             + ".</p>",
             f"<img alt='power curve' src='data:image/png;base64,{base64.b64encode(png).decode('ascii')}'>",
             _table(power)]  # fmt: skip
    smallest = "".join(f"<li>{d:+g} s, {html.escape(t)}: {n if n is not None else 'not reached at the counts tried'}"
                       f"</li>" for d, tests in summary["smallest_n"].items() for t, n in tests.items())  # fmt: skip
    parts.append(f"<p>Smallest number of participants reaching {TARGET:.0%} power:</p><ul>{smallest}</ul>")
    parts.append("<h2>Limits</h2><ul><li>A statistical model, not the closed-loop simulated operators: no "
                 "learning across blocks, no carry-over, no participant-by-condition differences in benefit, "
                 "normal completion times (real ones are skewed).</li><li>Time effects are tested on "
                 "successful trials only, as in the analysis.</li><li>Counts that are not a multiple of the "
                 "Williams design's sequences would leave the order unbalanced in a real study; the model has "
                 "no order effects, so the simulation cannot show that cost.</li></ul>")  # fmt: skip
    items = "".join(f"<li>{html.escape(c)}</li>" for c in cautions(recording=False, study=True))
    parts.append(f"<h2>Cautions</h2><ul>{items}</ul>")
    return (f"<!doctype html><html><head><meta charset='utf-8'><title>Study {name}: power</title><style>{STYLE}"
            f"</style></head><body>{''.join(parts)}</body></html>\n")  # fmt: skip
