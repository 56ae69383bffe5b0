"""`coreach replay`: close the vetting loop with a released bundle and compare the outcome with its vetting.

What comes from where: the plant (forward kinematics, q += qd dt), the simulated operator and the episode
plan are the torch vetting loop (`coreach.vetting.loop.rollout`); the decoder is the bundle's decoder.onnx
run by onnxruntime, loaded only after the bundle verifies; the joint and tool-speed limits, the robot
(URDF, home pose), the belief model and the whole safety filter (stick box and deadband, look-ahead, speed
caps, workspace box: `limits_from_manifest`, the runtime Session's own) are read from the bundle's manifest.
Only the watchdog, which needs a real stick clock, is not exercised here.
"""

from __future__ import annotations

import logging
import math
import tempfile
import time
from pathlib import Path

from mlflow.exceptions import MlflowException
from mlflow.tracking import MlflowClient
from omegaconf import DictConfig, OmegaConf

from coreach.decoder.onnx_interface import OnnxBundleInterface
from coreach.errors import ConfigError
from coreach.release.bundle_store import bundle_folder
from coreach.release.gate import count_violations
from coreach.runtime.belief_manifest import belief_from_manifest
from coreach.runtime.bundle import BundleError, Manifest, sha256_bytes
from coreach.runtime.kinematics import Chain
from coreach.runtime.session import arm_world_from_manifest
from coreach.runtime.session import limits_from_manifest
from coreach.safety import SafetyLimits
from coreach.tracking import resolve_uri, sqlite_path
from coreach.vetting.loop import rollout
from coreach.vetting.metrics import summarise
from coreach.vetting.suite import suite_from_config
from coreach.world.urdf_arm import UrdfArm

log = logging.getLogger("coreach.replay")
MISMATCH_EXIT = 3
NOTE = ("plant, operator and episode plan: the torch vetting loop; decoder: the bundle's decoder.onnx on "
        "onnxruntime; robot, limits and belief parameters: the bundle's manifest")  # fmt: skip


def bundle_robot(m: Manifest):
    """The torch robot of the bundle's robot.urdf (the hashed bytes), with the bundle's home pose."""
    data = m.path("robot.urdf").read_bytes()
    if sha256_bytes(data) != m.files["robot.urdf"]:
        raise BundleError(str(m.path("robot.urdf")), "changed since the bundle was verified; sha256 differs")
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "robot.urdf"
        path.write_bytes(data)
        return UrdfArm(urdf=str(path), tool_link=m.tool_link, home=m.q_home.tolist(), name=m.robot_name)


def bundle_limits(m: Manifest) -> SafetyLimits:
    """The bundle's own filter (the runtime Session's), so the replay measures what ships."""
    return limits_from_manifest(m)


def vetted_metrics(tracking_uri: str, run_id: str, suite: str) -> tuple[dict | None, str]:
    """The vet/<suite>/... metrics recorded on the training run (by coreach vet or release), and a note."""
    db = sqlite_path(tracking_uri)
    if db is not None and not db.exists():
        return None, f"no tracking store at {db}"
    try:
        run = MlflowClient(tracking_uri).get_run(run_id)
    except MlflowException:
        return None, f"training run {run_id} is not in {tracking_uri}"
    prefix = f"vet/{suite}/"
    found = {k[len(prefix) :]: v for k, v in run.data.metrics.items() if k.startswith(prefix)}
    if not found:
        return None, f"training run {run_id} has no vetting metrics for suite {suite}"
    return found, f"vetting metrics of training run {run_id} on {suite}"


def _rate_tol(tol, n: int) -> float:
    """A rate over n episodes may differ by `rate_episodes` episodes' worth (plus rounding)."""
    return float(tol.rate_episodes) / max(n, 1) + 1e-12


def compare(summary: dict, vetted: dict | None, tol) -> dict | None:
    """Rows (metric, vetted, replay, |diff|, tolerance, ok) for every metric both sides have; None if not
    comparable (no record, or a record over a different number of episodes)."""
    if vetted is None:
        return None
    n = summary["success"]["n"]
    if int(vetted.get("success/n", -1)) != n:
        return {"comparable": False, "match": None, "rows": [],
                "note": f"vetting covered {int(vetted.get('success/n', 0))} episodes, this replay {n}; rerun with "
                        "the same episodes for a like-for-like comparison"}  # fmt: skip
    rows = []

    def add(metric: str, replay: float, tolerance: float, relative: bool = False):
        ref = vetted.get(metric)
        if ref is None or replay is None or (isinstance(replay, float) and math.isnan(replay)):
            return
        diff = abs(replay - ref)
        allowed = tolerance * max(abs(ref), 1e-12) if relative else tolerance
        rows.append({"metric": metric, "vetted": ref, "replay": replay, "diff": diff, "tolerance": allowed,
                     "ok": diff <= allowed})  # fmt: skip

    add("success/value", summary["success"]["value"], _rate_tol(tol, n))
    for cell, r in summary["recovery"].items():
        add(f"recovery/{cell}/value", r["value"], _rate_tol(tol, r["n"]))
    add("stick_gain/median", summary["stick_gain"]["median"], float(tol.median_rel), relative=True)
    match = bool(rows) and all(r["ok"] for r in rows)
    return {"comparable": True, "match": match, "rows": rows,
            "note": f"rates within {tol.rate_episodes} episodes' worth; medians within "
                    f"{float(tol.median_rel):.1%} relative"}  # fmt: skip


def replay(cfg: DictConfig) -> dict:
    """Replay `cfg.bundle` on `cfg.suite`; the summary, limit checks and the comparison with its vetting."""
    t0 = time.perf_counter()
    if OmegaConf.is_missing(cfg, "bundle") or not str(cfg.bundle):
        raise ConfigError("option bundle", "expected a release bundle folder (releases/<name>/v<version>) or a "
                                           "released model as NAME@ALIAS or NAME/VERSION")  # fmt: skip
    uri = resolve_uri(cfg.tracking.get("uri"))
    folder = bundle_folder(str(cfg.bundle), uri=uri)
    interface = OnnxBundleInterface(str(folder), name=f"bundle {folder.resolve().parent.name}/{folder.name}",
                                    threads=int(cfg.get("threads", 1)))  # fmt: skip
    m = interface.manifest_
    robot = bundle_robot(m)
    belief = belief_from_manifest(m.belief)
    limits = bundle_limits(m)
    suite = suite_from_config(cfg)
    suite.validate(robot, spec_n_goals=m.n_goals)
    if list(suite.goal_names) != list(m.goal_names):
        raise ConfigError("option suite", f"suite {suite.name} has goals {suite.goal_names}; the bundle's decoder "
                                          f"was released for {list(m.goal_names)} (same order)")  # fmt: skip

    log.info("driving %s on %s (%d episodes x %d steps)", folder, suite.name, suite.n_episodes, suite.steps)
    # the bundle's own world (bodies, separation settings, sphere model), as the Session rebuilds it
    chain = Chain.from_string(m.path("robot.urdf").read_text(encoding="utf-8"), m.tool_link)
    world = arm_world_from_manifest(m, chain) or False
    record = rollout(robot, interface, suite.build_operator(), suite, belief, limits, suite.generator(), world=world)
    summary = summarise(record, suite.tolerances)
    violations = count_violations(record, robot, limits, (m.workspace_min.tolist(), m.workspace_max.tolist()))
    vetted, source = vetted_metrics(uri, m.training_run_id, suite.name)
    comparison = compare(summary, vetted, cfg.tolerance)
    out = {
        "bundle": str(folder.resolve()),
        "suite": suite.name,
        "training_run": m.training_run_id,
        "summaries": {interface.name: summary},
        "violations": violations,
        "comparison": comparison,
        "comparison_source": source,
        "onnx_parity": m.onnx_parity,
        "note": NOTE,
        "seconds": time.perf_counter() - t0,
    }
    if comparison and comparison["comparable"] and not comparison["match"] and cfg.fail_on_mismatch:
        out["exit_code"] = MISMATCH_EXIT
    return out


__all__ = ["replay", "compare", "vetted_metrics", "bundle_robot", "bundle_limits", "NOTE"]
