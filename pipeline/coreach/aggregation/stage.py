"""`coreach aggregate`: closed-loop data aggregation (the published DAgger method) for a decoder.

Each round: roll the current decoder out against simulated operators, label every visited state with the
labeller's action toward the goal the operator wanted there, add those episodes to the dataset and
retrain from scratch on the union. Every round is a training run in MLflow, tagged with the aggregation's
parent run, its round and the run it was rolled out from (one lineage); the parent run carries the
closed-loop success of each round's decoder on a fixed set of rollout episodes (`aggregate/success`).
"""

from __future__ import annotations

import dataclasses
import logging
import tempfile
import time
from pathlib import Path

import torch
from mlflow.entities import Metric, Param
from omegaconf import DictConfig, OmegaConf

from coreach import tracking
from coreach.world.scene_arm import arm_world
from coreach.aggregation.visits import visit_episodes, visits_from_record
from coreach.config.command_line import command_line_options
from coreach.episodes import EpisodeSet, save_parquet
from coreach.errors import ConfigError
from coreach.decoder import reference as decoder_reference
from coreach.decoder.torch_interface import DecoderInterface
from coreach.host.registry import build_plugin, builtin_option
from coreach.safety import limits_from_config
from coreach.training.run import train
from coreach.vetting.loop import rollout
from coreach.vetting.suite import MIN_SEED, Suite, suite_from_dict

log = logging.getLogger("coreach.aggregate")
WHERE = "option aggregate"
# Rollout seeds stay below this so that, with one generator per operator (seed + SEED_STRIDE * i), no
# aggregation rollout reuses a vetting suite's random stream (vetting seeds start at MIN_SEED).
SEED_STRIDE = 1000
MAX_OPERATORS = MIN_SEED // SEED_STRIDE - 1
ID_STRIDE = 1_000_000  # episode ids of round r, operator i start at (r * 10 + i + 1) * ID_STRIDE


def _seeds(opts) -> list[int]:
    seeds = list(opts.rollout_seeds or [])
    if not seeds:
        raise ConfigError(f"{WHERE}.rollout_seeds", "expected a non-empty list of rollout seeds, one per aggregation round")
    for i, s in enumerate(seeds):
        if isinstance(s, bool) or not isinstance(s, int) or not 0 <= s < SEED_STRIDE:
            raise ConfigError(f"{WHERE}.rollout_seeds[{i}]", f"expected an integer in [0, {SEED_STRIDE}), got {s!r}")
    if len(set(seeds)) != len(seeds):
        raise ConfigError(f"{WHERE}.rollout_seeds", f"expected distinct seeds, got {seeds}")
    score = opts.score_seed
    if isinstance(score, bool) or not isinstance(score, int) or not 0 <= score < SEED_STRIDE or score in seeds:
        raise ConfigError(f"{WHERE}.score_seed", f"expected an integer in [0, {SEED_STRIDE}) not among rollout_seeds, got {score!r}")
    return seeds


def rollout_suites(cfg: DictConfig, robot) -> list[Suite]:
    """One suite per operator of `aggregate.operators`, from `aggregate.rollout`, checked on the robot (the
    scripted demonstrator must complete every goal from the start pose, else one line names the goal)."""
    opts = cfg.aggregate
    operators = list(opts.operators or [])
    if not operators or len(operators) > MAX_OPERATORS:
        raise ConfigError(f"{WHERE}.operators", f"expected 1 to {MAX_OPERATORS} operator names, got {operators}")
    base = OmegaConf.to_container(opts.rollout, resolve=True)
    suites = []
    for op in operators:
        data = {**base, "name": f"aggregate-{op}", "operator": op, "seed": MIN_SEED}
        suite = suite_from_dict(data, f"{WHERE}.rollout")
        if suites:  # the reach check does not depend on the operator: run the demonstrator once
            suite.build_operator()
        else:
            suite.validate(robot, where=f"{WHERE}.rollout (operator {op})")
        suites.append(suite)
    return suites


def _roll(robot, interface, suite: Suite, seed: int, belief, limits):
    """(record, plan) of `interface` on `suite` with its generator seeded by `seed`."""
    s = dataclasses.replace(suite, seed=seed)  # below MIN_SEED on purpose: training-side episodes
    record = rollout(robot, interface, s.build_operator(), s, belief, limits, s.generator())
    return record, s.episodes_plan(s.generator(), robot)


def collect(robot, interface, suites, seed: int, belief, limits, labeller, round_no: int) -> tuple[list, dict]:
    """Labelled episodes from rollouts of `interface` (one per suite), and how many states they hold."""
    episodes, states = [], 0
    for i, suite in enumerate(suites):
        record, plan = _roll(robot, interface, suite, seed + SEED_STRIDE * i, belief, limits)
        visits = visits_from_record(record, plan, robot, suite.position_tol, suite.orientation_tol)
        visits.world = arm_world(robot, suite.scene, limits.tcp_speed_max)
        labels = labeller.label(robot, visits)
        if tuple(labels.shape) != (len(visits), robot.dof) or not bool(torch.isfinite(labels).all()):
            raise ConfigError(f"labeller {labeller.name}", f"expected finite labels of shape [{len(visits)}, {robot.dof}], "
                              f"got {list(labels.shape)}")  # fmt: skip
        offset = (round_no * 10 + i + 1) * ID_STRIDE
        episodes += visit_episodes(visits, labels.to(torch.float64), record, plan, offset)
        states += len(visits)
    return episodes, {"states": states, "episodes": len(episodes)}


def score_round(robot, interface, suites, seed: int, belief, limits) -> dict:
    """Closed-loop success of `interface` on the fixed scoring episodes, per operator and overall."""
    per, wins, n = {}, 0, 0
    for i, suite in enumerate(suites):
        record, _ = _roll(robot, interface, suite, seed + SEED_STRIDE * i, belief, limits)
        k, m = int(record.success.sum()), record.n_episodes
        per[suite.name] = k / m
        wins, n = wins + k, n + m
    return {"success": wins / n, "per_operator": per, "episodes": n}


def _decoder(run: str, store: str):
    try:
        policy, source = decoder_reference.load(run, store, f"{WHERE}.start_run")
        return DecoderInterface(policy, decoder_reference.label(run), source)
    except ConfigError as exc:
        raise ConfigError(f"{WHERE}.start_run", f"{run!r} is not a trained decoder ({exc.problem})") from None


def _round_config(cfg: DictConfig, path: Path | None, label: str) -> DictConfig:
    sub = OmegaConf.create(OmegaConf.to_container(cfg, resolve=False))
    OmegaConf.set_struct(sub, False)
    if path is not None:
        sub.dataset = builtin_option("dataset", "parquet_file")
        sub.dataset.update({"path": str(path), "min_steps": 2})
    sub.label = label
    sub.run_name = label
    sub.resume = None
    return sub


# What a start run's recipe fixes for every retraining round: its arm, data, belief, model, loss, filter,
# data split, trainer and seed (from the config.yaml it logged).
INHERITED = ("robot", "dataset", "belief", "model", "loss", "safety", "data", "trainer", "seed")


def _inherit_recipe(cfg: DictConfig, run_id: str) -> DictConfig:
    """`cfg` with the start run's recipe (INHERITED), so the rounds retrain what the start run trained.

    Refuses a command line that also sets one of those options: which of the two was meant is not clear."""
    client, _ = tracking.client(cfg.tracking)
    try:
        with tempfile.TemporaryDirectory() as tmp:
            start = OmegaConf.load(client.download_artifacts(run_id, "config.yaml", tmp))
    except Exception as exc:  # noqa: BLE001 - the store's own words, in one line
        raise ConfigError(f"{WHERE}.start_run", f"{run_id!r}: cannot read its config.yaml (the recipe a round "
                                                f"retrains): {str(exc).splitlines()[0][:160]}") from None  # fmt: skip
    clash = sorted(set(command_line_options().values()) & {*INHERITED, "experiment"})  # experiment: model, loss
    if clash:
        raise ConfigError(f"{WHERE}.start_run", f"the rounds retrain the start run's recipe; the command line also "
                                                f"sets {', '.join(clash)}: leave those out, or leave start_run out")  # fmt: skip
    out = OmegaConf.create(OmegaConf.to_container(cfg, resolve=False))
    OmegaConf.set_struct(out, False)
    for key in INHERITED:
        if key in start:
            out[key] = start[key]
    if not out.get("label") and start.get("label"):
        out.label = start.label
    return out


def aggregate(cfg: DictConfig) -> dict:
    """Run `len(aggregate.rollout_seeds)` rounds of data aggregation; the summary's `run_id` is the last
    round's training run (the aggregated decoder). With `aggregate.start_run`, round 0 is that run and every
    round retrains its recipe (arm, data, model, loss, trainer: the run's logged config)."""
    t0 = time.perf_counter()
    opts = cfg.aggregate
    seeds = _seeds(opts)
    if opts.get("start_run"):
        _decoder(str(opts.start_run), tracking.resolve_uri(cfg.tracking.get("uri")))  # refuse a run that is not a decoder first
        cfg = _inherit_recipe(cfg, str(opts.start_run))
    robot = build_plugin(cfg.robot, "robot")
    belief = build_plugin(cfg.belief, "belief")
    labeller = build_plugin(cfg.labeller, "labeller")
    limits = limits_from_config(robot, cfg.safety)
    suites = rollout_suites(cfg, robot)
    start = opts.get("start_run")
    # refuse a run that is not a decoder before anything is written; round 1 rolls this one out
    store = tracking.resolve_uri(cfg.tracking.get("uri"))
    interface = _decoder(str(start), store) if start else None
    base = build_plugin(cfg.dataset, "dataset").load(robot)
    label = str(cfg.get("label") or "decoder")

    client, exp_id = tracking.client(cfg.tracking)
    parent = client.create_run(exp_id, run_name=f"aggregate {label}", tags={
        "coreach.stage": "aggregate", "coreach.label": label, "coreach.labeller": labeller.name,
        "coreach.dataset_sha256": base.fingerprint(),
    }).info.run_id  # fmt: skip
    params = {"rollout_seeds": str(seeds), "score_seed": str(opts.score_seed), "operators": str(list(opts.operators)),
              "labeller": labeller.name, "seed": str(cfg.seed), "start_run": str(start or "")}  # fmt: skip
    client.log_batch(parent, params=[Param(k, v) for k, v in params.items()])
    client.log_text(parent, OmegaConf.to_yaml(cfg, resolve=True), "config.yaml")
    cache = Path(str(opts.cache_dir)) / parent
    rounds: list[dict] = []
    last: dict = {}
    try:
        if start:
            current = str(start)
            rounds.append({"round": 0, "run_id": current, "dataset": base.fingerprint(), "episodes": len(base)})
        else:
            log.info("aggregation round 0: training on the demonstrations")
            first = last = train(_round_config(cfg, None, f"{label}/agg0"))
            current = first["run_id"]
            _tag_round(client, current, parent, 0, None)
            rounds.append({"round": 0, "run_id": current, "dataset": base.fingerprint(), "episodes": len(base),
                           "val_loss": first["val_loss"]})  # fmt: skip
        data = list(base.episodes)
        for r, seed in enumerate(seeds, start=1):
            interface = interface if r == 1 and interface is not None else _decoder(current, store)
            score = score_round(robot, interface, suites, int(opts.score_seed), belief, limits)
            rounds[-1]["score"] = score
            _log_round(client, parent, r - 1, score)
            log.info("aggregation round %d: decoder %s succeeds in %.2f of the scoring episodes", r - 1, current[:8], score["success"])
            new, counts = collect(robot, interface, suites, seed, belief, limits, labeller, r)
            data += new
            merged = EpisodeSet(data, base.goal_names, base.joint_names, base.dt,
                                source=f"aggregate:{parent} round={r} base={base.source}")  # fmt: skip
            path = save_parquet(merged, cache / f"round-{r}.parquet")
            log.info("aggregation round %d: +%d episodes (%d states); retraining on %d episodes", r,
                     counts["episodes"], counts["states"], len(merged))  # fmt: skip
            summary = last = train(_round_config(cfg, path, f"{label}/agg{r}"))
            _tag_round(client, summary["run_id"], parent, r, current)
            current = summary["run_id"]
            rounds.append({"round": r, "run_id": current, "dataset": merged.fingerprint(), "episodes": len(merged),
                           "added": counts, "rollout_seed": seed, "path": str(path), "val_loss": summary["val_loss"]})  # fmt: skip
        score = score_round(robot, _decoder(current, store), suites, int(opts.score_seed), belief, limits)
        rounds[-1]["score"] = score
        _log_round(client, parent, len(seeds), score)
        tracking.log_json(client, parent, rounds, "rounds.json")
        client.set_tag(parent, "coreach.source_run", current)
    except BaseException:
        client.set_terminated(parent, status="FAILED")
        raise
    client.set_terminated(parent)
    # the last round's training figures (validation losses, epochs), as `coreach train` reports them
    trained = {k: last[k] for k in ("metrics", "val_loss", "epochs", "best_epoch") if k in last}
    return {"run_id": current, "parent_run": parent, "rounds": rounds, "label": label, **trained,
            "seconds": time.perf_counter() - t0}  # fmt: skip


def _tag_round(client, run_id: str, parent: str, round_no: int, previous: str | None) -> None:
    client.set_tag(run_id, "coreach.aggregate.parent", parent)
    client.set_tag(run_id, "coreach.aggregate.round", str(round_no))
    if previous:
        client.set_tag(run_id, "coreach.aggregate.previous", previous)


def _log_round(client, parent: str, round_no: int, score: dict) -> None:
    now = int(time.time() * 1000)
    metrics = [Metric("aggregate/success", score["success"], now, round_no)]
    metrics += [Metric(f"aggregate/success/{k}", v, now, round_no) for k, v in score["per_operator"].items()]
    client.log_batch(parent, metrics=metrics)
