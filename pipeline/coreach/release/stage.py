"""`coreach release`: gate a trained decoder in closed loop and, only if every gate passes, publish it.

Everything the gate needs (rollouts, vetting report, a staged bundle for the parity and latency checks) is
made in a temporary folder that is always deleted. A refusal leaves nothing: no bundle folder, no MLflow
run, no registry version. A pass writes the bundle to <out_dir>/<name>/v<version>/ (renamed into place
when complete), registers the version from the training run's `decoder` artifact, ties it to the bundle
with tags, marks it vetted and logs a release run; a failure part-way undoes what was done.
"""

from __future__ import annotations

import json
import logging
import os
import re
import shutil
import tempfile
import time
from pathlib import Path

from omegaconf import DictConfig, ListConfig, OmegaConf

from coreach import tracking
from coreach.errors import ConfigError
from coreach.plugin_registry import build_option, build_plugin, option_class
from coreach.release import gate as G
from coreach.release import registry
from coreach.runtime.bundle import PARITY_TOLERANCE, BundleError, verify_bundle, write_bundle
from coreach.runtime.model_card import CAUTIONS
from coreach.safety import SafetyLimits
from coreach.vetting.loop import rollout
from coreach.vetting.metrics import flat_metrics, summarise
from coreach.vetting.diagnosis import without_episodes
from coreach.vetting.diagnosis_report import diagnosis_html, diagnosis_plots
from coreach.vetting.report import standard_plots, write_report
from coreach.vetting.suite import load_suite

log = logging.getLogger("coreach.release")
REFUSED_EXIT = 3  # distinct from 2 (bad input): the input was fine, the decoder did not pass


def suite_refs(cfg) -> list[str]:
    """The gate_suites option as given: shipped names or YAML paths."""
    names = cfg.gate_suites
    names = [str(s) for s in names] if isinstance(names, (list, ListConfig)) else [s for s in str(names).split(",")]
    names = [s.strip() for s in names if s and s.strip()]
    if not names:
        raise ConfigError("option gate_suites", "expected at least one suite name (e.g. [held-out])")
    return names


def _suites(cfg) -> list:
    overrides = {"episodes": int(cfg.episodes)} if cfg.get("episodes") is not None else {}
    return [load_suite(s, **overrides) for s in suite_refs(cfg)]


def _training_run(client, ref: str):
    """Policy, training run id and run of `ref` (a run id or models:/...); folders cannot be released."""
    if not ref:
        raise ConfigError("option run", "missing; expected the MLflow run id of a training run (coreach release "
                                        "run=<run id>)")  # fmt: skip
    if Path(str(ref)).expanduser().exists():
        raise ConfigError("option run", f"{ref} is a folder; release needs the MLflow training run (its "
                                        "dataset fingerprint, commit and decoder artifact are part of it)")  # fmt: skip
    try:
        decoder = build_option("interface", "decoder", run=str(ref))
        policy, run_id = decoder.policy_, decoder.source_
    except ConfigError as exc:  # name the option of this command, not the interface's
        raise ConfigError("option run", exc.problem) from None
    run = client.get_run(run_id)
    if "coreach.dataset" not in run.data.tags:
        raise ConfigError("option run", f"run {run_id} has no coreach.dataset tag; was it logged by coreach train?")
    return policy, run_id, run


def _urdf(robot, staging: Path) -> Path:
    """The robot's URDF text (robot protocol `urdf_text`) written into `staging`; robots without one are refused."""
    text = robot.urdf_text() if hasattr(robot, "urdf_text") else None
    if not text:
        raise ConfigError("option robot", f"a release ships the arm's URDF; robot {robot.name!r} has none")
    path = staging / "robot.urdf"
    tmp = path.with_suffix(".urdf.tmp")
    tmp.write_text(text, encoding="utf-8")
    tmp.replace(path)
    return path


def _nominal_layout(scene) -> dict:
    import torch

    from coreach.geometry import matrix_to_quat, rpy_to_matrix

    rpy = torch.deg2rad(torch.tensor([g.approach_rpy_deg for g in scene.goals], dtype=torch.float64))
    return {
        "goal_pos": [list(g.position) for g in scene.goals],
        "goal_quat": matrix_to_quat(rpy_to_matrix(rpy)).tolist(),
        "goal_fine": [list(g.fine_motion) for g in scene.goals],
    }


def _model_card_metrics(summaries: dict) -> dict:
    out = {}
    for suite, s in summaries.items():
        level = s["confidence_level"]

        def rate(r):
            return {"value": r["value"], "low": r["lo"], "high": r["hi"], "level": level}

        out[f"success rate, {suite} (n={s['success']['n']})"] = rate(s["success"])
        for cell, r in s["recovery"].items():
            if cell != "none":
                out[f"success after a switch at {cell}, {suite} (n={r['n']})"] = rate(r)
        out[f"time to success, median, {suite}"] = {"value": s["time_to_success"]["median"], "unit": "s"}
        out[f"control authority, median, {suite}"] = {"value": s["authority"]["median"], "unit": "rad/s per stick"}
    return out


def release_meta(cfg, robot, suites, run, label: str, summaries: dict) -> dict:
    """The `meta` write_bundle needs (see coreach.runtime.bundle.build_manifest)."""
    scene = suites[0].scene
    for s in suites[1:]:
        if s.goal_names != scene.goal_names:
            raise ConfigError("option gate_suites", f"suite {s.name} has goals {s.goal_names}, suite "
                                                    f"{suites[0].name} {scene.goal_names}; a bundle serves one goal "
                                                    "set")  # fmt: skip
    rt = cfg.runtime
    tags = run.data.tags
    return {
        "name": f"{cfg.name} ({label})",
        "goal_names": list(scene.goal_names),
        "nominal_layout": _nominal_layout(scene),
        "dataset_fingerprint": tags["coreach.dataset"],
        "training_run_id": run.info.run_id,
        "git_commit": tags.get("mlflow.source.git.commit") or "unknown (not run from a git checkout)",
        "episodes": run.data.params.get("dataset.episodes"),
        "robot_name": robot.name,
        "tool_link": str(cfg.robot.get("tool_link", "tool")),
        "q_home": robot.q_home.tolist(),
        "belief": build_plugin(cfg.belief, "belief").to_manifest(),
        "safety": {
            "tcp_speed_max": float(cfg.safety.tcp_speed_max),
            "speed_fraction": float(cfg.safety.speed_fraction),
            "workspace_min": list(rt.workspace_min),
            "workspace_max": list(rt.workspace_max),
            "watchdog_timeout_s": float(rt.watchdog_timeout_s),
            "lookahead_s": float(rt.lookahead_s),
        },
        "stick": {"deadband": float(rt.deadband)},
        "tolerances": {"arrival": suites[0].tolerances},
        "metrics": _model_card_metrics(summaries),
        "parity_n": int(cfg.parity_n),
    }


def _workspace(cfg) -> tuple[list[float], list[float]]:
    lo, hi = list(cfg.runtime.workspace_min), list(cfg.runtime.workspace_max)
    if len(lo) != 3 or len(hi) != 3 or not all(a < b for a, b in zip(lo, hi)):
        raise ConfigError("option runtime.workspace_min/max", f"expected two corners [x, y, z] with min < max, got "
                                                              f"{lo} and {hi}")  # fmt: skip
    return lo, hi


def _latency(bundle: Path, node) -> dict:
    """Runtime latency on the staged bundle: the round (of `rounds`) with the lowest p99. Other jobs on the
    machine only ever add time, so the quietest round is the best estimate of what the decoder and runtime
    cost; a single busy round on a shared computer measured 8.7 ms p99 against 0.5 ms for the next one."""
    from coreach.bench.runtime_bench import run_runtime_bench

    rounds = max(1, int(node.get("rounds", 3)))
    steps = max(50, int(node.steps) // rounds)
    results = [run_runtime_bench(bundle, steps=steps, warmup=int(node.warmup)) for _ in range(rounds)]
    best = min(results, key=lambda r: r["session_p99_us"])
    return {**best, "rounds": rounds, "p99_by_round_us": [r["session_p99_us"] for r in results]}


def evaluate(cfg, policy, run, label: str, staging: Path) -> dict:
    """Every gate on `policy`; builds the vetting report and a staged bundle inside `staging`."""
    th = G.Thresholds.from_config(cfg.gates, PARITY_TOLERANCE)
    workspace = _workspace(cfg)
    suites = _suites(cfg)
    robot = build_plugin(cfg.robot, "robot")
    belief = build_plugin(cfg.belief, "belief")
    limits = SafetyLimits.for_robot(robot, cfg.safety.tcp_speed_max, cfg.safety.speed_fraction)
    spec = policy.spec
    for suite in suites:
        suite.validate(robot, spec_n_goals=spec.n_goals)
    if spec.dof != robot.dof:
        raise ConfigError("option run", f"decoder was trained for {spec.dof} joints, robot has {robot.dof}")
    urdf = _urdf(robot, staging)

    interface = option_class("interface", "decoder").from_policy(policy, name=label)
    summaries, results, plots = {}, [], []
    report_dir = staging / "report"
    report_dir.mkdir()
    for suite in suites:
        log.info("release gate: %s on %s (%d episodes x %d steps)", label, suite.name, suite.n_episodes, suite.steps)
        record = rollout(robot, interface, suite.build_operator(), suite, belief, limits, suite.generator())
        summaries[suite.name] = summarise(record, suite.tolerances)
        violations = G.count_violations(record, robot, limits, workspace)
        results += G.suite_gates(suite.name, summaries[suite.name], violations, th)
        goal_rot = suite.episodes_plan(suite.generator(), robot).layout.approach_rot
        plots += diagnosis_plots(f"{label} on {suite.name}", record, interface, robot, goal_rot,
                                 summaries[suite.name], report_dir)  # fmt: skip
    keyed = {f"{label} on {k}": v for k, v in summaries.items()}
    plots = standard_plots(keyed, report_dir) + plots
    report = write_report(keyed, plots, report_dir, f"coreach release gate: {label}",
                          {"training run": run.info.run_id, "suites": ", ".join(summaries),
                           "episodes": ", ".join(str(s["n_episodes"]) for s in summaries.values())},
                          sections=diagnosis_html(keyed))  # fmt: skip
    meta = release_meta(cfg, robot, suites, run, label, summaries)

    parity, latency = None, None
    try:
        staged = write_bundle(staging / "bundle", policy, urdf, meta, {"report.html": report}, gate={})
        parity = float(verify_bundle(staged).onnx_parity["max_abs_diff"])
        latency = _latency(staged, cfg.latency)
    except BundleError as exc:  # parity beyond the writer's own limit: measure it for the table
        from coreach.runtime.export import export_onnx, onnx_parity

        log.warning("staged bundle refused: %s", exc)
        try:
            parity = onnx_parity(policy, export_onnx(policy, staging / "probe.onnx"), n=int(cfg.parity_n))
        except Exception as probe_exc:  # noqa: BLE001 - the gate row says "not measured"
            log.warning("ONNX parity could not be measured: %s", probe_exc)
    results += G.artifact_gates(parity, int(cfg.parity_n), latency, th)
    return {"results": results, "summaries": summaries, "meta": meta, "report": report, "urdf": urdf,
            "latency": latency, "parity": parity}  # fmt: skip


def _metric_name(name: str) -> str:
    """MLflow metric names allow alphanumerics and _ - . space : / only (gate names carry [suite])."""
    return re.sub(r"[^A-Za-z0-9_\-. :/]", "_", name)


def _headline(summary: dict) -> dict:
    return {k: v for k, v in flat_metrics(summary).items() if k.startswith(("success/", "recovery/", "authority/"))}


def publish(cfg, client, policy, run, label: str, ev: dict) -> dict:
    """Bundle, registry version (vetted), release run, and vetting metrics on the training run; all or nothing."""
    from mlflow.entities import Metric, Param

    name = registry.check_name(str(cfg.name))
    gate = G.as_json(ev["results"])
    run_id = run.info.run_id
    release_run = client.create_run(run.info.experiment_id, run_name=f"release {name} ({label})", tags={
        "coreach.stage": "release", "coreach.source_run": run_id, "coreach.label": label, "coreach.model_name": name,
    })  # fmt: skip
    rid = release_run.info.run_id
    version, created, folder = None, False, None
    root = Path(cfg.out_dir).expanduser()
    fresh = [d for d in (root, root / name) if not d.exists()]  # folders to remove again on failure
    try:
        mv, created = registry.register(client, name, run_id, f"{label} from training run {run_id}")
        version = str(mv.version)
        folder = root / name / f"v{version}"
        meta = {**ev["meta"], "name": f"{name} v{version} ({label})"}
        write_bundle(folder, policy, ev["urdf"], meta, {"report.html": ev["report"]}, gate=gate)
        registry.mark_vetted(client, name, version, folder, gate, rid)
        client.set_tag(rid, "coreach.model_version", version)
        client.set_tag(rid, "coreach.bundle", str(folder.resolve()))
        now = int(time.time() * 1000)
        params = {"name": name, "suites": ",".join(ev["summaries"]), "training_run": run_id,
                  **{f"gates.{k}": str(v) for k, v in OmegaConf.to_container(cfg.gates).items()}}  # fmt: skip
        client.log_batch(rid, params=[Param(k, v) for k, v in params.items()])
        values = [Metric(_metric_name(f"gate/{k}"), v["value"], now, 0) for k, v in gate.items()
                  if v["value"] is not None]  # fmt: skip
        client.log_batch(rid, metrics=values)
        for fname in ("manifest.json", "MODEL_CARD.md", "report.html"):
            client.log_artifact(rid, str(folder / fname), "bundle")
        client.log_text(rid, json.dumps(ev["summaries"], indent=2, default=str), "summaries.json")
        # the vetting metrics `coreach drive` compares a replay with, as `coreach vet` records them
        for suite, s in ev["summaries"].items():
            client.log_batch(run_id, metrics=[Metric(f"vet/{suite}/{k}", v, now, 0) for k, v in _headline(s).items()])
        client.set_tag(run_id, f"coreach.release.{name}", version)
        client.set_terminated(rid)
    except BaseException:
        if folder is not None and folder.exists():
            shutil.rmtree(folder, ignore_errors=True)
        for d in reversed(fresh):
            if d.is_dir() and not any(d.iterdir()):
                d.rmdir()
        registry.unregister(client, name, version, created)
        client.delete_run(rid)
        raise
    return {"version": version, "bundle": str(folder.resolve()), "release_run": rid}


def _vetting_view(summaries: dict) -> dict:
    """The numbers a person reads from each suite (the full summaries are in the release run)."""
    out = {}
    for suite, s in summaries.items():
        out[suite] = {"success": s["success"], "recovery": s["recovery"], "authority_median": s["authority"]["median"],
                      "time_to_success_median": s["time_to_success"]["median"], "n_episodes": s["n_episodes"],
                      "diagnosis": without_episodes(s.get("diagnosis"))}
    return out


def release(cfg: DictConfig) -> dict:
    """Gate `cfg.run`; refuse (exit_code 3, nothing written) or publish it as a vetted registry version."""
    t0 = time.perf_counter()
    uri = tracking.resolve_uri(cfg.tracking.get("uri"))
    os.environ["MLFLOW_TRACKING_URI"] = uri  # load_policy reads runs from the same store
    registry.check_name(str(cfg.name))
    client = registry.client_for(uri)
    policy, run_id, run = _training_run(client, "" if OmegaConf.is_missing(cfg, "run") else str(cfg.run))
    label = run.data.tags.get("coreach.label") or f"decoder-{run_id[:8]}"

    staging = Path(tempfile.mkdtemp(prefix="coreach-release-"))
    try:
        ev = evaluate(cfg, policy, run, label, staging)
        ok = G.passed(ev["results"])
        out = {
            "released": ok,
            "name": str(cfg.name),
            "label": label,
            "training_run": run_id,
            "gates": G.as_json(ev["results"]),
            "failed": [r.name for r in ev["results"] if not r.passed],
            "vetting": _vetting_view(ev["summaries"]),
            "suite_refs": suite_refs(cfg),
            "latency": ev["latency"],
            "cautions": list(CAUTIONS),
            "tracking": uri,
        }
        if ok:
            out.update(publish(cfg, client, policy, run, label, ev))
            out["aliases"] = [registry.VETTED_ALIAS]
        else:
            out["exit_code"] = REFUSED_EXIT
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    out["seconds"] = time.perf_counter() - t0
    return out


# ------------------------------------------------------------------------------------------- demo
def _ranked(demo_result: dict) -> list[dict]:
    """Trained runs, best first by the demo's vetting: success lower bound, then success rate; equals keep the
    order of demo.variants (sorted is stable)."""
    runs = [r for r in demo_result.get("runs", []) if r.get("run_id")]
    vetting = demo_result.get("vetting") or {}
    vetted = vetting.get("summaries", {})
    # vetting labels a decoder by its training run's label (an aggregated one as <label>/agg<round>), so
    # match summaries to runs by the training run id, and by label where no id was recorded
    by_run = {run: vetted[label] for label, run in (vetting.get("sources") or {}).items() if run and label in vetted}

    def key(r):
        s = by_run.get(r["run_id"]) or vetted.get(str(r.get("label")))
        return (s["success"]["lo"], s["success"]["value"]) if s else (-1.0, -1.0)

    return sorted(runs, key=key, reverse=True)


def runtime_tryout(bundle: str, seconds: float, stick=(0.6, 0.3), dt: float = 0.01) -> dict:
    """Step the bundle's runtime Session (verified on open; numpy + onnxruntime, what ships to a robot) for
    `seconds` of a constant simulated stick at a 100 Hz control rate (dt, common practice for arm velocity
    control), integrating q += qd dt from the home pose. Returns how far the tool went, the belief at the
    end and on how many steps each filter acted."""
    import numpy as np

    from coreach.runtime.session import Session

    session = Session.open(bundle)
    m = session.manifest
    q = np.asarray(m.q_home, dtype=np.float64).copy()
    start = session.chain.fk(q)[0].copy()
    steps = max(1, int(round(seconds / dt)))
    acted = {"speed_capped": 0, "position_limited": 0, "workspace_limited": 0, "zeroed": 0}
    for k in range(steps):
        qd = session.step(np.asarray(stick), q, now_s=k * dt)
        info = session.last
        for key in acted:
            acted[key] += bool(getattr(info, key))
        q = q + qd * dt
    end = session.chain.fk(q)[0]
    names = list(m.goal_names)
    belief = session.belief
    return {"steps": steps, "seconds": steps * dt, "stick": list(stick), "fault": session.fault,
            "tool_moved_m": float(np.linalg.norm(end - start)), "belief": dict(zip(names, belief.round(3).tolist())),
            "filters": acted}  # fmt: skip


def release_best(demo_result: dict, cfg: DictConfig) -> dict:
    """Release the best demo decoder that passes the gate, then drive its bundle with the runtime.

    Candidates are tried best first (by the demo's own vetting: success lower bound) until one passes, at
    most cfg.demo.release.max_tries (default 2) of them; each try is the release gate at demo size,
    cfg.demo.release.overrides of conf/release.yaml (default episodes=10, i.e. 30 held-out episodes, and
    latency.steps=1500; about 15-45 s a try on 2 cores). The gate's thresholds stay the release defaults, so
    thin demo evidence may well be refused: that is the honest outcome, and the refusal tables are the result.
    Returns {"attempts": [release summaries], "release": the passing one or None, "drive": its replay}.
    """
    from hydra import compose

    from coreach.release.drive import drive

    node = (cfg.get("demo") or {}).get("release") or {}
    overrides = [str(o) for o in node.get("overrides", ["episodes=10", "latency.steps=1500"])]
    max_tries = int(node.get("max_tries", 2))
    attempts, best = [], None
    for r in _ranked(demo_result)[:max_tries]:
        rcfg = compose(config_name="release", overrides=[f"run={r['run_id']}", *overrides])
        log.info("release gate for %s", r.get("label"))
        summary = release(rcfg)
        attempts.append(summary)
        if summary["released"]:
            best = summary
            break
    out = {"attempts": attempts, "release": best, "drive": None, "fielded": None, "tryout": None}
    if best is not None:
        out["fielded"] = registry.promote(registry.client_for(best["tracking"]), best["name"], best["version"])
        out["tryout"] = runtime_tryout(best["bundle"], float(node.get("tryout_s", 3.0)))
        episodes = next((o.split("=", 1)[1] for o in overrides if o.startswith("episodes=")), "null")
        suite = best["suite_refs"][0]
        dcfg = compose(config_name="drive", overrides=[f"bundle={best['bundle']}", f"suite={suite}",
                                                       f"episodes={episodes}"])  # fmt: skip
        out["drive"] = drive(dcfg)
    return out


__all__ = ["release", "release_best", "runtime_tryout", "evaluate", "publish", "release_meta", "REFUSED_EXIT"]
