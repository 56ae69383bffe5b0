"""The release gate: thresholds from conf, limit-violation counts from a rollout, and one verdict per check.

Rates are gated on their Wilson LOWER bounds, not on the point estimates: the spread between trainings is
large (docs/results.md, `coreach recipes`: the plain cVAE's held-out recovery after a switch at 0.8 was 0.48,
0.64 and 0.44 on training seeds 0, 1 and 2), so a release must show evidence, and thin evidence (few episodes)
fails honestly instead of passing on luck. A limit scaling (a limit scaling a command down)
is the filter doing its job and is not a violation; a violation is a recorded state or command beyond the
limits, which the shared limits should make impossible.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import torch
from rich.markup import escape
from rich.table import Table

from coreach.errors import ConfigError

# Recorded values may exceed a limit by rounding only: the caps scale by 1/ratio, the look-ahead lands on
# the bound, each up to a few ulps off.
REL_SLACK = 1e-9
ABS_SLACK = 1e-12
_CHUNK = 8192  # states per Jacobian call when re-checking the tool speed


@dataclass(frozen=True)
class Thresholds:
    """What a decoder must show to be released (see conf/release.yaml `gates`)."""

    success_lo: float
    recovery_lo: float
    max_violations: int
    stick_gain_median: float
    parity_max_abs: float
    latency_p99_us: float
    max_contacts: int = 0
    max_keep_out: int = 0
    min_separation_m: float = 0.01
    max_excess: int = 0

    @classmethod
    def from_config(cls, node, parity_ceiling: float) -> Thresholds:
        """Checked thresholds; `parity_ceiling` is the bundle writer's own limit (a gate may only tighten it)."""
        try:
            items = dict(node)
        except (TypeError, ValueError):
            raise ConfigError("option gates", f"expected a mapping of thresholds, got {node!r}") from None
        names = [f for f in cls.__dataclass_fields__]
        unknown = sorted(set(items) - set(names))
        if unknown:
            raise ConfigError(f"option gates.{unknown[0]}", f"unknown gate; expected one of {names}")
        missing = [n for n in names if n not in items]
        if missing:
            raise ConfigError(f"option gates.{missing[0]}", "missing; every gate needs a threshold")

        def number(key: str, lo: float, hi: float) -> float:
            v = items[key]
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or not lo <= v <= hi:
                raise ConfigError(f"option gates.{key}", f"expected a number in [{lo}, {hi}], got {v!r}")
            return float(v)

        def count(key: str) -> int:
            v = items[key]
            if isinstance(v, bool) or not isinstance(v, int) or v < 0:
                raise ConfigError(f"option gates.{key}", f"expected an integer >= 0, got {v!r}")
            return v

        viol = count("max_violations")
        return cls(
            success_lo=number("success_lo", 0.0, 1.0),
            recovery_lo=number("recovery_lo", 0.0, 1.0),
            max_violations=viol,
            stick_gain_median=number("stick_gain_median", 0.0, math.inf),
            parity_max_abs=number("parity_max_abs", 0.0, parity_ceiling),
            latency_p99_us=number("latency_p99_us", 1e-3, 1e9),
            max_contacts=count("max_contacts"),
            max_keep_out=count("max_keep_out"),
            min_separation_m=number("min_separation_m", 0.0, 1.0),
            max_excess=count("max_excess"),
        )


@dataclass(frozen=True)
class GateResult:
    """One check: the measured value against its threshold (`op` reads "value op threshold" when passed)."""

    name: str
    what: str
    value: float | None  # None when it could not be measured (fails)
    threshold: float
    op: str  # ">=" or "<="
    passed: bool
    detail: str = ""


def _check(name: str, what: str, value, threshold: float, op: str, detail: str = "") -> GateResult:
    ok = value is not None and math.isfinite(value) and (value >= threshold if op == ">=" else value <= threshold)
    return GateResult(name, what, None if value is None else float(value), float(threshold), op, bool(ok), detail)


def _rate_text(r: dict) -> str:
    return f"{r['value']:.3f} [{r['lo']:.3f}, {r['hi']:.3f}], n={r['n']}"


def latest_switch(summary: dict) -> str | None:
    """The recovery cell of the latest goal switch ("0.8"), or None when the suite has no switch."""
    cells = [c for c in summary["recovery"] if c != "none"]
    return max(cells, key=float) if cells else None


def suite_gates(suite: str, summary: dict, violations: dict, th: Thresholds) -> list[GateResult]:
    """Success, late-switch recovery, limit violations and stick gain of one suite's rollout."""
    out = [_check(f"success[{suite}]", "success rate, Wilson lower bound", summary["success"]["lo"], th.success_lo,
                  ">=", _rate_text(summary["success"]))]  # fmt: skip
    cell = latest_switch(summary)
    if cell is not None:
        r = summary["recovery"][cell]
        out.append(_check(f"recovery@{cell}[{suite}]", f"success after a switch at {cell} of the horizon, Wilson "
                          "lower bound", r["lo"], th.recovery_lo, ">=", _rate_text(r)))  # fmt: skip
    out.append(_check(f"violations[{suite}]", "steps beyond the limits (scalings are not violations)",
                      violations["total"], th.max_violations, "<=", violation_text(violations)))
    a = summary["stick_gain"]
    gain = _check(f"stick_gain[{suite}]", "stick gain, median (rad/s per unit stick), not collapsed",
                  a["median"], th.stick_gain_median, ">=",
                  f"5th pct {a['p05']:.4g}, n={a['n']}" + (", COLLAPSED" if a["collapsed"] else ""))  # fmt: skip
    if a["collapsed"]:  # below vetting's own collapse threshold: never released, whatever the gate says
        gain = GateResult(**{**asdict(gain), "passed": False})
    out.append(gain)
    out += separation_gates(suite, summary.get("separation"), th)
    return out


def falsification_gate(found: dict) -> GateResult:
    """The falsification step: no scenario of the search may fail."""
    w = found["worst"]
    case = w["case"]
    where = f"{case['goal']}" + (f" -> {case['switch_to']} at {case['switch_at']:.2f}" if case.get("switch_to") else "")
    return _check(f"falsification[{found['space']['name']}]", f"failed scenarios in a search of {found['budget']}",
                  found["failures"], 0, "<=", f"worst robustness {w['robustness']:+.3f} ({where}"
                  f"{', ' + w['cause'] if w['cause'] else ''})")  # fmt: skip


def separation_gates(suite: str, sep: dict | None, th: Thresholds) -> list[GateResult]:
    """Contacts (a link inside furniture or two non-adjacent links overlapping), keep-out entries and the
    closest approach to furniture and between links, over the whole suite (none without scene bodies)."""
    if not sep:
        return []
    a = sep["all"]
    per_goal = sep["per_goal"]

    def worst(key: str, low: bool = False) -> str:
        if not per_goal:
            return ""
        pick = (min if low else max)(per_goal, key=lambda g: metres(per_goal[g][key]))
        return f"worst goal {pick}: {metres(per_goal[pick][key]):.4g}"

    def metres(v):
        return math.inf if v is None else v

    closest = min(metres(a["min_furniture_m"]), metres(a["min_self_m"]))
    return [
        _check(f"contacts[{suite}]", "steps with a link touching furniture or another link", a["contact_steps"],
               th.max_contacts, "<=", f"{a['contact_episodes']} of {a['episodes']} episodes; {worst('contact_steps')}"),
        _check(f"keep_out[{suite}]", "steps with a link inside the person's keep-out zone "
               f"({sep['world']['keep_out']:.3f} m)", a["keep_out_steps"], th.max_keep_out, "<=",
               f"closest link to the person {metres(a['min_person_m']):.3f} m; {worst('keep_out_steps')}"),
        _check(f"person_speed[{suite}]", "steps where a link approached the person faster than the ISO/TS 15066 "
               f"bound allows (measured over the step, tolerance {sep['world'].get('excess_tol', 0):g} m/s)",
               a["excess_steps"], th.max_excess, "<=", f"time in the reduced-speed zone {a['zone_time_s']:.1f} s "
               "per episode"),
        _check(f"separation[{suite}]", "closest link to furniture or to another link (m)",
               closest if math.isfinite(closest) else 1.0, th.min_separation_m, ">=",
               f"furniture {metres(a['min_furniture_m']):.4f} m, links {metres(a['min_self_m']):.4f} m; "
               f"{worst('min_furniture_m', True)}"),
    ]  # fmt: skip


def artifact_gates(parity: float | None, parity_n: int, latency: dict | None, th: Thresholds) -> list[GateResult]:
    """ONNX parity with torch and the runtime session's per-step latency on the staged bundle."""
    lat = None if latency is None else latency.get("session_p99_us")
    lat_detail = "not measured" if latency is None else (
        f"p50 {latency['session_p50_us']:.1f} us, bare onnxruntime p99 {latency['bare_p99_us']:.1f} us, "
        f"{latency['steps']} steps" + (f", quietest of {latency['rounds']} rounds" if latency.get("rounds") else ""))
    return [
        _check("onnx_parity", f"max |onnxruntime - torch| over {parity_n} contexts (rad/s)", parity,
               th.parity_max_abs, "<=", "" if parity is not None else "export failed"),
        _check("latency_p99", "runtime session step, p99 (us)", lat, th.latency_p99_us, "<=", lat_detail),
    ]  # fmt: skip


def violation_text(violations: dict) -> str:
    """`count_violations`'s result in words: counts per kind, the worst workspace overshoot, of how many steps."""
    parts = ", ".join(f"{k.replace('_', ' ')} {v}" for k, v in violations.items()
                      if k not in ("steps", "workspace_max_overshoot_m"))
    if violations.get("workspace"):
        parts += f" (worst {violations['workspace_max_overshoot_m'] * 1e3:.1f} mm beyond the box)"
    return f"{parts} of {violations['steps']} steps"


def count_violations(record, robot, limits, workspace: tuple | None = None) -> dict:
    """Recorded steps [E, T] beyond the shared limits: joint speed, joint position (after the step), tool
    speed (|J_lin(q) qd|, the quantity the cap bounds) and, when given, the workspace box (min, max) [3]."""
    q = record.extras["q"].to(torch.float64)  # [E, T+1, n]
    qd = record.extras["qd"].to(torch.float64)  # [E, T, n]
    E, T, n = qd.shape
    qd_max = torch.tensor(limits.qd_max, dtype=torch.float64)
    speed = (qd.abs() > qd_max * (1 + REL_SLACK) + ABS_SLACK).any(-1)  # [E, T]
    position = torch.zeros(E, T, dtype=torch.bool)
    if limits.q_lower:
        lo = torch.tensor(limits.q_lower, dtype=torch.float64)
        hi = torch.tensor(limits.q_upper, dtype=torch.float64)
        after = q[:, 1:]  # the state each step led to
        position = ((after < lo - 1e-9) | (after > hi + 1e-9)).any(-1)
    tool = torch.zeros(E * T, dtype=torch.bool)
    moving = qd.reshape(-1, n).abs().amax(-1) > 0  # held steps (zero command) cannot exceed a cap
    idx = moving.nonzero().squeeze(-1)
    flat_q, flat_qd = q[:, :-1].reshape(-1, n), qd.reshape(-1, n)
    for start in range(0, idx.numel(), _CHUNK):
        rows = idx[start : start + _CHUNK]
        jac = robot.jacobian(flat_q[rows]).to(torch.float64)[:, :3]  # [B, 3, n]
        v = torch.einsum("bij,bj->bi", jac, flat_qd[rows]).norm(dim=-1)
        tool[rows] = v > limits.tcp_speed_max * (1 + REL_SLACK) + ABS_SLACK
    tool = tool.reshape(E, T)
    out = {"joint_speed": int(speed.sum()), "joint_position": int(position.sum()), "tool_speed": int(tool.sum())}
    any_step = speed | position | tool
    if workspace is not None:
        lo, hi = (torch.tensor(v, dtype=torch.float64) for v in workspace)
        path = record.ee_path.to(torch.float64)[:, 1:]  # [E, T, 3] tool position each step led to
        box = ((path < lo - 1e-9) | (path > hi + 1e-9)).any(-1)
        out["workspace"] = int(box.sum())
        # how far (m) beyond the box the worst step went: the filter bounds a linear look-ahead
        # (pos + J_lin qd dt), so on a curved tool path a step can end slightly outside
        beyond = torch.maximum(lo - path, path - hi).clamp(min=0.0).amax(-1)
        out["workspace_max_overshoot_m"] = float(beyond.max()) if beyond.numel() else 0.0
        any_step = any_step | box
    out["total"] = int(any_step.sum())
    out["steps"] = E * T
    return out


def passed(results: list[GateResult]) -> bool:
    return bool(results) and all(r.passed for r in results)


def as_json(results: list[GateResult]) -> dict:
    """Gate name -> {value, threshold, op, passed, what, detail}; plain JSON (None for unmeasured)."""
    return {r.name: {k: v for k, v in asdict(r).items() if k != "name"} for r in results}


def gate_table(results, title: str):
    """A rich Table of every gate (accepts GateResults or their as_json mapping)."""
    rows = results.items() if isinstance(results, dict) else [(r.name, asdict(r)) for r in results]
    table = Table(title=title)
    for col in ("gate", "measured", "threshold", "result", "what / detail"):
        table.add_column(col, no_wrap=col in ("gate", "result"))
    for name, r in rows:
        value = "n/a" if r["value"] is None else f"{r['value']:.4g}"
        verdict = "[green]pass[/green]" if r["passed"] else "[bold red]FAIL[/bold red]"
        detail = r["what"] + (f" — {r['detail']}" if r.get("detail") else "")
        table.add_row(escape(name), value, f"{r['op']} {r['threshold']:.4g}", verdict, escape(detail))
    return table


__all__ = ["Thresholds", "GateResult", "suite_gates", "separation_gates", "artifact_gates", "count_violations", "passed", "as_json",
           "gate_table", "latest_switch"]
