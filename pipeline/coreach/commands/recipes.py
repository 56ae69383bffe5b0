"""`coreach recipes`: train named recipes over several training seeds, vet them with the baselines, one table."""

from __future__ import annotations

import csv
import io
import json
import logging
import math
import shlex
import statistics
import time
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

from omegaconf import DictConfig, ListConfig

from coreach import tracking
from coreach.commands.compare import _atomic_write
from coreach.errors import ConfigError, CoreachError
from coreach.vetting.diagnosis import without_episodes

log = logging.getLogger("coreach.recipes")

RECIPE_COMMANDS = ("train", "aggregate")  # stages that end in one trained decoder with an MLflow run id
RECIPE_KEYS = ("command", "overrides")
PROGRAM = ".venv/bin/coreach recipes"


@dataclass(frozen=True)
class Recipe:
    label: str
    command: str
    overrides: tuple[str, ...]


@dataclass(frozen=True)
class Plan:
    """The checked options of one `coreach recipes` run."""

    recipes: tuple[Recipe, ...]
    seeds: tuple[int, ...]
    suites: tuple[str, ...]  # shipped suite names or YAML paths, as given
    episodes: int | None
    baselines: tuple[str, ...]
    train_overrides: tuple[str, ...]
    vet_overrides: tuple[str, ...]
    out: Path


# ---- options ----


def _strings(value, where: str, what: str) -> tuple[str, ...]:
    if value is None:
        return ()
    if not isinstance(value, (list, tuple, ListConfig)) or any(isinstance(v, (dict, list, DictConfig, ListConfig))
                                                               for v in value):  # fmt: skip
        raise ConfigError(where, f"expected a list of {what}, got {value!r}")
    return tuple(str(v) for v in value)


def _distinct(items: tuple, where: str) -> None:
    seen = [x for i, x in enumerate(items) if x in items[:i]]
    if seen:
        raise ConfigError(where, f"{seen[0]!r} appears twice; expected distinct entries")


def _recipe(label: str, node) -> Recipe:
    where = f"option recipes.{label}"
    if not isinstance(node, (dict, DictConfig)):
        raise ConfigError(where, f"expected a mapping {{command: train|aggregate, overrides: [...]}}, got {node!r}")
    unknown = sorted(set(node) - set(RECIPE_KEYS))
    if unknown:
        raise ConfigError(f"{where}.{unknown[0]}", f"unknown key; expected {' and '.join(RECIPE_KEYS)}")
    command = str(node.get("command") or "train")
    if command not in RECIPE_COMMANDS:
        expected = ", ".join(RECIPE_COMMANDS)
        raise ConfigError(f"{where}.command", f"unknown command {command!r}; expected one of {expected}")
    return Recipe(label, command, _strings(node.get("overrides"), f"{where}.overrides", "Hydra overrides"))


def _seeds(value) -> tuple[int, ...]:
    from coreach.vetting.suite import MIN_SEED

    if not isinstance(value, (list, tuple, ListConfig)) or len(value) == 0:
        raise ConfigError("option seeds", "expected a non-empty list of training seeds")
    seeds = []
    for s in value:
        if isinstance(s, bool) or not isinstance(s, int) or not 0 <= s < MIN_SEED:
            raise ConfigError("option seeds", f"expected integers in [0, {MIN_SEED}) (vetting seeds start at "
                                              f"{MIN_SEED}), got {s!r}")  # fmt: skip
        seeds.append(int(s))
    _distinct(tuple(seeds), "option seeds")
    return tuple(seeds)


def plan_from(cfg: DictConfig) -> Plan:
    """Check every option before anything runs; ConfigError names the first one at fault."""
    node = cfg.get("recipes")
    if not isinstance(node, DictConfig) or len(node) == 0:
        raise ConfigError("option recipes", "expected a mapping label -> {command: train|aggregate, overrides: [...]}")
    known = {str(k): _recipe(str(k), v) for k, v in node.items()}
    select = _strings(cfg.get("select"), "option select", "recipe labels") or tuple(known)
    _distinct(select, "option select")
    for label in select:
        if label not in known:
            raise ConfigError("option select", f"unknown recipe {label!r}; known recipes: {', '.join(known)}")
    suites = _strings(cfg.get("vet_suites"), "option vet_suites", "suite names or YAML paths")
    if not suites:
        raise ConfigError("option vet_suites", "expected a non-empty list of suites (names or YAML paths)")
    _distinct(suites, "option vet_suites")
    episodes = cfg.get("episodes")
    if episodes is not None and (isinstance(episodes, bool) or not isinstance(episodes, int) or episodes < 1):
        raise ConfigError("option episodes",
                          f"expected null (each suite's own count) or a positive integer, got {episodes!r}")
    baselines = _strings(cfg.get("baselines"), "option baselines", "baseline interface names")
    _distinct(baselines, "option baselines")
    shipped = _shipped_baselines()
    for b in baselines:
        if b not in shipped:
            raise ConfigError("option baselines", f"unknown baseline {b!r}; expected some of {', '.join(shipped)}")
    return Plan(
        recipes=tuple(known[s] for s in select), seeds=_seeds(cfg.get("seeds")), suites=suites,
        episodes=episodes, baselines=baselines,
        train_overrides=_strings(cfg.get("train_overrides"), "option train_overrides", "Hydra overrides"),
        vet_overrides=_strings(cfg.get("vet_overrides"), "option vet_overrides", "Hydra overrides"),
        out=Path(str(cfg.out)),
    )  # fmt: skip


def _shipped_baselines() -> list[str]:
    from importlib import resources

    from coreach.vetting.stage import BASELINES_DIR

    folder = resources.files("coreach_conf") / BASELINES_DIR
    return sorted(p.name[:-5] for p in folder.iterdir() if p.name.endswith(".yaml") and p.name != "decoder.yaml")


def stage_command(command: str, where: str):
    """(config name, function) of a registered Hydra command; a recipe may name one not installed yet."""
    from coreach.commands.table import HYDRA_COMMANDS, load_target

    if command not in HYDRA_COMMANDS:
        raise ConfigError(where, f"command {command!r} is not available in this installation")
    config_name, target = HYDRA_COMMANDS[command]
    return config_name, load_target(target)


def compose_stage(config_name: str, overrides: list[str], where: str) -> DictConfig:
    """Compose a sub-stage's config inside the running Hydra app; failures name the recipe or option."""
    from coreach.config.compose import compose_here
    from coreach.config.plugin_options import check_groups, check_plugins

    cfg = compose_here(config_name, overrides, where)
    try:
        check_plugins(cfg)
        check_groups(cfg)
    except CoreachError as exc:
        raise ConfigError(f"{where}, {exc.where}", exc.problem) from None
    return cfg


def user_overrides() -> list[str]:
    """The overrides this run was started with (Hydra's own excluded), as the user typed them."""
    from hydra.core.hydra_config import HydraConfig

    try:
        return [o for o in HydraConfig.get().overrides.task if not o.startswith("hydra.")]
    except ValueError:  # not inside a Hydra run
        return []


def command_line(overrides: list[str]) -> str:
    return " ".join([PROGRAM, *(shlex.quote(o) for o in overrides)])


def _tracking_overrides(overrides: list[str]) -> list[str]:
    """`tracking=...` and `tracking.*=...`: every sub-stage must write to the same store and experiment."""
    return [o for o in overrides if o.split("=", 1)[0].lstrip("+~").split(".")[0] == "tracking"]


# ---- the run ----


def _say(message: str) -> None:
    from coreach.training.callbacks import interactive

    if interactive():
        from rich.console import Console

        Console(stderr=True).rule(message)
    else:
        log.info(message)


def recipes(cfg: DictConfig) -> dict:
    """Train every selected recipe once per seed, vet all decoders and the baselines on each suite, and write
    results.md, results.csv and results.json into `out` (also logged on one MLflow run)."""
    from coreach.host.registry import build_plugin
    from coreach.config.compose import suite_overrides
    from coreach.vetting.suite import suite_from_config

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
        from coreach.vetting.stage import vet

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
    from mlflow.entities import Param

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


# ---- the table ----


def _rate(value) -> dict | None:
    """A rate dict {value, lo, hi, n} from a summary entry (a bare number has no interval)."""
    if isinstance(value, bool):
        return None
    if isinstance(value, (int, float)):
        return {"value": float(value), "lo": None, "hi": None, "n": None}
    if isinstance(value, dict):
        if "value" in value:
            return {k: value.get(k) for k in ("value", "lo", "hi", "n")}
        if "success" in value:
            return _rate(value["success"])
    return None


def per_goal(summary: dict) -> dict[str, dict]:
    """Success per goal from the summary's diagnosis section, if it has one ({} otherwise)."""
    diag = summary.get("diagnosis")
    found = diag.get("per_goal") if isinstance(diag, dict) else None
    if isinstance(found, list):
        found = {str(e.get("goal", e.get("name"))): e for e in found if isinstance(e, dict)}
    if not isinstance(found, dict):
        return {}
    return {str(g): r for g, r in ((g, _rate(v)) for g, v in found.items()) if r is not None}


def latest_switch(recovery: dict) -> str | None:
    """The recovery cell of the latest goal switch ("0.8" of none/0.2/0.5/0.8); None without switches."""
    cells = [k for k in recovery if k != "none"]
    return max(cells, key=float) if cells else None


def _cell(summary: dict, vet_run: str | None) -> dict:
    out = {"success": _rate(summary["success"]), "recovery": summary.get("recovery", {}),
           "per_goal": per_goal(summary), "vetting_run": vet_run}  # fmt: skip
    if summary.get("diagnosis") is not None:
        out["diagnosis"] = without_episodes(summary["diagnosis"])  # cause shares, per goal and cell, advice
    if summary.get("separation"):
        out["separation"] = summary["separation"]["all"]  # contacts, keep-out, closest approaches, held share
    return out


def columns(rows: list[dict], suites: list[str]) -> list[dict]:
    """Table columns: per suite success, recovery at its latest switch, and success per goal (no-switch suites)."""
    cols = []
    for s in suites:
        cells = [r["suites"][s] for r in rows if s in r["suites"]]
        n = next((c["success"]["n"] for c in cells if c["success"]), None)
        cols.append({"id": f"{s}/success", "suite": s, "metric": "success", "key": None,
                     "header": f"{s} success" + (f" (n={n})" if n else "")})  # fmt: skip
        switch = next((latest_switch(c["recovery"]) for c in cells if latest_switch(c["recovery"])), None)
        if switch is not None:
            n = next((c["recovery"][switch].get("n") for c in cells if switch in c["recovery"]), None)
            cols.append({"id": f"{s}/recovery@{switch}", "suite": s, "metric": "recovery", "key": switch,
                         "header": f"{s} recovery @{switch}" + (f" (n={n})" if n else "")})  # fmt: skip
        else:
            goals = list(dict.fromkeys(g for c in cells for g in c["per_goal"]))
            cols += [{"id": f"{s}/goal:{g}", "suite": s, "metric": "goal", "key": g, "header": f"{s} {g}"}
                     for g in goals]  # fmt: skip
    return cols


def rate_at(row: dict, col: dict) -> dict | None:
    cell = row["suites"].get(col["suite"])
    if cell is None:
        return None
    if col["metric"] == "success":
        return cell["success"]
    if col["metric"] == "recovery":
        return _rate(cell["recovery"].get(col["key"]))
    return cell["per_goal"].get(col["key"])


def _finite(x) -> bool:
    return isinstance(x, (int, float)) and math.isfinite(x)


def spread(rates: list[dict | None]) -> dict | None:
    """Across training seeds: min / median / max of the point values and the worst lower bound."""
    values = [r["value"] for r in rates if r and _finite(r["value"])]
    if not values:
        return None
    los = [r["lo"] for r in rates if r and _finite(r.get("lo"))]
    return {"min": min(values), "median": statistics.median(values), "max": max(values),
            "worst_lo": min(los) if los else None, "seeds": len(values)}  # fmt: skip


def assemble(plan: Plan, trained: list[dict], vetted: dict[str, dict], cmd: str, given: list[str],
             commit: str | None = None) -> dict:
    """Rows per recipe-seed and baseline, a spread row per recipe, and the columns to show them in."""
    suites = list(vetted)
    rows = [{"kind": "seed", "recipe": t["recipe"], "seed": t["seed"], "training_run": t["run_id"], "suites": {}}
            for t in trained]  # fmt: skip
    rows += [{"kind": "baseline", "recipe": b, "seed": None, "training_run": None, "suites": {}}
             for b in plan.baselines]
    for name, v in vetted.items():
        # vet keeps the candidates' order in its summaries, whatever labels it gave them
        for row, (label, summary) in zip(rows, v["summaries"].items()):
            row["suites"][name] = _cell(summary, v.get("vet_runs", {}).get(label))
    cols = columns(rows, suites)
    spreads = []
    for r in plan.recipes:
        mine = [row for row in rows if row["kind"] == "seed" and row["recipe"] == r.label]
        spreads.append({"kind": "spread", "recipe": r.label, "seeds": [row["seed"] for row in mine],
                        "columns": {c["id"]: spread([rate_at(row, c) for row in mine]) for c in cols}})  # fmt: skip
    return {
        "command": cmd,
        "overrides": given,
        "date": datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
        "commit": commit,
        "recipes": {r.label: {"command": r.command, "overrides": list(r.overrides)} for r in plan.recipes},
        "seeds": list(plan.seeds),
        "suites": suites,
        "episodes": plan.episodes,
        "columns": cols,
        "rows": rows,
        "spread": spreads,
        "trainings": trained,
        "vettings": {s: {"report": v.get("report"), "vet_runs": v.get("vet_runs", {})} for s, v in vetted.items()},
        "out": str(plan.out),
    }


def _num(v) -> str:
    return f"{v:.2f}" if _finite(v) else "–"


def rate_text(r: dict | None) -> str:
    if not r or not _finite(r.get("value")):
        return "–"
    if _finite(r.get("lo")) and _finite(r.get("hi")):
        return f"{r['value']:.2f} [{r['lo']:.2f}, {r['hi']:.2f}]"
    return _num(r["value"])


def spread_text(s: dict | None) -> str:
    if not s:
        return "–"
    text = f"{_num(s['min'])} / {_num(s['median'])} / {_num(s['max'])}"
    return text + (f" (lo {_num(s['worst_lo'])})" if s["worst_lo"] is not None else "")


def table_rows(result: dict) -> list[tuple[str, str, list[str], bool]]:
    """(recipe, seed column, cells, ends a group) in display order: each recipe's seeds, its spread, baselines."""
    out = []
    spreads = {s["recipe"]: s for s in result["spread"]}
    rows = result["rows"]
    for label, sp in spreads.items():
        for row in (r for r in rows if r["kind"] == "seed" and r["recipe"] == label):
            out.append((label, str(row["seed"]), [rate_text(rate_at(row, c)) for c in result["columns"]], False))
        out.append((label, f"spread ({len(sp['seeds'])} seeds)",
                    [spread_text(sp["columns"].get(c["id"])) for c in result["columns"]], True))  # fmt: skip
    for row in (r for r in rows if r["kind"] == "baseline"):
        out.append((row["recipe"], "baseline", [rate_text(rate_at(row, c)) for c in result["columns"]], False))
    return out


LEGEND = ("Simulated operators in simulation. Per seed and baseline: point value [95% Wilson interval]; "
          "n = episodes. Spread rows: min / median / max of the per-seed point values, and (lo) the worst lower "
          "bound across seeds. Recovery: success among episodes whose goal switched at that fraction of the "
          "horizon (the latest switch of the suite).")  # fmt: skip


SEPARATION_LEGEND = ("Separation, per suite: steps with a link touching furniture or another link / steps with a "
                     "link inside the person's keep-out zone / closest link to furniture (m) / closest link to the "
                     "person (m) / share of steps the filter's separation step scaled the command.")


def separation_cell(cell: dict | None) -> str:
    sep = (cell or {}).get("separation")
    if not sep:
        return "–"
    return (f"{sep['contact_steps']} / {sep['keep_out_steps']} / {_num3(sep['min_furniture_m'])} / "
            f"{_num3(sep['min_person_m'])} / {100 * sep['held_share']:.1f}%")


def _num3(v) -> str:
    return f"{v:.3f}" if _finite(v) else "–"


def separation_rows(result: dict) -> list[tuple[str, str, list[str]]]:
    """(recipe, seed column, one cell per suite) for every seed and baseline row that has separation figures."""
    out = []
    for row in result["rows"]:
        cells = [separation_cell(row["suites"].get(s)) for s in result["suites"]]
        if any(c != "–" for c in cells):
            out.append((row["recipe"], "baseline" if row["kind"] == "baseline" else str(row["seed"]), cells))
    return out


def markdown(result: dict) -> str:
    """For the results page (docs/results.md): the command that reproduces the table, the date, the table, how to read it."""
    esc = lambda s: str(s).replace("|", "\\|")  # noqa: E731
    head = ["recipe", "seed", *(c["header"] for c in result["columns"])]
    lines = ["```sh", result["command"], "```", ""]
    commit = f", commit {result['commit'][:10]}" if result.get("commit") else ""
    lines += [f"Run {result['date']}{commit}; seeds {', '.join(map(str, result['seeds']))}.", ""]
    lines += ["| " + " | ".join(map(esc, head)) + " |", "|" + "---|" * 2 + "---:|" * len(result["columns"])]
    for recipe, seed, cells, _ in table_rows(result):
        lines.append("| " + " | ".join(esc(x) for x in (recipe, seed, *cells)) + " |")
    lines += ["", LEGEND]
    sep = separation_rows(result)
    if sep:
        lines += ["", "| recipe | seed | " + " | ".join(f"{esc(s)} separation" for s in result["suites"]) + " |",
                  "|---|---|" + "---:|" * len(result["suites"])]
        lines += ["| " + " | ".join(esc(x) for x in (recipe, seed, *cells)) + " |" for recipe, seed, cells in sep]
        lines += ["", SEPARATION_LEGEND]
    if result.get("parent_run"):
        lines += ["", f"Run ids of every training and vetting: results.json, MLflow run {result['parent_run']}."]
    return "\n".join(lines) + "\n"


CSV_HEAD = ["kind", "recipe", "seed", "suite", "metric", "value", "lo", "hi", "n", "min", "median", "max",
            "worst_lo", "seeds", "training_run", "vetting_run"]  # fmt: skip


def csv_text(result: dict) -> str:
    """Long format: one line per row and column (per-seed and baseline values, then the spreads)."""
    buf = io.StringIO()
    w = csv.writer(buf)
    w.writerow(CSV_HEAD)
    blank = lambda v: "" if v is None else v  # noqa: E731
    for row in result["rows"]:
        for c in result["columns"]:
            r = rate_at(row, c)
            if r is None:
                continue
            vet_run = row["suites"][c["suite"]]["vetting_run"]
            w.writerow([row["kind"], row["recipe"], blank(row["seed"]), c["suite"], c["id"].split("/", 1)[1],
                        *(blank(r.get(k)) for k in ("value", "lo", "hi", "n")), "", "", "", "", "",
                        blank(row["training_run"]), blank(vet_run)])  # fmt: skip
    for sp in result["spread"]:
        for c in result["columns"]:
            s = sp["columns"].get(c["id"])
            if s is None:
                continue
            w.writerow(["spread", sp["recipe"], "", c["suite"], c["id"].split("/", 1)[1], "", "", "", "",
                        *(blank(s[k]) for k in ("min", "median", "max", "worst_lo", "seeds")), "", ""])  # fmt: skip
    return buf.getvalue()


def write_results(result: dict, out: Path) -> dict[str, str]:
    """results.md, results.csv and results.json, all rendered before any is written."""
    paths = {"markdown": out / "results.md", "csv": out / "results.csv", "json": out / "results.json"}
    result["files"] = {k: str(p) for k, p in paths.items()}
    data = {"markdown": markdown(result), "csv": csv_text(result),
            "json": json.dumps(result, indent=2, default=str)}  # fmt: skip
    for key, path in paths.items():
        _atomic_write(path, data[key].encode())
    return result["files"]


def terminal_table(result: dict):
    from rich.markup import escape
    from rich.table import Table

    table = Table(title="Recipes across training seeds (simulated operators; 95% Wilson intervals; "
                        "spread: min / median / max, worst lower bound)")  # fmt: skip
    table.add_column("recipe")
    table.add_column("seed")
    for c in result["columns"]:
        table.add_column(escape(c["header"]), justify="right")
    for recipe, seed, cells, ends in table_rows(result):
        style = "bold" if ends else ("dim" if seed == "baseline" else None)
        table.add_row(*(escape(x) for x in (recipe, seed, *cells)), style=style, end_section=ends)
    return table


__all__ = ["recipes", "plan_from", "stage_command", "compose_stage", "user_overrides", "assemble", "spread", "markdown", "csv_text", "terminal_table", "command_line"]
