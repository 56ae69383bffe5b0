"""The `coreach` command: subcommands run as Hydra apps, so each takes overrides and `-m` for sweeps."""

from __future__ import annotations

import json
import os
import sys
import textwrap
import time
import traceback
import warnings
from pathlib import Path

from coreach.commands import table
from coreach.commands.table import HELP_WIDTH, load_target
from coreach.errors import CoreachError

OPTIONS = """options:
  -m, --multirun  sweep over comma-separated values (coreach train -m model=linear,vae,cvae)
  --json          print only a machine-readable summary on stdout
  --debug         show tracebacks
  -h, --help      this text; `coreach COMMAND --help` a command's options, `coreach COMMAND --cfg job` the
                  composed config of a command taking Hydra overrides"""


def _entry(name: str, about: str, width: int) -> str:
    """One command of an overview: its name, then its line wrapped under itself."""
    return textwrap.fill(about, HELP_WIDTH, initial_indent=f"  {name:<{width}}", subsequent_indent=" " * (width + 2),
                         break_on_hyphens=False)


def overview() -> str:
    """`coreach --help`: every command of the table with its one line, the flags, and which carry cautions."""
    commands = table.COMMANDS
    width = max(len(name) for name in commands) + 2
    lines = ["usage: coreach [--json] [--debug] COMMAND [-m] [key=value ...]", "", "commands:"]
    lines += [_entry(c.name, c.about, width) for c in commands.values()]
    person = [c.name for c in commands.values() if c.toward_person]
    lines += ["", OPTIONS, "", textwrap.fill(
        f"coreach is research software, not a medical device. {', '.join(person)} lead toward a person or a "
        "robot: their help, their output and their --json end with the cautions; read them (`coreach "
        "COMMAND --help`) before anything is used with people.", HELP_WIDTH, break_on_hyphens=False)]  # fmt: skip
    return "\n".join(lines) + "\n"


def group_help(group: str) -> str:
    """`coreach GROUP --help` (bench, study): the commands of the group."""
    members = table.groups()[group]
    width = max(len(c.name) for c in members) - len(group) + 1
    takes = "[-m] [key=value ...]" if any(c.hydra for c in members) else "[options]"
    lines = [f"usage: coreach {group} WHAT {takes}", "", f"{group} commands:"]
    lines += [_entry(c.name[len(group) + 1:], c.about, width) for c in members]
    lines += ["", f"`coreach {group} WHAT --help` for the options of one."]
    return "\n".join(lines) + "\n"


def _known() -> str:
    return ", ".join(sorted([*table.COMMANDS, *table.groups()]))


def _fail(message: str, code: int = 2) -> int:
    print(f"coreach: error: {message}", file=sys.stderr)
    return code


def _quiet_library_warnings() -> None:
    """Deprecation chatter from library internals that a user can do nothing about."""
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
    try:
        return _main(argv)
    except BrokenPipeError:  # `coreach ... | head`: the reader left; stop quietly, as other command-line tools do
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())  # Python's own advice for SIGPIPE
        return 1


def _main(argv: list[str] | None = None) -> int:
    _quiet_library_warnings()
    args = list(sys.argv[1:] if argv is None else argv)
    as_json = "--json" in args
    debug = "--debug" in args
    multirun = "-m" in args or "--multirun" in args
    rest = [a for a in args if a not in ("--json", "--debug", "-m", "--multirun")]
    if not rest or rest[0] in ("-h", "--help", "help"):
        print(overview())
        return 0
    command, overrides = rest[0], rest[1:]
    if command in table.groups() and command not in table.COMMANDS:  # `bench train`: a command of a group
        if overrides and overrides[0] in ("-h", "--help", "help"):
            print(group_help(command))
            return 0
        if not overrides or overrides[0].startswith("-") or "=" in overrides[0]:
            members = ", ".join(c.name.split(" ", 1)[1] for c in table.groups()[command])
            return _fail(f"command {command!r}: which one? expected one of {members} (coreach {command} --help)")
        command, overrides = f"{command} {overrides[0]}", overrides[1:]
    cmd = table.COMMANDS.get(command)
    if cmd is None:
        return _fail(f"command {command!r}: unknown; expected one of {_known()} (coreach --help)")
    if debug:
        os.environ["HYDRA_FULL_ERROR"] = "1"
    if any(a in ("-h", "--help") for a in overrides):
        print(cmd.help_text())
        return 0
    try:
        if not cmd.hydra:
            code = load_target(cmd.run)(overrides, as_json)
            if cmd.cautions() and not as_json and not cmd.prints_cautions:
                from coreach.commands.console import plain_console, print_cautions  # late: rich; --help stays fast

                print_cautions(plain_console(), cmd.records_person)
            return code
        summaries = run_hydra(cmd, overrides, multirun, debug)
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
    from coreach.commands.summaries import print_summary  # late: torch, matplotlib; --help stays fast

    print_summary(cmd, summaries, as_json)
    # a command that ran fine but reached a negative verdict (a refused release, a replay that does not
    # match its vetting) says so with its own exit code
    return max([0, *(int(s.get("exit_code", 0)) for s in summaries if isinstance(s, dict))])


def _hydra_info_only(overrides: list[str]) -> bool:
    """Hydra's own flags that print the config or help instead of running the command."""
    return any(o.startswith(("--cfg", "-c", "--info", "-i", "--help", "-h", "--hydra-help")) for o in overrides)


def run_hydra(cmd: table.Command, overrides: list[str], multirun: bool, debug: bool) -> list[dict]:
    """Run a subcommand through hydra.main (so Hydra's launchers serve sweeps) and collect summaries."""
    import hydra  # late: --help stays fast

    from coreach.config.check import preflight  # late: imports hydra; --help stays fast
    from coreach.config.compose import lab_file_overrides  # late: imports hydra; --help stays fast
    from coreach.config.compose import search_path_overrides  # late: imports hydra; --help stays fast

    command, config_name = cmd.name, cmd.config
    overrides, lab_conf = lab_file_overrides(overrides)  # suite=./mine.yaml: a lab's own file as an option
    extra = search_path_overrides(lab_conf)
    if not _hydra_info_only(overrides):
        preflight(config_name, extra + overrides, multirun)
    stamp = f"{time.strftime('%Y-%m-%d_%H-%M-%S')}-{os.getpid()}"
    sweep_dir = Path(".coreach") / "sweeps" / stamp
    fixed = [f"hydra.job.name={command.replace(' ', '_')}"]
    if multirun:
        fixed.append(f"hydra.sweep.dir={sweep_dir}")
    task_fn = load_target(cmd.run)
    collected: list[dict] = []

    def task(cfg):
        from coreach.config.workdirs import output_dir  # late: imports hydra; --help stays fast

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
