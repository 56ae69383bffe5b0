"""`coreach bench vet`: episode-steps per second of the batched vetting loop, against the per-episode loop and
a bare batched decoder forward pass over the same inputs, all measured in one run.

Reference size: 1,000 goal-switch episodes x 200 steps x 25 candidate sticks (5 million decoder inputs).
The per-episode reference runs a few episodes only and is scaled to a per-step rate (its cost is linear in
the episode count). The bare pass calls the decoder once per step on all E x K (episode, candidate) inputs,
as the loop does, so the ratio shows what kinematics, belief, limits and bookkeeping add around it.
The batched loop also runs without the scene's bodies (no separation step, no separation records), so the
world's cost is a ratio measured side by side (target: at most 1.25).
"""

from __future__ import annotations

import logging
import math
import time

import torch
from omegaconf import DictConfig, OmegaConf

from coreach.context import ContextSpec
from coreach.decoder import reference as decoder_reference
from coreach.decoder.policy import DecoderPolicy
from coreach.decoder.torch_interface import DecoderInterface
from coreach.errors import ConfigError
from coreach.host.registry import build_plugin, builtin_option
from coreach.release.export import sample_inputs
from coreach.safety import limits_from_config
from coreach.tracking import resolve_uri
from coreach.vetting.loop import rollout, rollout_per_episode
from coreach.vetting.suite import load_suite

log = logging.getLogger("coreach.bench")


def _policy(cfg, robot, n_goals: int):
    """The decoder to drive: a trained one, or an untrained 2 x 256 cVAE (throughput does not need skill)."""
    if cfg.get("run"):
        return decoder_reference.load(str(cfg.run), resolve_uri(cfg.get("tracking", {}).get("uri")), "option run")[0], str(cfg.run)
    torch.manual_seed(0)
    model = builtin_option("model", "cvae")
    model.update({"latent_dim": 2, "hidden": [256, 256], "activation": "silu"})  # pinned: the yaml may change
    policy = DecoderPolicy.build(model, ContextSpec(dof=robot.dof, n_goals=n_goals), robot.dof).eval()
    return policy, "untrained cVAE 2x256"


def _bare_seconds(policy, E: int, K: int, T: int) -> float:
    """T forward passes over E*K (stick, context) inputs, the loop's call pattern without the loop."""
    stick, context = (torch.from_numpy(a) for a in sample_inputs(policy, E * K, seed=0))
    dtype = next(policy.parameters()).dtype
    stick, context = stick.to(dtype), context.to(dtype)
    with torch.no_grad():
        policy(stick[:K], context[:K])  # warm-up
        t0 = time.perf_counter()
        for _ in range(T):
            policy(stick, context)
    return time.perf_counter() - t0


def run(cfg: DictConfig) -> dict:
    if int(cfg.episodes) < 1 or int(cfg.per_episode) < 1:
        raise ConfigError("option episodes/per_episode", "expected positive episode counts")
    over = {"horizon_s": float(cfg.horizon_s), "candidates_per_axis": int(cfg.candidates_per_axis)}
    suite = load_suite(str(cfg.suite), episodes=int(cfg.episodes), **over)
    cells = len(suite.switch_fractions)
    small = load_suite(str(cfg.suite), episodes=max(1, math.ceil(int(cfg.per_episode) / cells)), **over)
    robot = build_plugin(cfg.robot, "robot")
    belief = build_plugin(cfg.belief, "belief")
    limits = limits_from_config(robot, cfg.safety)
    # no suite.validate: throughput does not need reachable goals, and short quick runs would fail it
    policy, source = _policy(cfg, robot, len(suite.goal_names))
    interface = DecoderInterface(policy, name=source)
    E, T, K = suite.n_episodes, suite.steps, suite.candidates_per_axis**2
    e_small = small.n_episodes

    warm = load_suite(str(cfg.suite), episodes=1, horizon_s=2.0)  # first calls of kinematics, autograd
    rollout(robot, interface, warm.build_operator(), warm, belief, limits, warm.generator())

    log.info("bare decoder pass: %d steps x %d inputs", T, E * K)
    t_bare = _bare_seconds(policy, E, K, T)
    log.info("batched loop: %d episodes x %d steps x %d candidates", E, T, K)
    t0 = time.perf_counter()
    rollout(robot, interface, suite.build_operator(), suite, belief, limits, suite.generator())
    t_loop = time.perf_counter() - t0
    log.info("batched loop without the scene's bodies")
    t0 = time.perf_counter()
    rollout(robot, interface, suite.build_operator(), suite, belief, limits, suite.generator(), world=False)
    t_bare_world = time.perf_counter() - t0
    log.info("per-episode loop: %d episodes", e_small)
    t0 = time.perf_counter()
    rollout_per_episode(robot, interface, small.build_operator(), small, belief, limits, small.generator())
    t_each = time.perf_counter() - t0

    loop_rate, each_rate, bare_rate = E * T / t_loop, e_small * T / t_each, E * T / t_bare
    targets = OmegaConf.to_container(cfg.targets)
    speedup, share = loop_rate / each_rate, loop_rate / bare_rate
    return {
        "decoder": source,
        "episodes": E,
        "steps": T,
        "candidates": K,
        "decoder_inputs": E * T * K,
        "torch_threads": torch.get_num_threads(),
        "loop_seconds": t_loop,
        "loop_episode_steps_per_s": loop_rate,
        "per_episode_episodes": e_small,
        "per_episode_seconds": t_each,
        "per_episode_episode_steps_per_s": each_rate,
        "bare_seconds": t_bare,
        "bare_episode_steps_per_s": bare_rate,
        "speedup_over_per_episode": speedup,
        "target_speedup_over_per_episode": targets["speedup_over_per_episode"],
        "meets_speedup_target": speedup >= targets["speedup_over_per_episode"],
        "share_of_bare": share,
        "target_share_of_bare": targets["share_of_bare"],
        "meets_share_target": share >= targets["share_of_bare"],
        "loop_seconds_without_bodies": t_bare_world,
        "world_cost": t_loop / t_bare_world,
        "target_world_cost": targets["world_cost"],
        "meets_world_cost_target": t_loop / t_bare_world <= targets["world_cost"],
    }
