"""The vetting stage: every candidate interface through one suite in closed loop, metrics, report, MLflow."""

from __future__ import annotations

import json
import logging
import time
from importlib import resources
from pathlib import Path

from mlflow.entities import Metric, Param
from omegaconf import DictConfig, ListConfig, OmegaConf
from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

from coreach import tracking
from coreach.decoder import reference as decoder_reference
from coreach.decoder.torch_interface import DecoderInterface
from coreach.episodes.drive_files import drive_files
from coreach.errors import ConfigError
from coreach.host.registry import build_plugin
from coreach.safety import limits_from_config
from coreach.progress import interactive
from coreach.vetting.diagnosis_report import diagnosis_html, diagnosis_plots, plot_reach_by_goal
from coreach.vetting.loop import rollout
from coreach.vetting.metrics import flat_metrics, summarise
from coreach.vetting.recorded_drives import drive_summary
from coreach.vetting.report import standard_plots, write_report
from coreach.vetting.scene_plot import scene_plots
from coreach.vetting.suite import suite_from_config
from coreach.vetting.trajectories import write_trajectories
from coreach.world.robot_identity import check_same_robot
from coreach.world.scene_arm import arm_world

log = logging.getLogger("coreach.vet")
BASELINES_DIR = "interface"


def candidate_list(value) -> list[str]:
    if isinstance(value, (list, ListConfig)):
        items = [str(v) for v in value]
    else:
        items = [s for s in str(value).split(",")]
    items = [s.strip() for s in items if s and s.strip()]
    if not items:
        raise ConfigError("option candidates", "nothing to vet; give run ids, models:/... or baseline names")
    return items


def _baseline_config(name: str):
    path = resources.files("coreach_conf") / BASELINES_DIR / f"{name}.yaml"
    if not path.is_file():
        return None
    return OmegaConf.create(path.read_text())


def build_candidate(name: str, client, store: str):
    """(interface, training run id or None) for a baseline name, a run id, a registry reference or a folder."""
    cfg = _baseline_config(name)
    if cfg is not None:
        return build_plugin(cfg, "interface"), None
    label = ""
    if client is not None and not name.startswith("models:/") and not Path(name).expanduser().exists():
        try:
            label = client.get_run(name).data.tags.get("coreach.label", "")
        except Exception:  # unknown run: DecoderInterface names it in its own error
            label = ""
    policy, source = decoder_reference.load(name, store, "candidate")
    interface = DecoderInterface(policy, label or decoder_reference.label(name), source)
    return interface, (source if len(source) == 32 and "/" not in source else None)


class _Progress:
    """A rich progress bar per suite on a terminal; a log line per candidate otherwise."""

    def __init__(self, suite_name: str):
        self.bar = None
        if interactive():
            self.bar = Progress(TextColumn("{task.description}"), BarColumn(), TimeRemainingColumn(),
                                transient=False)  # fmt: skip
            self.bar.start()
        self.suite = suite_name

    def task(self, label: str, total: int):
        if self.bar is None:
            log.info("vetting %s on %s (%d steps)", label, self.suite, total)
            return None
        tid = self.bar.add_task(f"{self.suite}: {label}", total=total)
        return lambda step, _total: self.bar.update(tid, completed=step + 1)

    def close(self):
        if self.bar is not None:
            self.bar.stop()


def vet(cfg: DictConfig) -> dict:
    """Vet `cfg.candidates` on `cfg.suite`; returns the summaries, the report path and the MLflow run ids."""
    t0 = time.perf_counter()
    uri = tracking.resolve_uri(cfg.tracking.get("uri"))
    suite = suite_from_config(cfg)
    robot = build_plugin(cfg.robot, "robot")
    belief = build_plugin(cfg.belief, "belief")
    limits = limits_from_config(robot, cfg.safety)
    client, exp_id = tracking.client(cfg.tracking) if cfg.log else (None, None)

    names = candidate_list(cfg.candidates)
    built = [(n, *build_candidate(n, client, uri)) for n in names]
    for name, interface, source in built:  # every problem before any rollout starts
        spec = getattr(getattr(interface, "policy_", None), "spec", None)
        suite.validate(robot, spec_n_goals=None if spec is None else spec.n_goals)
        if spec is not None and spec.dof != robot.dof:
            raise ConfigError(f"candidate {name}", f"decoder was trained for {spec.dof} joints, robot has {robot.dof}")
        if source is not None and client is not None:
            check_same_robot(client.get_run(source).data.tags, robot, f"candidate {name}")

    drives = _drives_summary(cfg.get("drives") or [], suite)  # checked before any rollout starts

    out = Path(cfg.report_dir or f"reports/vet-{suite.name}-{time.strftime('%Y%m%d-%H%M%S')}")
    out.mkdir(parents=True, exist_ok=True)
    goal_rot = suite.episodes_plan(suite.generator(), robot).layout.approach_rot  # same plan the loop draws
    summaries, records, plots = {}, {}, []
    progress = _Progress(suite.name)
    try:
        for name, interface, source in built:
            label = _unique(interface.name or name, summaries)
            record = rollout(robot, interface, suite.build_operator(), suite, belief, limits, suite.generator(),
                             progress.task(label, suite.steps))  # fmt: skip
            summaries[label] = summarise(record, suite.tolerances)
            records[label] = (record, interface, source)
    finally:
        progress.close()

    plots += standard_plots(summaries, out)  # simulated operators only: a drive has no belief traces or switches
    plots += [p for p in [plot_reach_by_goal(summaries, out / "reach_by_goal.png")] if p]
    for label, (record, interface, _) in records.items():
        plots += diagnosis_plots(label, record, interface, robot, goal_rot, summaries[label], out)
    # the scene's bodies as the loop saw them (the same call as the loop's; None without bodies)
    world = arm_world(robot, suite.scene, limits.tcp_speed_max)
    plots += scene_plots({k: v[0] for k, v in records.items()}, suite.scene, None if world is None else world.chain,
                         out)  # fmt: skip
    trajectories = None
    if cfg.get("trajectories"):
        trajectories = write_trajectories({k: v[0] for k, v in records.items()}, out / "trajectories.parquet")
    if drives is not None:
        summaries[_unique(drives["interface"], summaries)] = drives
    meta = {
        "suite": suite.name,
        "episodes": suite.n_episodes,
        "horizon (s)": suite.horizon_s,
        "operator": json.dumps(suite.operator if isinstance(suite.operator, dict) else str(suite.operator)),
        "seed": suite.seed,
        "tracking": uri,
        "candidates": ", ".join(f"{k} ({v[2] or 'baseline'})" for k, v in records.items()),
    }
    if drives is not None:
        meta["recorded drives"] = (f"{drives['n_episodes']} drives of bundle(s) "
                                   f"{', '.join(h[:12] for h in drives['bundle_manifest_sha256'])}")  # fmt: skip
    report = write_report(summaries, plots, out, f"coreach vetting: {suite.name}", meta,
                          sections=diagnosis_html(summaries))  # fmt: skip
    (out / "summary.json").write_text(json.dumps(summaries, indent=2, default=str))

    vet_runs = {}
    if cfg.log:
        for label, (record, interface, source) in records.items():
            vet_runs[label] = _log_vetting(client, exp_id, label, source, suite, summaries[label], out)
    return {
        "suite": suite.name,
        "report": str(report.resolve()),
        "trajectories": None if trajectories is None else str(trajectories.resolve()),
        "summaries": summaries,
        "vet_runs": vet_runs,
        "sources": {k: v[2] for k, v in records.items()},
        "seconds": time.perf_counter() - t0,
    }


def _drives_summary(entries, suite) -> dict | None:
    """The recorded drives' summary (None without drives); ConfigError naming the option for a missing file
    or drives recorded on other goals than the suite's."""
    if not entries:
        return None
    summary = drive_summary(drive_files(entries, "drives"))
    if list(summary["goal_names"]) != list(suite.goal_names):
        raise ConfigError("option drives", f"drives were recorded on goals {summary['goal_names']}, suite "
                                           f"{suite.name} has {list(suite.goal_names)}; compare drives on the same scene")
    return summary


def _log_vetting(client, exp_id, label, source, suite, summary, out: Path) -> str:
    """A vetting run linked to its training run; the headline metrics also land on the training run."""
    tags = {"coreach.stage": "vet", "coreach.suite": suite.name, "coreach.label": label}
    if source:
        tags["coreach.source_run"] = source
    run = client.create_run(exp_id, run_name=f"vet {label} on {suite.name}", tags=tags)
    rid = run.info.run_id
    metrics = flat_metrics(summary)
    now = int(time.time() * 1000)

    batch = [Metric(k, v, now, 0) for k, v in metrics.items()]
    for i in range(0, len(batch), 500):
        client.log_batch(rid, metrics=batch[i : i + 500])
    params = {"suite": suite.name, "episodes": str(suite.n_episodes), "seed": str(suite.seed),
              "horizon_s": str(suite.horizon_s), "interface": label}  # fmt: skip
    client.log_batch(rid, params=[Param(k, v) for k, v in params.items()])
    client.log_text(rid, json.dumps(summary, indent=2, default=str), "summary.json")
    client.log_text(rid, json.dumps(suite.to_dict(), indent=2, default=str), "suite.json")
    client.log_artifacts(rid, str(out), "report")
    client.set_terminated(rid)
    if source:
        headline = {k: v for k, v in metrics.items() if k.startswith(("success/", "recovery/", "stick_gain/"))}
        client.log_batch(source, metrics=[Metric(f"vet/{suite.name}/{k}", v, now, 0) for k, v in headline.items()])
        client.set_tag(source, f"coreach.vet.{suite.name}", rid)
    return rid


def _unique(label: str, taken: dict) -> str:
    out, i = label, 2
    while out in taken:
        out, i = f"{label}#{i}", i + 1
    return out


__all__ = ["vet", "build_candidate", "candidate_list"]
