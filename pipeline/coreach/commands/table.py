"""The command table: which subcommand runs which stage function, shared by the CLI and the recipes."""

from __future__ import annotations

import importlib

# command -> (config name, "module:function" taking the composed config and returning a summary dict)
HYDRA_COMMANDS = {
    "train": ("train", "coreach.training.run:train"),
    "demo": ("demo", "coreach.demo:run_demo"),
    "vet": ("vet", "coreach.vetting.stage:vet"),
    "aggregate": ("aggregate", "coreach.aggregation.stage:aggregate"),
    "bench train": ("bench_train", "coreach.bench.train_bench:run"),
    "bench sweep": ("bench_sweep", "coreach.bench.sweep_bench:run"),
    "release": ("release", "coreach.release.stage:release"),
    "replay": ("replay", "coreach.release.replay:replay"),
    "bench runtime": ("bench_runtime", "coreach.bench.runtime_command:run"),
    "bench vet": ("bench_vet", "coreach.bench.vet_bench:run"),
    "bench fuzz": ("bench_fuzz", "coreach.bench.fuzz_bench:run"),
    "recipes": ("recipes", "coreach.commands.recipes:recipes"),
    "check-reach": ("check_reach", "coreach.commands.check_reach:run"),
    "import-recordings": ("import_recordings", "coreach.recordings.import_command:import_recordings"),
    "relabel-drives": ("relabel_drives", "coreach.testdrive.finetune:relabel_command"),
}
# Hydra-free commands: name -> "module:function" taking (arguments, as_json) and returning the exit code
PLAIN_COMMANDS = {
    "promote": "coreach.release.registry:promote_command",
    "releases": "coreach.release.registry:releases_command",
    "try-bundle": "coreach.testdrive.command:try_bundle_command",
    "fetch": "coreach.runtime.robot_cli:fetch_command",  # the robot computer's fetch (also coreach-robot fetch)
}

# commands whose output leads toward a robot: they end with the same cautions as the model card
CAUTION_COMMANDS = ("vet", "replay", "demo", "release", "promote", "try-bundle")


def load_target(spec: str):
    """The function a "module:function" entry names (imported only when its command runs)."""
    module, func = spec.split(":")
    return getattr(importlib.import_module(module), func)
