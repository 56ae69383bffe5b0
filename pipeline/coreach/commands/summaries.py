"""What a command prints when it is done: a table for people, or JSON alone on stdout for programs."""

from __future__ import annotations

import json
import sys

from rich.table import Table

from coreach.commands import table as command_table
from coreach.commands.console import plain_console, print_cautions
from coreach.release.gate import gate_table, violation_text
from coreach.runtime.model_card import relaxed_warning
from coreach.tracking import resolve_uri
from coreach.vetting.diagnosis_report import cause_table, goal_table
from coreach.vetting.report import separation_tables, terminal_table


def print_summary(cmd, summaries: list[dict], as_json: bool) -> None:
    """The summaries of `cmd` (a command table entry, or its name) as the entry says: JSON (with the cautions
    where it leads toward a person), or its `show` formatter followed by the cautions."""
    cmd = command_table.COMMANDS[cmd] if isinstance(cmd, str) else cmd
    cautions = cmd.cautions()
    if as_json:
        payload = dict(summaries[0]) if cmd.one_summary and len(summaries) == 1 else {"runs": summaries}
        if cautions:
            payload["cautions"] = cautions
        print(json.dumps(payload, indent=2, default=str))
        for s in summaries:
            if s.get("released") is False:  # a refused release: the one line that says why nothing was written
                print(refusal_line(s), file=sys.stderr)
        return
    console = plain_console()
    if cmd.show:
        command_table.load_target(cmd.show)(console, summaries, cmd.name)
    if cautions and not cmd.prints_cautions:
        print_cautions(console, cmd.records_person)


# ---- one formatter per command (named by `show` in the command table): (console, summaries, command name)


def show_train(console, summaries: list[dict], name: str) -> None:
    console.print(training_table(summaries))
    if summaries:
        console.print(f"MLflow: {mlflow_hint()}")


def each(printer):
    """A formatter that prints every summary of a command with `printer(console, summary)`."""

    def show(console, summaries: list[dict], name: str) -> None:
        for s in summaries:
            printer(console, s)

    return show


def show_falsify(console, summaries: list[dict], name: str) -> None:
    for s in summaries:
        console.print(f"[bold]falsify[/bold] {s['label']} on space {s['space']['name']}: {s['budget']} scenarios "
                      f"per search, {', '.join(f'{k} {v:.0f}/min' for k, v in s['scenarios_per_minute'].items())}")
        for sampler, r in s["searches"].items():
            first = r["first_failure"] or "none"
            console.print(f"  {sampler:7s} failures {r['failures']:5d}   first failure after {first}   lowest "
                          f"robustness {r['lowest_robustness']:+.3f} ({r['worst_cause'] or 'succeeded'})")
        console.print(f"  counterexample suite: {s['counterexample_suite'] or 'none (no failure found)'}")
        if s.get("stored_for_model"):
            console.print(f"  kept for the model: {s['stored_for_model']}")
        console.print(f"  report: {s['report']}")


def show_relabel(console, summaries: list[dict], name: str) -> None:
    for s in summaries:
        merged = f", merged with {s['merged_with']}" if s["merged_with"] else ""
        console.print(f"{s['drives']} drives relabelled ({s['relabelled_states']} states){merged}: "
                      f"{s['episodes']} episodes in {s['out']}", markup=False)
        console.print(f"train on it: {s['train']}", markup=False)


def show_bench(console, summaries: list[dict], name: str) -> None:
    """A benchmark's measures as rows, titled with the command (bench train, bench vet, ...)."""
    for s in summaries:
        table = Table(title=name)
        table.add_column("measure")
        table.add_column("value")
        for k, v in s.items():
            table.add_row(k, f"{v:.4g}" if isinstance(v, float) else str(v))
        console.print(table)


def show_demo(console, summaries: list[dict], name: str) -> None:
    for s in summaries:
        console.print(training_table(s.get("runs", [])))
        if s.get("vetting"):
            print_vetting(console, s["vetting"])
        if s.get("release"):
            print_demo_release(console, s["release"])
        for line in s.get("next_steps", []):
            console.print(line)


def training_table(runs: list[dict]) -> Table:
    """One row per run; validation values at the best epoch. Totals mix different loss recipes, so the
    reconstruction column is the one to compare across decoders."""
    terms = sorted({k for r in runs for k in r.get("metrics", {}) if k.startswith("val/") and k != "val/loss"})
    table = Table(title="trained decoders: validation losses at the best epoch (compare reconstruction across recipes)")
    table.add_column("decoder")
    for t in terms:
        table.add_column(t.split("/", 1)[1], justify="right")
    for col in ("total", "epochs", "seconds", "MLflow run id"):
        table.add_column(col, justify="right" if col != "MLflow run id" else "left", no_wrap=True)
    for r in runs:
        metrics = r.get("metrics", {})
        cells = [f"{metrics[t]:.4g}" if t in metrics else "-" for t in terms]
        table.add_row(
            str(r.get("label")),
            *cells,
            f"{r.get('val_loss', float('nan')):.4g}",
            str(r.get("epochs")),
            f"{r.get('seconds', 0):.1f}",
            str(r.get("run_id")),
        )
    return table


def mlflow_hint() -> str:
    uri = resolve_uri(None)
    if uri.startswith("sqlite:"):
        return f"runs are in {uri}; browse them with: .venv/bin/mlflow ui --backend-store-uri {uri}"
    return f"runs are on {uri}"


def print_vetting(console, result: dict) -> None:
    console.print(terminal_table(result["summaries"]))
    for table in separation_tables(result["summaries"]):
        console.print(table)
    print_diagnosis(console, result["summaries"])
    console.print(f"report: {result['report']}")
    if result.get("trajectories"):
        console.print(f"joint trajectories: {result['trajectories']}", markup=False)
    if result.get("vet_runs"):
        console.print("vetting runs in MLflow: " + ", ".join(f"{k}={v}" for k, v in result["vet_runs"].items()))


def print_diagnosis(console, summaries: dict) -> None:
    """Success per goal, the causes of failed episodes, and what they point to (summaries with a diagnosis)."""
    if not any(s.get("diagnosis") for s in summaries.values()):
        return
    console.print(goal_table(summaries))
    console.print(cause_table(summaries))
    for label, s in summaries.items():
        for line in (s.get("diagnosis") or {}).get("advice", []):
            console.print(f"{label}: {line}", markup=False)


def refusal_line(s: dict) -> str:
    return (f"coreach: release refused: {len(s['failed'])} of {len(s['gates'])} gates failed "
            f"({', '.join(s['failed'])}); nothing was written (no bundle, no MLflow run, no registry version)")


def print_release(console, s: dict) -> None:
    """The gate table, then what was published (and the cautions), or why nothing was."""
    verdict = "released" if s["released"] else "REFUSED"
    console.print(gate_table(s["gates"], f"release gate: {s['label']} (training run {s['training_run']}): {verdict}"))
    if not s["released"]:
        print_diagnosis(console, {f"{s['label']} on {k}": v for k, v in s.get("vetting", {}).items()})
        print(refusal_line(s), file=sys.stderr)
        return
    console.print(f"released {s['name']} version {s['version']} (@{', @'.join(s.get('aliases', []))}): {s['bundle']}")
    if s.get("gate_relaxed"):
        console.print(f"[bold red]warning:[/bold red] version {s['version']} was "
                      f"{relaxed_warning(s['gate_relaxed'])}", highlight=False)
    console.print(f"release run {s['release_run']} in {s['tracking']}; the bundle is stored there ({s.get('bundle_uri')})"
                  " and the folder above is this computer's cached copy", markup=False)
    console.print(f"replay it: coreach replay bundle={s['bundle']} suite={(s.get('suite_refs') or ['held-out'])[0]}")
    console.print(f"field it:  coreach promote {s['name']} {s['version']}; on the robot computer: coreach-robot fetch "
                  f"{s['name']}", markup=False)
    print_cautions(console)


def print_replay(console, s: dict) -> None:
    """The vetting table of the replay, the limit checks and the comparison with the bundle's vetting."""
    console.print(terminal_table(s["summaries"]))
    console.print(f"limit violations in the replay: {violation_text(s['violations'])}")
    c = s.get("comparison")
    if not c:
        console.print(f"no comparison with vetting: {s['comparison_source']}")
    elif not c["comparable"]:
        console.print(f"no comparison with vetting: {c['note']}")
    else:
        table = Table(title=f"replay against vetting ({s['comparison_source']}; {c['note']})")
        for col in ("metric", "vetted", "replay", "|difference|", "tolerance", "ok"):
            table.add_column(col)
        for r in c["rows"]:
            table.add_row(r["metric"], f"{r['vetted']:.4g}", f"{r['replay']:.4g}", f"{r['diff']:.3g}",
                          f"{r['tolerance']:.3g}", "yes" if r["ok"] else "[bold red]NO[/bold red]")
        console.print(table)
        console.print("replay MATCHES vetting" if c["match"] else "[bold red]replay does NOT match vetting[/bold red]")
    console.print(f"({s['note']})")


def print_aggregate(console, s: dict) -> None:
    """One row per aggregation round: its decoder, dataset size, what it added, and its closed-loop figure."""
    table = Table(title=f"data aggregation: {s['label']} (MLflow parent run {s['parent_run']})")
    for col in ("round", "training run", "episodes", "added episodes", "added states", "success (scoring episodes)"):
        table.add_column(col)
    for r in s["rounds"]:
        added = r.get("added") or {}
        score = r.get("score") or {}
        success = f"{score['success']:.2f} (n={score['episodes']})" if score else "-"
        table.add_row(str(r["round"]), r["run_id"], str(r["episodes"]), str(added.get("episodes", "-")),
                      str(added.get("states", "-")), success)  # fmt: skip
    console.print(table)
    console.print("the scoring episodes are training-side rollouts, not a vetting suite; vet the last round with: "
                  f".venv/bin/coreach vet 'candidates=[{s['run_id']},direct,blend]' suite=goal-switch", markup=False)  # fmt: skip


def print_demo_release(console, r: dict) -> None:
    for attempt in r.get("attempts", []):
        print_release(console, attempt)
    if r.get("release") is None:
        console.print("no demo decoder passed the release gate at demo size; nothing was released")
    if r.get("fielded"):
        f = r["fielded"]
        console.print(f"fielded {f['name']} version {f['fielded']} (alias @fielded): {f['bundle']}", markup=False)
        if f.get("gate_relaxed"):
            # the demo fields a version its own relaxed gate passed, to show the alias and the runtime end to end;
            # without this line the warning above and the word "fielded" read as a contradiction
            console.print("this @fielded is the demo's own store and a simulated robot only: the version is NOT "
                          "vetted, so no robot near a person may fetch it", markup=False)  # fmt: skip
    if r.get("tryout"):
        t = r["tryout"]
        acted = ", ".join(f"{k.replace('_', ' ')} {v}" for k, v in t["filters"].items())
        belief = ", ".join(f"{g} {b:.2f}" for g, b in t["belief"].items())
        console.print(f"runtime session (the bundle's numpy + onnxruntime code): {t['steps']} steps of stick "
                      f"{t['stick']} at 100 Hz moved the tool {t['tool_moved_m'] * 100:.1f} cm; belief {belief}; "
                      f"filters acted: {acted}; fault: {t['fault'] or 'none'}", markup=False)  # fmt: skip
    if r.get("replay"):
        print_replay(console, r["replay"])


def print_import(console, s: dict) -> None:
    """One row per recording (episodes, steps, timing findings, action source), then the totals and next step."""
    where = f"dt {s['dt']} s, robot {s['robot']}, scenario {s['scenario']}"
    table = Table(title=f"imported recordings -> {s['out']} ({where})")
    for col in ("recording", "episodes", "steps", "seconds", "gaps", "duplicates", "backwards", "action from"):
        table.add_column(col)
    for r in s["recordings"]:
        streams = r["streams"]
        table.add_row(r["source"], str(r["episodes"]), str(r["steps"]), f"{r['seconds']:.1f}",
                      *(str(sum(x[k] for x in streams)) for k in ("gaps", "duplicates", "backwards")), r["action"])
    console.print(table)
    found = ", ".join(f"{k} {v}" for k, v in s["found"].items())
    goals = ", ".join(f"{g} {n}" for g, n in s["goals"].items())
    console.print(f"{s['episodes']} episodes, {s['samples']} samples (episodes per goal: {goals}); found {found}; "
                  f"stick column: {s['stick'] or 'none'}", markup=False)
    if s.get("stick_note"):
        console.print(s["stick_note"], markup=False)
    console.print(f"train on it: {s['train']}", markup=False)


def print_reach(console, s: dict) -> None:
    """One row per goal: reachable, margin to the joint limits, manipulability; then the verdict."""
    table = Table(title=f"reach of {s['robot']} in scene {s['scene']}")
    for col in ("goal", "approach pose", "fine motion end", "clear of the bodies", "joint-limit margin (rad)",
                "manipulability (min sv)"):
        table.add_column(col)
    for g in s["goals"]:
        clear = "yes" if g.get("collision_free", True) and g.get("open_approach", True) else (
            f"NO: {g['blocked_by']}" if g.get("open_approach", True) else f"NO: approach blocked by {g['blocked_by']}")
        table.add_row(g["goal"], "yes" if g["approach_reachable"] else f"NO ({g['approach_error_m'] * 100:.1f} cm off)",
                      "yes" if g["fine_reachable"] else "NO", clear, f"{g['limit_margin_rad']:.2f}",
                      f"{g['manipulability']:.3f}")  # fmt: skip
    console.print(table)
    if s["marginal"]:
        console.print(f"marginal (near a joint limit or a singular pose): {', '.join(s['marginal'])}")
    if not s["unreachable"]:
        console.print("every goal is reachable where the arm stands")
        return
    console.print(f"out of reach: {', '.join(s['unreachable'])}", markup=False)
    sug = s.get("suggestion")
    if sug is None:
        console.print("no base shift within the searched range reaches every goal; try a larger reach.shift_range")
    else:
        dx, dy, dz = sug["base_shift_m"]
        console.print(f"suggested placement: move the base by [{dx}, {dy}, {dz}] m in the scene's frame (add it to "
                      f"robot.base_xyz); every goal is then reachable, joint-limit margin {sug['limit_margin_rad']:.2f} rad",
                      markup=False)  # fmt: skip


# the commands whose summaries print one by one (after the printers they name are defined)
show_vet, show_release, show_replay = each(print_vetting), each(print_release), each(print_replay)
show_aggregate, show_reach, show_import = each(print_aggregate), each(print_reach), each(print_import)
