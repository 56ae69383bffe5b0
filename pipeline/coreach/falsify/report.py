"""What `coreach falsify` shows: the search curve against random search, the robustness distribution, the
failures' tool paths over the scene, one self-contained HTML page."""

from __future__ import annotations

import dataclasses
import html
from pathlib import Path

import numpy as np
from matplotlib.figure import Figure  # a bare Figure renders with Agg: no pyplot, no display

from coreach.falsify.search import SearchResult
from coreach.vetting.report import CAUTION, STYLE, _image, _save, _table, write_text
from coreach.vetting.scene_plot import body_outline

__all__ = ["plot_search_curves", "plot_robustness", "plot_failure_paths", "moved_outlines", "write_html"]


def plot_search_curves(results: list[SearchResult], path: Path) -> Path:
    fig = Figure(figsize=(7, 4))
    ax = fig.add_subplot()
    for r in results:
        ax.plot(np.arange(1, len(r.evaluations) + 1), r.best_so_far(), label=f"{r.sampler} (seed {r.seed})")
    ax.axhline(0.0, color="#b00", lw=0.8, ls="--")
    ax.set_xlabel("scenarios evaluated")
    ax.set_ylabel("lowest robustness so far (< 0: failure)")
    ax.legend()
    return _save(fig, path)


def plot_robustness(results: list[SearchResult], path: Path) -> Path:
    fig = Figure(figsize=(7, 4))
    ax = fig.add_subplot()
    bins = np.linspace(-1.0, 1.0, 41)
    for r in results:
        ax.hist([e.score for e in r.evaluations], bins=bins, alpha=0.5, label=r.sampler)
    ax.axvline(0.0, color="#b00", lw=0.8, ls="--")
    ax.set_xlabel("robustness per scenario")
    ax.set_ylabel("scenarios")
    ax.legend()
    return _save(fig, path)


def plot_failure_paths(failures: list, scene, path: Path, most: int = 12) -> Path | None:
    """Tool paths of the worst failures from above (x-y) and from the side (x-z), with the furniture, the
    person and the goals' approach points. A body a failure moved (`body_shift`, e.g. the person's head) is
    outlined where that failure had it, dashed in the path's colour: the scene's own place alone would hide
    the contact a failure met."""
    shown = [f for f in sorted(failures, key=lambda e: e.score) if f.info.get("path")][:most]
    if not shown:
        return None
    fig = Figure(figsize=(11, 5))
    bodies = {b.name: b for b in (*scene.obstacles, *scene.person)}
    for k, plane in enumerate([(0, 1), (0, 2)]):
        ax = fig.add_subplot(1, 2, k + 1)
        for body in scene.obstacles:
            hull = body_outline(body, plane)
            ax.fill(hull[:, 0], hull[:, 1], color="#ccc", alpha=0.6, lw=0)
        for body in scene.person:
            hull = body_outline(body, plane)
            ax.fill(hull[:, 0], hull[:, 1], color="#f4c2a0", alpha=0.7, lw=0)
        for g in scene.goals:
            ax.plot(g.position[plane[0]], g.position[plane[1]], "k*", ms=8)
            ax.annotate(g.name, (g.position[plane[0]], g.position[plane[1]]), fontsize=7)
        for f in shown:
            p = np.asarray(f.info["path"])
            (line,) = ax.plot(p[:, plane[0]], p[:, plane[1]], lw=0.9)
            ax.plot(p[-1, plane[0]], p[-1, plane[1]], "rx", ms=5)
            for hull in moved_outlines(f.case, bodies, plane):
                ax.plot(hull[:, 0], hull[:, 1], ls="--", lw=0.8, color=line.get_color())
        ax.set_xlabel("xyz"[plane[0]] + " (m)")
        ax.set_ylabel("xyz"[plane[1]] + " (m)")
        ax.set_aspect("equal", adjustable="datalim")
        ax.set_title("from above" if k == 0 else "from the side")
    return _save(fig, path)


def moved_outlines(case: dict, bodies: dict, plane: tuple[int, int]) -> list[np.ndarray]:
    """Closed outlines [K+1, 2] of the bodies a case moved (`body_shift`), where the case had them."""
    out = []
    for name, shift in (case.get("body_shift") or {}).items():
        moved = dataclasses.replace(bodies[name], xyz=tuple(np.add(bodies[name].xyz, shift).tolist()))
        hull = body_outline(moved, plane)
        out.append(np.vstack([hull, hull[:1]]))
    return out


def write_html(out_dir: Path, title: str, meta: dict, results: list[SearchResult], failure_rows: list[list[str]],
               plots: list[Path]) -> Path:  # fmt: skip
    """out_dir/report.html, self-contained (plots inlined), written atomically."""
    summary = _table(["sampler", "seed", "scenarios", "failures", "evaluations to the first failure",
                      "lowest robustness"],
                     [[r.sampler, str(r.seed), str(len(r.evaluations)), str(len(r.failures)),
                       str(r.first_failure or "none"), f"{r.worst.score:.3f}"] for r in results])  # fmt: skip
    failures = _table(["sampler", "robustness", "goal", "switch to", "at", "cause", "operator", "layout shift (m)",
                       "body shift (m)"],
                      failure_rows) if failure_rows else "<p>No scenario failed within the budget.</p>"  # fmt: skip
    page = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title><style>{STYLE}</style></head>
<body><h1>{html.escape(title)}</h1>
<p class="caution"><strong>Caution.</strong> {html.escape(CAUTION)}</p>
<p>Each scenario is one simulated episode; its robustness is positive when it succeeded (the share of the
horizon left) and negative when it failed (the share of the final goal's way still left), or negative when a
link touched furniture or entered the person's keep-out zone. A search that finds no failure within its
budget shows only that none was found, not that none exists.</p>
<h2>Run</h2>{_table(["item", "value"], [[str(k), str(v)] for k, v in meta.items()])}
<h2>Search against random search</h2>{summary}
<h2>Failures (worst first)</h2>{failures}
<h2>Plots</h2>{"".join(_image(p) for p in plots)}
</body></html>
"""
    return write_text(out_dir / "report.html", page)
