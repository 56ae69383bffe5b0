"""`coreach falsify`: search a scenario space for the episodes that break one decoder, through the vetting loop."""

from __future__ import annotations

import csv
import dataclasses
import io
import json
import logging
import math
import time
from pathlib import Path

import torch
from mlflow.entities import Metric, Param
from omegaconf import DictConfig

from coreach import tracking
from coreach.errors import ConfigError
from coreach.falsify.counterexamples import (COUNTEREXAMPLES_DIR, model_name, store_for_model, suite_data,
                                             write_suite)  # fmt: skip
from coreach.falsify.report import plot_failure_paths, plot_robustness, plot_search_curves, write_html
from coreach.falsify.robustness import robustness
from coreach.falsify.search import SAMPLERS, SearchResult, search
from coreach.falsify.space import space_from_config, space_node
from coreach.host.registry import build_plugin
from coreach.progress import progress_bar
from coreach.safety import limits_from_config
from coreach.vetting.diagnosis import classify
from coreach.vetting.loop import rollout
from coreach.vetting.report import write_text
from coreach.vetting.stage import _baseline_config, build_candidate
from coreach.vetting.suite import Suite, load_suite
from coreach.world.scene_arm import arm_world

log = logging.getLogger("coreach.falsify")
RANDOM_SEED_OFFSET = 1_000  # the baseline's seed is the search's plus this
PATH_EVERY = 5  # keep every 5th tool position of a failure's path for the plots (0.5 s at dt 0.1 s)

__all__ = ["falsify", "Evaluator", "gate_search", "counterexample_suites"]


def _positive_int(cfg: DictConfig, key: str, lo: int = 1) -> int:
    v = cfg.get(key)
    if not isinstance(v, int) or isinstance(v, bool) or v < lo:
        raise ConfigError(f"option {key}", f"expected an integer >= {lo}, got {v!r}")
    return v


def restart_option(value, key: str) -> int | None:
    """restart_after: null (never) or a positive integer of a stratum's own trials."""
    if value is None:
        return None
    if not isinstance(value, int) or isinstance(value, bool) or value < 1:
        raise ConfigError(f"option {key}", f"expected null (no restarts) or an integer >= 1, got {value!r}")
    return value


def _optimizer_label(optimizer: str, restart_after: int | None) -> str:
    """The optimizer as the summary, the report and the model card name it."""
    return optimizer + ("" if restart_after is None else f", restarts after {restart_after} stalled trials")


def decoder_reference(value) -> str:
    """The decoder to search: a run id, models:/..., NAME@ALIAS (read as models:/NAME@ALIAS) or a folder; a
    baseline's name is refused (a search is for a trained decoder)."""
    ref = str(value or "").strip()
    if not ref or ref == "???":
        raise ConfigError("option decoder", "expected a decoder: a run id, NAME@ALIAS, models:/NAME/VERSION or a folder")
    if _baseline_config(ref) is not None:
        raise ConfigError("option decoder", f"{ref!r} is a baseline interface, not a decoder; give a run id, "
                                            "NAME@ALIAS, models:/NAME/VERSION or a decoder folder")  # fmt: skip
    if "@" in ref and not ref.startswith("models:/") and not Path(ref).expanduser().exists():
        ref = f"models:/{ref}"
    return ref


class Evaluator:
    """Scenarios (cases) through the vetting loop in batches: the base suite's scene, horizon, tolerances and
    operator, the same filter and world as `coreach vet`, each case as one episode."""

    def __init__(self, base: Suite, robot, interface, belief, limits, seed: int):
        self.base, self.robot, self.interface, self.belief, self.limits = base, robot, interface, belief, limits
        self.world = arm_world(robot, base.scene, limits.tcp_speed_max)
        self.operator = base.build_operator()
        self.seed = int(seed)
        self.batches = 0
        self.seconds = 0.0
        self.scenarios = 0

    def suite(self, cases: list[dict]) -> Suite:
        # the search sets each shift and start offset itself, so the base suite's own jitter is off
        return dataclasses.replace(self.base, cases=cases, episodes=1, layout_jitter=0.0, start_jitter=0.0,
                                   switch_fractions=[None], name=f"{self.base.name}-falsify")  # fmt: skip

    def __call__(self, cases: list[dict]) -> tuple[list[float], list[dict]]:
        t0 = time.perf_counter()
        suite = self.suite(cases)
        generator = torch.Generator().manual_seed(self.seed * 1_000_003 + self.batches)
        self.batches += 1
        record = rollout(self.robot, self.interface, self.operator, suite, self.belief, self.limits, generator,
                         world=self.world if self.world is not None else False)  # fmt: skip
        scores = robustness(record)
        causes = classify(record)
        infos = []
        for e in range(len(cases)):
            info = {"task": float(scores["task"][e]), "separation": float(scores["separation"][e]),
                    "cause": causes["cause"][e], "stage": causes["stage"][e]}  # fmt: skip
            if float(scores["score"][e]) < 0:
                info["path"] = record.ee_path[e, ::PATH_EVERY].tolist()
            infos.append(info)
        self.seconds += time.perf_counter() - t0
        self.scenarios += len(cases)
        return scores["score"].tolist(), infos


def _vectors(shifts: dict) -> str:
    """{name: [dx, dy, dz]} as "name [+0.010, -0.020, +0.000]; ..." (m)."""
    return "; ".join(f"{name} [{', '.join(f'{x:+.3f}' for x in v)}]" for name, v in shifts.items())


def _failure_row(sampler: str, e) -> list[str]:
    c = e.case
    op = ", ".join(f"{k} {v:.3g}" for k, v in c["operator"].items())
    shift, moved = _vectors(c["layout_shift"]), _vectors(c.get("body_shift", {}))
    at = "–" if c["switch_at"] is None else f"{c['switch_at']:.2f}"
    return [sampler, f"{e.score:.3f}", c["goal"], c["switch_to"] or "–", at, e.info.get("cause", ""), op, shift,
            moved or "–"]


def falsify(cfg: DictConfig) -> dict:
    """Search `cfg.falsify` (the space) for failures of `cfg.decoder`; returns the summary."""
    t0 = time.perf_counter()
    budget, batch = _positive_int(cfg, "budget"), _positive_int(cfg, "batch")
    repeats, keep = _positive_int(cfg, "repeats"), _positive_int(cfg, "keep")
    seed = _positive_int(cfg, "seed", 0)
    restart_after = restart_option(cfg.get("restart_after"), "restart_after")
    samplers = [str(cfg.optimizer)] + (["random"] if cfg.baseline and str(cfg.optimizer) != "random" else [])
    if samplers[0] not in SAMPLERS:
        raise ConfigError("option optimizer", f"expected one of {list(SAMPLERS)}, got {cfg.optimizer!r}")
    ref = decoder_reference(cfg.get("decoder"))
    where = f"falsify/{cfg.falsify.get('name', 'space')}.yaml"
    base = load_suite(str(cfg.falsify.suite))
    space = space_from_config(cfg.falsify, base.goal_names, where, base.scene.body_names)

    uri = tracking.resolve_uri(cfg.tracking.get("uri"))
    robot = build_plugin(cfg.robot, "robot")
    belief = build_plugin(cfg.belief, "belief")
    limits = limits_from_config(robot, cfg.safety)
    interface, source = build_candidate(ref, None, uri)
    spec = interface.policy_.spec
    base.validate(robot, spec_n_goals=spec.n_goals)
    if spec.dof != robot.dof:
        raise ConfigError("option decoder", f"decoder was trained for {spec.dof} joints, robot has {robot.dof}")

    out = Path(cfg.report_dir or f"reports/falsify-{space.name}-{time.strftime('%Y%m%d-%H%M%S')}")
    out.mkdir(parents=True, exist_ok=True)
    results: list[SearchResult] = []
    speed = {}
    for name in samplers:
        evaluate = Evaluator(base, robot, interface, belief, limits, seed)
        bar, tick = progress_bar(budget, f"{name}: {interface.name}")
        if bar is None:
            log.info("falsify %s with %s: %d scenarios in batches of %d", interface.name, name, budget, batch)
        try:
            # random search draws from its own seed: with TPE's, its first batch would be TPE's random start
            # point for point, and the two could not differ before TPE's model takes over
            own = seed if name == samplers[0] else seed + RANDOM_SEED_OFFSET
            results.append(search(space, evaluate, budget, batch, own, name, robot.dof, tick,
                                  restart_after=restart_after))  # fmt: skip
        finally:
            if bar is not None:
                bar.stop()
        speed[name] = 60.0 * evaluate.scenarios / max(evaluate.seconds, 1e-9)

    # the counterexample suite: the worst failures over both searches, distinct cases, worst first
    failures = sorted([(r.sampler, e) for r in results for e in r.failures], key=lambda p: p[1].score)
    chosen = [dict(e.case, robustness=round(e.score, 4)) for _, e in failures[:keep]]
    found_by = {"decoder": ref, "space": space.name, "budget": budget, "optimizer": samplers[0], "seed": seed,
                "failures": len(failures)}  # fmt: skip
    suite_file = None
    stored = None
    if chosen:
        data = suite_data(base, f"counterexamples-{space.name}", chosen, repeats, found_by)
        suite_file = write_suite(out / "counterexamples.yaml", data)
        model = model_name(ref)
        if model is not None:
            stored = store_for_model(model, suite_file, Path(cfg.counterexamples_dir) if cfg.get(
                "counterexamples_dir") else None)  # fmt: skip

    table = io.StringIO()
    w = csv.writer(table)
    w.writerow(["sampler", "index", "robustness", "task", "separation", "cause", "case"])
    for r in results:
        for e in r.evaluations:
            w.writerow([r.sampler, e.index, f"{e.score:.5f}", f"{e.info.get('task', math.nan):.5f}",
                        f"{e.info.get('separation', math.nan):.5f}", e.info.get("cause", ""), json.dumps(e.case)])
    write_text(out / "evaluations.csv", table.getvalue())
    write_text(out / "failures.json", json.dumps(
        [{"sampler": s, "robustness": e.score, "case": e.case, "cause": e.info.get("cause"),
          "stage": e.info.get("stage"), "path": e.info.get("path")} for s, e in failures], indent=1))  # fmt: skip
    plots = [plot_search_curves(results, out / "search_curve.png"), plot_robustness(results, out / "robustness.png")]
    paths = plot_failure_paths([e for _, e in failures], base.scene, out / "failure_paths.png")
    plots += [paths] if paths else []
    worst = min((e for r in results for e in r.evaluations), key=lambda e: e.score)
    meta = {"decoder": f"{interface.name} ({source})", "space": space.name, "base suite": base.name,
            "budget per search": budget, "batch": batch, "seed": seed,
            "optimizer": _optimizer_label(samplers[0], restart_after),
            "bounds": json.dumps(space.to_dict()["bounds"]),
            "scenarios per minute": ", ".join(f"{k} {v:.0f}" for k, v in speed.items()),
            "counterexample suite": str(suite_file) if suite_file else "none (no failure)"}  # fmt: skip
    report = write_html(out, f"coreach falsify: {interface.name} on {space.name}", meta, results,
                        [_failure_row(s, e) for s, e in failures[:50]], plots)  # fmt: skip
    summary = {
        "decoder": ref, "label": interface.name, "source": source, "space": space.to_dict(), "budget": budget,
        "batch": batch, "seed": seed, "optimizer": samplers[0], "restart_after": restart_after,
        "searches": {r.sampler: {"seed": r.seed, "failures": len(r.failures), "first_failure": r.first_failure,
                                 "restarts": r.restarts,
                                 "lowest_robustness": r.worst.score, "worst_case": r.worst.case,
                                 "worst_cause": r.worst.info.get("cause", "")} for r in results},
        "worst": {"robustness": worst.score, "case": worst.case, "cause": worst.info.get("cause", "")},
        "scenarios_per_minute": speed,
        "counterexample_suite": None if suite_file is None else str(suite_file.resolve()),
        "stored_for_model": None if stored is None else str(stored.resolve()),
        "report": str(report.resolve()),
        "seconds": time.perf_counter() - t0,
    }
    write_text(out / "summary.json", json.dumps(summary, indent=2, default=str))
    if cfg.log:
        summary["run_id"] = _log(cfg, summary, source, out)
    return summary


def _log(cfg: DictConfig, summary: dict, source: str, out: Path) -> str:
    """A falsification run in MLflow: the settings, the figures per search and the report folder."""
    client, exp_id = tracking.client(cfg.tracking)
    tags = {"coreach.stage": "falsify", "coreach.label": summary["label"]}
    if len(source) == 32 and "/" not in source:
        tags["coreach.source_run"] = source
    run = client.create_run(exp_id, run_name=f"falsify {summary['label']} on {summary['space']['name']}", tags=tags)
    rid = run.info.run_id
    now = int(time.time() * 1000)
    metrics = [Metric("worst_robustness", summary["worst"]["robustness"], now, 0)]
    for name, s in summary["searches"].items():
        metrics += [Metric(f"{name}/failures", s["failures"], now, 0),
                    Metric(f"{name}/lowest_robustness", s["lowest_robustness"], now, 0)]  # fmt: skip
        if s["first_failure"] is not None:
            metrics.append(Metric(f"{name}/first_failure", s["first_failure"], now, 0))
    params = {"space": summary["space"]["name"], "budget": summary["budget"], "batch": summary["batch"],
              "seed": summary["seed"], "optimizer": summary["optimizer"], "decoder": summary["decoder"],
              "restart_after": summary["restart_after"]}  # fmt: skip
    client.log_batch(rid, metrics=metrics, params=[Param(k, str(v)) for k, v in params.items()])
    client.log_artifacts(rid, str(out), "falsify")
    client.set_terminated(rid)
    return rid


def gate_search(space_ref: str, budget: int, batch: int, seed: int, robot, interface, belief, limits,
                optimizer: str = "tpe", restart_after: int | None = None) -> dict:
    """The release gate's falsification step: the optimizer (a TPE) over the space with the budget; what the
    model card records (space, budget, optimizer, the failures found and the worst case)."""
    restart_after = restart_option(restart_after, "falsification.restart_after")
    if not isinstance(budget, int) or isinstance(budget, bool) or budget < 1:
        raise ConfigError("option falsification.budget", f"expected an integer >= 1 (or enabled=false), got {budget!r}")
    if optimizer not in SAMPLERS or optimizer == "random":
        raise ConfigError("option falsification.optimizer", f"expected tpe or tpe_per_goal, got {optimizer!r}")
    t0 = time.perf_counter()
    node, where = space_node(space_ref, "option falsification.space")
    base = load_suite(str(node.get("suite", "goal-switch")))
    space = space_from_config(node, base.goal_names, where, base.scene.body_names)
    base.validate(robot, spec_n_goals=interface.policy_.spec.n_goals)
    evaluate = Evaluator(base, robot, interface, belief, limits, seed)
    result = search(space, evaluate, budget, batch, seed, optimizer, robot.dof, restart_after=restart_after)
    worst = result.worst
    return {"space": space.to_dict(), "budget": budget, "optimizer": _optimizer_label(f"{optimizer} (optuna)",
                                                                                      restart_after), "seed": seed,
            "scenarios": len(result.evaluations), "failures": len(result.failures),
            "worst": {"robustness": worst.score, "case": worst.case, "cause": worst.info.get("cause", "")},
            "seconds": time.perf_counter() - t0}  # fmt: skip


def counterexample_suites(model: str, root: str | Path | None = None) -> list[Path]:
    """The counterexample suites kept for a registered model name, oldest first."""
    folder = Path(root or COUNTEREXAMPLES_DIR) / model
    return sorted(folder.glob("*.yaml")) if folder.is_dir() else []
