"""The `coreach` command: subcommands run as Hydra apps, so each takes overrides and `-m` for sweeps."""

from __future__ import annotations

import json
import os
import sys
import time
import traceback
from pathlib import Path

from coreach.commands.table import CAUTION_COMMANDS, HYDRA_COMMANDS, PLAIN_COMMANDS, load_target
from coreach.errors import CoreachError

USAGE = """usage: coreach [--json] [--debug] COMMAND [-m] [key=value ...]

commands:
  demo      generate demonstrations, train the decoder families briefly, compare them
  train     train one decoder (e.g. coreach train model=vae trainer.max_epochs=5)
  aggregate train, then retrain on closed-loop states labelled by the demonstrator (DAgger rounds)
            (coreach aggregate +experiment=cvae_goal_entropy 'aggregate.rollout_seeds=[1,2,3]')
  vet       closed-loop vetting: coreach vet 'candidates=[<run id>,direct,blend]' suite=goal-switch
  recipes   train each recipe over several seeds, vet them with the baselines, one table
            (coreach recipes 'select=[cvae,cvae+goal_entropy]' 'seeds=[0,1,2]' 'train_overrides=["trainer.max_epochs=5"]')
  check-reach  can the arm, where the robot config places it, reach every goal of a scene (before data is made)
            (coreach check-reach robot.urdf=arm.urdf robot.tool_link=tcp scene=my_scene.yaml)
  import-recordings  ROS 2 bags (sqlite3, MCAP) and CSV files -> one Parquet file of demonstrations
            (coreach import-recordings 'inputs=[bags/run1,run2.csv]' scene=bedside_shelf out=lab.parquet)
  relabel-drives  recorded test drives -> training data for one fine-tuning round (the demonstrator's labels)
            (coreach relabel-drives 'drives=[drives/]' out=person.parquet [merge=demos.parquet])
  plugins   list every registered plugin by kind, with where it came from
  compare   leaderboard of an experiment's runs: table, CSV and PNG
            (coreach compare --experiment NAME --sweep TAG --out DIR)
  release   gate a trained decoder and, if it passes, bundle, register and mark it gate-passed
            (coreach release run=<run id> [name=bedside-shelf-decoder]; refusal: gate table, exit 3)
  replay    replay a release bundle's ONNX decoder through a suite and compare with its vetting
            (coreach replay bundle=releases/<name>/v<version> suite=held-out; or bundle=<name>@fielded,
            bundle=<name>/<version>: taken from the tracking store, verified, cached under releases/)
  promote   field a gate-passed version (coreach promote NAME VERSION) or restore the previous one
            (coreach promote NAME --back)
  releases  registered versions, aliases and gate results; settles crashed publishes first
            (coreach releases [NAME] [--repair]: --repair also removes older leftovers, saying what)
  fetch     the robot computer's fetch: NAME[@ALIAS] from a tracking server, verified, then made current
            (coreach fetch NAME@fielded --server URL --cache DIR; torch-free: coreach-robot fetch|status)
  try-bundle  drive a release bundle by hand on a local page (simulation only); drives saved as episodes
            (coreach try-bundle releases/<name>/v<version>|<name>@<alias> [--port 8765] [--record-dir drives])
  bench train   training throughput: Lightning against a bare PyTorch loop (target: ratio >= 0.9), and the
                cVAE with and without goal_entropy (target: <= 2x the time); bench.threads=1 on shared cores
  bench sweep   a 12-run sweep serially and on 2 joblib workers: parallel efficiency (target >= 0.8)
  bench runtime per-step latency of a bundle's runtime session against a bare onnxruntime call
                (coreach bench runtime bundle=<folder>|<name>@<alias>; target: p99 <= 300 us)
  bench vet     closed-loop throughput: batched loop against a per-episode loop and a bare decoder pass
  bench fuzz    the runtime session driven with wild sticks from states near every scene body, each step
                checked with coal on the URDF's collision geometry (target: 0 penetrations, 0 keep-out entries)
                (coreach bench fuzz [bundle=<folder>|<name>@<alias>] [steps=1000000] [seed=0]; needs pinocchio)

options:
  -m, --multirun  sweep over comma-separated values (coreach train -m model=linear,vae,cvae)
  --json          print only a machine-readable summary on stdout
  --debug         show tracebacks
  -h, --help      this text; `coreach COMMAND --cfg job` prints the composed config (Hydra)
"""

def command_help(command: str) -> str:
    """The usage lines of one command, taken from USAGE so the overview and `COMMAND --help` never differ."""
    lines = USAGE.splitlines()
    start = next(i for i, line in enumerate(lines) if line[2:].startswith(command + " ") or line[2:] == command)
    block = [lines[start]]
    for line in lines[start + 1:]:
        if not line.startswith("     "):  # continuation lines are indented past the command column
            break
        block.append(line)
    text = "\n".join(block)
    if command in HYDRA_COMMANDS:
        text += ("\n\n  takes Hydra overrides (key=value) and -m for sweeps; `coreach "
                 f"{command} --cfg job` prints the composed config, `--hydra-help` Hydra's own help")
    return f"usage: coreach {command} ...\n\n{text}\n"


def _bench_lines() -> list[str]:
    """USAGE's `bench ...` entries with their continuation lines."""
    out, inside = [], False
    for line in USAGE.splitlines():
        if line.startswith("  bench "):
            inside = True
        elif not line.startswith("     "):
            inside = False
        if inside:
            out.append(line)
    return out


def _fail(message: str, code: int = 2) -> int:
    print(f"coreach: error: {message}", file=sys.stderr)
    return code


def _quiet_library_warnings() -> None:
    """Deprecation chatter from library internals that a user can do nothing about."""
    import warnings

    warnings.filterwarnings("ignore", message=r".*LeafSpec.*")
    warnings.filterwarnings("ignore", message=r".*Checkpoint directory .* exists and is not empty.*")
    warnings.filterwarnings("ignore", message=r".*does not have many workers.*")
    # submitit (the SLURM launcher) logs to stdout by default, which belongs to --json; let its records
    # go through the root logger (stderr) instead
    os.environ.setdefault("SUBMITIT_LOG_LEVEL", "NOCONFIG")
    warnings.filterwarnings("ignore", message=r".*validation_step.*no `val_dataloader`.*")
    warnings.filterwarnings("ignore", message=r".*The `srun` command is available on your system.*")
    os.environ.setdefault("MLFLOW_ENABLE_ARTIFACTS_PROGRESS_BAR", "false")
    # stdout belongs to --json; MLflow prints a "View run at" link there when a run on a server ends
    os.environ.setdefault("MLFLOW_SUPPRESS_PRINTING_URL_TO_STDOUT", "true")
    # MLflow's own default (7 retries, backoff factor 2) keeps a command silent for minutes when the tracking
    # server is down; 3 retries, factor 1 (about 7 s) still rides out a server restart. A user's own setting wins.
    os.environ.setdefault("MLFLOW_HTTP_REQUEST_MAX_RETRIES", "3")
    os.environ.setdefault("MLFLOW_HTTP_REQUEST_BACKOFF_FACTOR", "1")


def _unreachable_store(exc: Exception) -> str | None:
    """One line for a tracking server that does not answer (MLflow reports it as a long exception chain)."""
    text = str(exc)
    if type(exc).__name__ != "MlflowException" or "API request to" not in text:
        return None
    if not any(k in text for k in ("Max retries exceeded", "Connection refused", "timed out", "Name or service")):
        return None
    url = text.split("API request to ", 1)[1].split(" ", 1)[0]
    base = url.split("/api/", 1)[0]
    return (f"tracking server {base}: does not answer (after retries); start it, or check tracking.uri / "
            "COREACH_TRACKING_URI / MLFLOW_TRACKING_URI")


def main(argv: list[str] | None = None) -> int:
    _quiet_library_warnings()
    args = list(sys.argv[1:] if argv is None else argv)
    as_json = "--json" in args
    debug = "--debug" in args
    multirun = "-m" in args or "--multirun" in args
    rest = [a for a in args if a not in ("--json", "--debug", "-m", "--multirun")]
    if not rest or rest[0] in ("-h", "--help", "help"):
        print(USAGE)
        return 0
    command, overrides = rest[0], rest[1:]
    if command == "bench":
        what = overrides[0] if overrides else "?"
        if what in ("-h", "--help", "help"):  # the bench lines of the overview: which benchmarks there are
            print("usage: coreach bench WHAT ...\n\n" + "\n".join(_bench_lines()) + "\n")
            return 0
        command, overrides = f"bench {what}", overrides[1:]
    if debug:
        os.environ["HYDRA_FULL_ERROR"] = "1"
    if any(a in ("-h", "--help") for a in overrides):
        known = [*HYDRA_COMMANDS, *PLAIN_COMMANDS, "plugins", "compare"]
        if command not in known:
            return _fail(f"command {command!r}: unknown; expected one of {sorted(known)}")
        print(command_help(command))
        return 0
    try:
        if command == "plugins":
            from coreach.commands.plugins import show_plugins

            return show_plugins(as_json)
        if command == "compare":
            from coreach.commands.compare import compare_command

            return compare_command(overrides, as_json)
        if command in PLAIN_COMMANDS:
            code = load_target(PLAIN_COMMANDS[command])(overrides, as_json)
            if command in CAUTION_COMMANDS and not as_json:
                from coreach.commands.summaries import print_cautions, plain_console

                print_cautions(plain_console())
            return code
        if command not in HYDRA_COMMANDS:
            known = sorted([*HYDRA_COMMANDS, *PLAIN_COMMANDS, "plugins", "compare"])
            raise CoreachError(f"command {command!r}", f"unknown; expected one of {known}")
        summaries = run_hydra(command, overrides, multirun, debug)
        if _hydra_info_only(overrides):  # --cfg job and the like print the config and run nothing
            return 0
    except CoreachError as exc:
        if debug:
            traceback.print_exc()
        return _fail(str(exc))
    except KeyboardInterrupt as exc:  # Ctrl-C, or SIGTERM where a command turns it into one (release)
        return _fail(getattr(exc, "message", "interrupted"), getattr(exc, "exit_code", 130))
    except SystemExit as exc:
        return int(exc.code or 0)
    except Exception as exc:  # a bug, not bad input: say so, and how to see more
        if debug:
            traceback.print_exc()
            return 1
        unreachable = _unreachable_store(exc)
        if unreachable:
            return _fail(unreachable)
        return _fail(f"internal error: {type(exc).__name__}: {exc} (rerun with --debug for the traceback)", 1)
    from coreach.commands.summaries import print_summary

    print_summary(command, summaries, as_json)
    # a command that ran fine but reached a negative verdict (a refused release, a replay that does not
    # match its vetting) says so with its own exit code
    return max([0, *(int(s.get("exit_code", 0)) for s in summaries if isinstance(s, dict))])


def _hydra_info_only(overrides: list[str]) -> bool:
    """Hydra's own flags that print the config or help instead of running the command."""
    return any(o.startswith(("--cfg", "-c", "--info", "-i", "--help", "-h", "--hydra-help")) for o in overrides)


def run_hydra(command: str, overrides: list[str], multirun: bool, debug: bool) -> list[dict]:
    """Run a subcommand through hydra.main (so Hydra's launchers serve sweeps) and collect summaries."""
    import hydra

    from coreach.config.check import preflight
    from coreach.config.compose import lab_file_overrides
    from coreach.config.compose import search_path_overrides

    config_name, target = HYDRA_COMMANDS[command]
    overrides, lab_conf = lab_file_overrides(overrides)  # suite=./mine.yaml: a lab's own file as an option
    extra = search_path_overrides(lab_conf)
    if not _hydra_info_only(overrides):
        preflight(config_name, extra + overrides, multirun)
    stamp = f"{time.strftime('%Y-%m-%d_%H-%M-%S')}-{os.getpid()}"
    sweep_dir = Path(".coreach") / "sweeps" / stamp
    fixed = [f"hydra.job.name={command.replace(' ', '_')}"]
    if multirun:
        fixed.append(f"hydra.sweep.dir={sweep_dir}")
    task_fn = load_target(target)
    collected: list[dict] = []

    def task(cfg):
        from coreach.config.workdirs import output_dir

        try:
            summary = task_fn(cfg)
        except CoreachError as exc:
            if debug:
                traceback.print_exc()
            print(f"coreach: error: {exc}", file=sys.stderr)
            raise SystemExit(2) from None
        except Exception as exc:  # a bug: one line unless --debug (Hydra would print a traceback)
            if debug:
                raise
            unreachable = _unreachable_store(exc)
            if unreachable:
                print(f"coreach: error: {unreachable}", file=sys.stderr)
                raise SystemExit(2) from None
            print(f"coreach: error: internal error: {type(exc).__name__}: {exc} (rerun with --debug)", file=sys.stderr)
            raise SystemExit(1) from None
        summary = summary or {}
        (output_dir() / "summary.json").write_text(json.dumps(summary, indent=2, default=str))
        collected.append(summary)
        return summary

    app = hydra.main(version_base="1.3", config_path="pkg://coreach_conf", config_name=config_name)(task)
    saved = sys.argv
    sys.argv = [f"coreach-{command}"] + (["-m"] if multirun else []) + fixed + extra + overrides
    try:
        app()
    finally:
        sys.argv = saved
    if multirun and len(collected) == 0 and sweep_dir.exists():  # jobs ran in other processes
        for path in sorted(sweep_dir.glob("*/summary.json"), key=lambda p: int(p.parent.name)):
            collected.append(json.loads(path.read_text()))
    return collected


if __name__ == "__main__":
    sys.exit(main())
