"""The release metadata: what the manifest and model card say about the training run, the scene and the gate."""

from __future__ import annotations

import torch

from coreach.errors import ConfigError
from coreach.host.registry import build_plugin
from coreach.world.geometry import matrix_to_quat, rpy_to_matrix
from coreach.world.scene_arm import arm_world
from coreach.world.scene_bodies import world_json


def _nominal_layout(scene) -> dict:
    rpy = torch.deg2rad(torch.tensor([g.approach_rpy_deg for g in scene.goals], dtype=torch.float64))
    return {
        "goal_pos": [list(g.position) for g in scene.goals],
        "goal_quat": matrix_to_quat(rpy_to_matrix(rpy)).tolist(),
        "goal_fine": [list(g.fine_motion) for g in scene.goals],
    }


def _separation_card(s: dict, suite: str) -> dict:
    sep = s.get("separation")
    if not sep:
        return {}
    a = sep["all"]
    return {f"closest link to furniture, {suite}": {"value": a["min_furniture_m"], "unit": "m"},
            f"closest link to the person, {suite}": {"value": a["min_person_m"], "unit": "m"},
            f"contact steps, {suite}": {"value": a["contact_steps"]},
            f"keep-out entries (steps), {suite}": {"value": a["keep_out_steps"]},
            f"time in the reduced-speed zone per episode, {suite}": {"value": a["zone_time_s"], "unit": "s"}}


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
        out[f"stick gain, median, {suite}"] = {"value": s["stick_gain"]["median"], "unit": "rad/s per stick"}
        out.update(_separation_card(s, suite))
    return out


def _world_section(robot, scene) -> dict:
    """The manifest's safety.world: the gate suites' scene bodies and the arm's sphere model."""
    world = arm_world(robot, scene)
    if world is None:
        return {}
    links = {"links": world.links, "centres": world.centres.tolist(), "radii": world.world.radii.tolist(),
             "self_pairs": world.world.self_pairs.tolist()}  # fmt: skip
    return world_json(scene.obstacles, scene.person, scene.separation, links)


def world_of_suites(robot, suites) -> dict:
    """The world every gate suite vetted in; ConfigError when the suites' scenes hold different bodies (the
    bundle ships one world, and it must be the one the gate measured)."""
    first = _world_section(robot, suites[0].scene)
    for s in suites[1:]:
        if _world_section(robot, s.scene) != first:
            raise ConfigError("option gate_suites", f"suite {s.name}'s scene has other bodies than suite "
                                                    f"{suites[0].name}'s; a bundle ships the one world its gate "
                                                    "vetted")  # fmt: skip
    return first


def release_meta(cfg, robot, suites, run, label: str, summaries: dict) -> dict:
    """The `meta` write_bundle needs (see coreach.release.bundle_writer.build_manifest)."""
    scene = suites[0].scene
    for s in suites[1:]:
        if s.goal_names != scene.goal_names:
            raise ConfigError("option gate_suites", f"suite {s.name} has goals {s.goal_names}, suite "
                                                    f"{suites[0].name} {scene.goal_names}; a bundle serves one goal "
                                                    "set")  # fmt: skip
    rt = cfg.safety
    tags = run.data.tags
    return {
        "name": f"{cfg.name} ({label})",
        "goal_names": list(scene.goal_names),
        "nominal_layout": _nominal_layout(scene),
        "dataset_fingerprint": tags["coreach.dataset_sha256"],
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
        "world": world_of_suites(robot, suites),
        "tolerances": {"arrival": suites[0].tolerances},
        "metrics": _model_card_metrics(summaries),
        "parity_n": int(cfg.parity_n),
    }
