"""Orchestration of `coreach recipes`: compose every sub-stage, train, vet, and record it all on one MLflow run."""

from __future__ import annotations

import json
import logging
import shlex
import time

from mlflow.entities import Param
from omegaconf import DictConfig
from rich.console import Console

from coreach import tracking
from coreach.commands import table
from coreach.commands.recipes.plan import Plan, _distinct, plan_from
from coreach.commands.recipes.render import write_results
from coreach.commands.recipes.stats import assemble
from coreach.commands.table import load_target
from coreach.config.command_line import override_key, user_overrides
from coreach.config.compose import compose_here, suite_overrides
from coreach.config.plugin_options import check_groups, check_plugins
from coreach.errors import ConfigError, CoreachError
from coreach.host.registry import build_plugin
from coreach.progress import interactive
from coreach.vetting.stage import vet
from coreach.vetting.suite import suite_from_config

log = logging.getLogger("coreach.recipes")
PROGRAM = ".venv/bin/coreach recipes"


def stage_command(command: str, where: str):
    """(config name, function) of a registered Hydra command; a recipe may name one not installed yet."""
    cmd = table.COMMANDS.get(command)  # read at call time: the table is the one the CLI dispatches from
    if cmd is None or not cmd.hydra:
        raise ConfigError(where, f"command {command!r} is not available in this installation")
    return cmd.config, load_target(cmd.run)


def compose_stage(config_name: str, overrides: list[str], where: str) -> DictConfig:
    """Compose a sub-stage's config inside the running Hydra app; failures name the recipe or option."""
    cfg = compose_here(config_name, overrides, where)
    try:
        check_plugins(cfg)
        check_groups(cfg)
    except CoreachError as exc:
        raise ConfigError(f"{where}, {exc.where}", exc.problem) from None
    return cfg


def command_line(overrides: list[str]) -> str:
    return " ".join([PROGRAM, *(shlex.quote(o) for o in overrides)])


def _tracking_overrides(overrides: list[str]) -> list[str]:
    """`tracking=...` and `tracking.*=...`: every sub-stage must write to the same store and experiment."""
    return [o for o in overrides if override_key(o).split(".")[0] == "tracking"]


def _say(message: str) -> None:
    if interactive():
        Console(stderr=True).rule(message)
    else:
        log.info(message)


def recipes(cfg: DictConfig) -> dict:
    """Train every selected recipe once per seed, vet all decoders and the baselines on each suite, and write
    results.md, results.csv and results.json into `out` (also logged on one MLflow run)."""
    t0 = time.perf_counter()
    plan = plan_from(cfg)
    given = user_overrides()
    forward = _tracking_overrides(given)
    vet_cfgs = [compose_stage("vet", [*forward, *suite_overrides(ref, plan.episodes), *plan.vet_overrides],
                              "option vet_suites / vet_overrides") for ref in plan.suites]  # fmt: skip
    robot = build_plugin(vet_cfgs[0].robot, "robot")
    suites = []  # every suite is read and checked before the first training: a typo costs seconds, not hours
    for vcfg in vet_cfgs:
        try:
            suite = suite_from_config(vcfg)
            suite.validate(robot)
        except ConfigError as exc:
            raise ConfigError("option vet_suites" if exc.where == "option suite" else exc.where, exc.problem) from None
        suites.append(suite.name)
    _distinct(tuple(suites), "option vet_suites (suite names)")
    jobs = []
    for r in plan.recipes:
        config_name, fn = stage_command(r.command, f"option recipes.{r.label}.command")
        for seed in plan.seeds:
            sub = compose_stage(config_name, [*forward, *r.overrides, *plan.train_overrides, f"seed={seed}"],
                           f"recipe {r.label} (seed {seed})")  # fmt: skip
            if "label" in sub:  # one folder and one vetting label per training
                sub.label = f"{r.label}-s{seed}"
            jobs.append((r, seed, fn, sub))

    client, exp_id = tracking.client(cfg.tracking)
    cmd = command_line(given)
    # the code this run loads is the code at its start; commits made while it runs must not be credited with it
    commit = tracking.git_commit()
    parent = _start_parent(client, exp_id, plan, cmd, commit)
    try:
        trained = []
        for i, (r, seed, fn, sub) in enumerate(jobs, 1):
            _say(f"[{i}/{len(jobs)}] {r.command} {r.label} seed {seed}")
            summary = fn(sub) or {}
            if not summary.get("run_id"):
                raise CoreachError(f"recipe {r.label}", f"the {r.command} command returned no run_id")
            trained.append({"recipe": r.label, "seed": seed, "command": r.command, "run_id": summary["run_id"],
                            "seconds": summary.get("seconds")})  # fmt: skip
            _adopt(client, summary["run_id"], parent, r.label, seed)
            log.info("%s seed %d: run %s", r.label, seed, summary["run_id"])

        candidates = [t["run_id"] for t in trained] + list(plan.baselines)
        vetted = {}
        for j, (ref, name, vcfg) in enumerate(zip(plan.suites, suites, vet_cfgs), 1):
            _say(f"[{j}/{len(plan.suites)}] vetting {len(candidates)} candidates on {name}")
            vcfg.candidates = candidates
            vcfg.report_dir = str(plan.out / f"vet-{_slug(name)}")
            vetted[name] = vet(vcfg)
            for rid in vetted[name].get("vet_runs", {}).values():
                _adopt(client, rid, parent)
        result = assemble(plan, trained, vetted, cmd, given, commit)
        result["parent_run"] = parent
        result["tracking"] = tracking.resolve_uri(cfg.tracking.get("uri"))
        files = write_results(result, plan.out)
        _finish_parent(client, parent, result, files)
    except BaseException:
        client.set_terminated(parent, status="FAILED")
        raise
    result["seconds"] = time.perf_counter() - t0
    return result


def _start_parent(client, exp_id, plan: Plan, cmd: str, commit: str | None) -> str:
    tags = {"coreach.stage": "recipes", "coreach.command": cmd[:4900]}
    if commit:
        tags["mlflow.source.git.commit"] = commit
    run = client.create_run(exp_id, run_name="recipes " + ", ".join(r.label for r in plan.recipes), tags=tags)

    params = {"recipes": json.dumps({r.label: {"command": r.command, "overrides": list(r.overrides)}
                                     for r in plan.recipes}),
              "seeds": json.dumps(list(plan.seeds)), "vet_suites": json.dumps(list(plan.suites)),
              "episodes": str(plan.episodes), "baselines": json.dumps(list(plan.baselines)),
              "train_overrides": json.dumps(list(plan.train_overrides))}  # fmt: skip
    client.log_batch(run.info.run_id, params=[Param(k, v[:6000]) for k, v in params.items()])
    return run.info.run_id


def _adopt(client, run_id: str, parent: str, recipe: str | None = None, seed: int | None = None) -> None:
    """Nest a training or vetting run under the recipes run (MLflow's UI groups children by this tag)."""
    client.set_tag(run_id, "mlflow.parentRunId", parent)
    client.set_tag(run_id, "coreach.recipes_run", parent)
    if recipe is not None:
        client.set_tag(run_id, "coreach.recipe", recipe)
        client.set_tag(run_id, "coreach.sweep", f"recipes-{parent[:8]}")  # `coreach compare --sweep` finds them
        client.set_tag(run_id, "coreach.recipe_seed", str(seed))


def _finish_parent(client, parent: str, result: dict, files: dict[str, str]) -> None:
    for path in files.values():
        client.log_artifact(parent, path)
    runs = {"trainings": result["trainings"],
            "vettings": {s: v["vet_runs"] for s, v in result["vettings"].items()}}  # fmt: skip
    tracking.log_json(client, parent, runs, "runs.json")
    client.set_terminated(parent)


def _slug(text: str) -> str:
    return "".join(c if c.isalnum() or c in "-_." else "_" for c in text)
