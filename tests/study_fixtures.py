"""Shared by the study tests: a small untrained decoder released on the bedside shelf's goals, and tiny plans.

The decoder is untrained (the session and its records are tested, not the decoder), so its bundle carries no
gate record: that counts as released with loosened gates, and plans driving it say pilot: true.
"""

from __future__ import annotations

from pathlib import Path

import torch

from coreach.context import ContextSpec
from coreach.decoder.policy import DecoderPolicy
from coreach.release.bundle_writer import write_bundle
from coreach.release.metadata import _nominal_layout, _world_section
from coreach.study.plan import build_plan, compose_study, freeze
from coreach.world.scenario import load_scenario
from coreach.world.urdf_arm import SEVEN_JOINT_ARM_HOME, UrdfArm, shipped_urdf


def study_bundle(out: Path) -> Path:
    torch.manual_seed(0)
    scene = load_scenario("bedside_shelf")
    spec = ContextSpec(dof=7, n_goals=len(scene.goal_names))
    policy = DecoderPolicy.build({"_target_": "coreach_plugins.model.cvae.BeliefCVAE", "latent_dim": 2,
                                  "hidden": [32, 32]}, spec, 7)  # fmt: skip
    policy.set_normalisation(torch.randn(400, spec.width) * 0.5, torch.randn(400, 7) * 0.3)
    meta = {"goal_names": scene.goal_names, "nominal_layout": _nominal_layout(scene),
            "dataset_fingerprint": "sha256:feed", "training_run_id": "run-study", "git_commit": "0" * 40,
            "q_home": list(SEVEN_JOINT_ARM_HOME), "parity_n": 200, "world": _world_section(UrdfArm(), scene),
            "safety": {"workspace_min": [-0.2, -0.8, 0.0], "workspace_max": [1.0, 0.8, 1.2]}}  # fmt: skip
    return write_bundle(out, policy, shipped_urdf(), meta, {}, {"passed": True})


def tiny_overrides(bundle: Path, *extra: str) -> list[str]:
    """Two conditions (the bundle and direct control), one task, one practice and one measured trial each,
    two participants: the smallest plan with every kind of step."""
    return [f"study.conditions=[{{kind: bundle, ref: '{bundle}', name: decoder}},{{kind: direct}}]",
            "study.tasks=[{name: lamp, goal: lamp_switch}]", "study.trials=1", "study.practice_trials=1",
            "study.participants=2", "study.pilot=true", "study.trial_time_limit_s=3", *extra]  # fmt: skip


def tiny_plan(root: Path, bundle: Path, *extra: str) -> dict:
    """Freeze the tiny plan under root; returns what freeze returned, plus the plan."""
    plan = build_plan(compose_study("bedside_shelf", tiny_overrides(bundle, *extra)))
    return {**freeze(plan, root), "plan": plan}
