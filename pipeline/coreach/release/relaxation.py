"""Which release settings were looser than the shipped ones (conf/coreach_conf/release.yaml).

A release with relaxed gates (thresholds a barely trained decoder meets, fewer episodes, other suites) is
useful for trying the pipeline out, and must never be mistaken for a vetted decoder: the version's registry
tag, the model card, the release summary, the listing, `promote` and the robot's fetch all say so (in the
words of coreach.runtime.model_card.relaxed_warning).
"""

from __future__ import annotations

from importlib.resources import files

from omegaconf import OmegaConf

# the direction in which each gate threshold gets looser
LOOSER_IF_LOWER = ("success_lo", "recovery_lo", "stick_gain_median", "min_separation_m")
LOOSER_IF_HIGHER = ("max_violations", "parity_max_abs", "latency_p99_us", "max_contacts", "max_keep_out", "max_excess")


def shipped_release_config():
    """The release command's shipped settings, read from the packaged YAML (no Hydra composition needed)."""
    return OmegaConf.load(str(files("coreach_conf") / "release.yaml"))


def relaxed_settings(cfg, suite_own_episodes: dict[str, int]) -> list[str]:
    """One entry per setting of `cfg` looser than shipped, e.g. "gates.success_lo=0 (shipped 0.3)".

    suite_own_episodes: each gate suite's own episodes per switch cell, to judge an `episodes` override."""
    shipped = shipped_release_config()
    out = []
    for key in (*LOOSER_IF_LOWER, *LOOSER_IF_HIGHER):
        value, default = float(cfg.gates[key]), float(shipped.gates[key])
        if (value < default) if key in LOOSER_IF_LOWER else (value > default):
            out.append(f"gates.{key}={value:g} (shipped {default:g})")
    if list(cfg.gate_suites) != list(shipped.gate_suites):
        out.append(f"gate_suites={list(cfg.gate_suites)} (shipped {list(shipped.gate_suites)})")
    if cfg.get("episodes") is not None:
        fewer = {name: own for name, own in suite_own_episodes.items() if int(cfg.episodes) < own}
        if fewer:
            out.append(f"episodes={int(cfg.episodes)} per switch cell (the suites' own: "
                       + ", ".join(f"{name} {own}" for name, own in fewer.items()) + ")")
    if not cfg.counterexamples.use:
        out.append("counterexamples.use=false (shipped true): earlier counterexample suites not run")
    if int(cfg.parity_n) < int(shipped.parity_n):
        out.append(f"parity_n={int(cfg.parity_n)} (shipped {int(shipped.parity_n)})")
    if int(cfg.latency.steps) < int(shipped.latency.steps):
        out.append(f"latency.steps={int(cfg.latency.steps)} (shipped {int(shipped.latency.steps)})")
    return out


__all__ = ["relaxed_settings", "shipped_release_config"]


# a gate row's name (before its [suite] or @cell) -> the threshold it was held to
ROW_THRESHOLDS = {"success": "success_lo", "recovery": "recovery_lo", "violations": "max_violations",
                  "stick_gain": "stick_gain_median", "contacts": "max_contacts", "keep_out": "max_keep_out",
                  "person_speed": "max_excess", "separation": "min_separation_m", "onnx_parity": "parity_max_abs",
                  "latency_p99": "latency_p99_us"}  # fmt: skip


def relaxed_gate(gate: dict) -> list[str]:
    """What a released bundle's own gate record (manifest `gate`: rows with threshold and op) shows was looser
    than shipped: a threshold beyond the shipped one, or a shipped gate suite that no row vetted on. Read from
    the bundle itself, so it holds for a folder copied off the registry too."""
    shipped = shipped_release_config()
    out, suites = [], set()
    for row, entry in (gate or {}).items():
        key = ROW_THRESHOLDS.get(row.split("[")[0].split("@")[0])
        if "[" in row:
            suites.add(row.split("[", 1)[1].rstrip("]"))
        if key is None or not isinstance(entry, dict) or entry.get("threshold") is None:
            continue
        value, default = float(entry["threshold"]), float(shipped.gates[key])
        if (value < default) if key in LOOSER_IF_LOWER else (value > default):
            out.append(f"{row}: threshold {value:g} (shipped {default:g})")
    missing = [s for s in shipped.gate_suites if s not in suites]
    if missing:
        out.append(f"not vetted on the shipped gate suite(s) {', '.join(missing)}")
    return out
