"""The MODEL_CARD.md shipped in every release bundle: what the decoder is for, how it was made, its limits."""

from __future__ import annotations

import math
from typing import Any

from coreach.runtime.cautions import CAUTIONS  # one copy of the text, shared with every command

DEFAULT_LIMITS = (
    "Trained on scripted demonstrations in simulation; behaviour with real users, real sensors and "
    "latency has not been established by this bundle.",
    "Goal inference assumes the goal layout given to the runtime is correct; wrong goal positions "
    "mislead the belief and the goal-relative context.",
    "The workspace box is checked on a first-order prediction of the tool position; it does not model "
    "obstacles, the user's body or the wheelchair.",
    "Releasing the stick commands zero velocity, but the arm's own controller decides how it stops.",
)


def _fmt(value: Any) -> str:
    """A value as the card shows it: floats to 4 significant digits, a mapping as `key: value, ...`."""
    if isinstance(value, float):
        return "n/a" if not math.isfinite(value) else f"{value:.4g}"
    if value is None:
        return "n/a"
    if isinstance(value, dict):
        return ", ".join(f"{k}: {_fmt(v)}" for k, v in value.items()) or "n/a"
    return str(value)


def _cell(text: Any) -> str:
    """A Markdown table cell: `|` escaped, line breaks flattened (a gate's description holds "|x - y|")."""
    return str(text).replace("|", "\\|").replace("\n", " ")


def _gate_row(name: str, result: Any) -> str:
    """A gate result (value, op, threshold, passed, what, detail; see coreach.release.gate.as_json) as one row."""
    if not isinstance(result, dict):
        return f"| {_cell(name)} | {_cell(_fmt(result))} | | | |"
    verdict = "pass" if result.get("passed") else "FAIL"
    rule = f"{result.get('op', '')} {_fmt(result.get('threshold'))}".strip()
    what = "; ".join(_fmt(x) for x in (result.get("what"), result.get("detail")) if x)
    return f"| {_cell(name)} | {_cell(_fmt(result.get('value')))} | {_cell(rule)} | {verdict} | {_cell(what)} |"


def _metric_row(name: str, value: Any) -> str:
    """A metric is a number, or a dict with `value` and optionally `low`/`high` (interval), `level`, `unit`
    (any other dict is shown as `key: value, ...`)."""
    if isinstance(value, dict) and "value" in value:
        text = _fmt(value.get("value"))
        if "low" in value and "high" in value:
            level = value.get("level")  # e.g. 0.95
            label = f"{level:.0%} " if isinstance(level, (int, float)) and 0 < level <= 1 else ""
            text += f" ({label}interval {_fmt(value['low'])} to {_fmt(value['high'])})"
        if value.get("unit"):
            text += f" {value['unit']}"
        return f"| {_cell(name)} | {_cell(text)} |"
    return f"| {_cell(name)} | {_cell(_fmt(value))} |"


def relaxed_warning(relaxed) -> str:
    """The line every place that shows a release made with gate settings looser than shipped prints."""
    listed = "; ".join(relaxed) if isinstance(relaxed, (list, tuple)) else str(relaxed)
    return ("released with gate settings looser than shipped, so it is NOT a vetted decoder; do not use it with "
            f"people: {listed}")


def falsification_lines(found: dict | None, counterexamples: list) -> list[str]:
    """What the card says of the search for failures (coreach falsify) and the counterexample suites run."""
    if not found or not found.get("budget"):
        lines = ["No falsification step ran for this release: the decoder met the fixed gate suites only, not a "
                 "search for the scenarios that break it (`coreach falsify`; release option "
                 "falsification.enabled)."]
    else:
        w = found["worst"]
        case = w.get("case") or {}
        bounds = ", ".join(f"{k} {v}" for k, v in (found.get("space", {}).get("bounds") or {}).items())
        lines = [f"- Space: {found['space']['name']} (base suite {found['space'].get('suite')}; bounds {bounds})",
                 f"- Budget: {found['budget']} scenarios, optimizer {found['optimizer']}, seed {found['seed']}",
                 f"- Failures found: {found['failures']}",
                 f"- Worst case: robustness {w['robustness']:+.3f}, goal {case.get('goal')}"
                 + (f" switching to {case['switch_to']} at {case['switch_at']:.2f} of the horizon"
                    if case.get("switch_to") else "")
                 + "".join(f", {b} moved by [{', '.join(f'{x:+.3f}' for x in v)}] m"
                           for b, v in (case.get("body_shift") or {}).items())
                 + (f" ({w['cause']})" if w.get("cause") else "")]
    if counterexamples:
        lines += ["", "Counterexample suites of earlier versions run as gate suites: " + ", ".join(counterexamples)]
    return lines


def model_card(meta: dict, gate: dict, metrics: dict) -> str:
    """Markdown model card from the release metadata, the gate's results and the evaluation metrics.

    meta keys used (all optional): name, robot_name, goal_names, intended_use, dataset_fingerprint,
    episodes, training_run_id, git_commit, safety (dict), known_limits (list of str), gate_relaxed (list of str:
    settings looser than shipped; the card then opens with a warning).
    """
    meta, gate, metrics = meta or {}, gate or {}, metrics or {}
    safety = meta.get("safety") or {}
    goals = ", ".join(str(g) for g in meta.get("goal_names", [])) or "n/a"
    lines = [
        f"# Model card: {meta.get('name', 'latent-action decoder')}",
        "",
        *([f"**Warning: {relaxed_warning(meta['gate_relaxed'])}.**", ""] if meta.get("gate_relaxed") else []),
        "## Cautions",
        "",
        *[f"- {c}" for c in CAUTIONS],
        "",
        "## Intended use",
        "",
        meta.get(
            "intended_use",
            "Maps a 2-axis joystick, the arm's joint positions and the inferred goal to joint velocities of "
            f"the {meta.get('robot_name', 'robot')} arm, for supervised research sessions on assistive "
            "manipulation. Not for unsupervised use, not for tasks outside the goal set below.",
        ),
        "",
        f"Goals it was trained for: {goals}.",
        "",
        "## Training data",
        "",
        f"- Dataset fingerprint: `{_fmt(meta.get('dataset_fingerprint'))}`",
        f"- Episodes: {_fmt(meta.get('episodes'))}",
        f"- Training run: `{_fmt(meta.get('training_run_id'))}`",
        f"- Code version (git commit): `{_fmt(meta.get('git_commit'))}`",
        "",
        "## Metrics",
        "",
    ]
    if metrics:
        lines += ["| metric | value |", "|---|---|", *[_metric_row(k, v) for k, v in metrics.items()]]
    else:
        lines.append("No metrics were supplied with this release.")
    lines += ["", "## Release gate", ""]
    if gate:
        lines += ["| check | measured | threshold | verdict | what |", "|---|---|---|---|---|",
                  *[_gate_row(k, v) for k, v in gate.items()]]
    else:
        lines.append("No gate results were supplied with this release.")
    lines += ["", "## Falsification", "", *falsification_lines(meta.get("falsification"),
                                                             meta.get("counterexample_suites") or [])]
    lines += ["", "## Safety filter settings", ""]
    if safety:
        lines += [f"- {k}: {_fmt(v) if not isinstance(v, (list, tuple)) else list(v)}" for k, v in safety.items()]
    else:
        lines.append("See manifest.json (`safety`).")
    lines += ["", "## Known limits", "", *[f"- {x}" for x in (meta.get("known_limits") or DEFAULT_LIMITS)], ""]
    return "\n".join(lines)
