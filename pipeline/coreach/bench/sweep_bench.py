"""`coreach bench sweep`: the same sweep serially and on local joblib workers; wall times and efficiency.

Both passes run as a user would run them, `coreach --json train -m ...` in a child process, so each
wall time includes what a real sweep pays: the command's start-up and, for the parallel pass, the workers'
start-up. Parallel efficiency = serial wall / (workers x parallel wall); 1.0 is perfect scaling. Every run uses the
same number of torch threads in both passes (bench.threads_per_run), so the serial pass is one worker. On
a shared machine the cores may not be free: the bench also times a plain busy loop alone and on `workers`
processes at once, and reports the sweep's efficiency beside that ceiling.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from pathlib import Path

from omegaconf import DictConfig

from coreach.config.check import compose_config
from coreach.config.command_line import override_key, user_overrides
from coreach.errors import CoreachError
from coreach.training.run import prepare


def _user_overrides() -> list[str]:
    """The overrides this command was given, minus the bench's own: they apply to every run of both sweeps."""
    return [o for o in user_overrides() if not override_key(o).startswith("bench.")]


_BUSY = "s = 0\nfor i in range(20_000_000):\n    s += i"


def cpu_ceiling(workers: int) -> float:
    """The parallel efficiency this machine offers right now: one busy-loop process alone against `workers`
    copies at once (1.0 when the cores are free; lower when other work shares them)."""
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-c", _BUSY], check=True)
    alone = time.perf_counter() - t0
    t0 = time.perf_counter()
    procs = [subprocess.Popen([sys.executable, "-c", _BUSY]) for _ in range(workers)]
    for p in procs:
        p.wait()
    together = time.perf_counter() - t0
    return alone / together


def _coreach() -> list[str]:
    return [sys.executable, "-m", "coreach.cli"]


def _sweep(args: list[str], env: dict) -> tuple[float, list[dict]]:
    t0 = time.perf_counter()
    res = subprocess.run([*_coreach(), "--json", "train", "-m", *args], capture_output=True, text=True, env=env)
    wall = time.perf_counter() - t0
    if res.returncode != 0:
        tail = " | ".join(res.stderr.strip().splitlines()[-3:])
        raise CoreachError("bench sweep", f"a sweep failed (exit {res.returncode}): {tail}")
    return wall, json.loads(res.stdout)["runs"]


def run(cfg: DictConfig) -> dict:
    b = cfg.bench
    if int(b.runs) < 2 or int(b.workers) < 2:
        raise CoreachError("bench.runs / bench.workers", "expected at least 2 runs and 2 workers")
    train_overrides = [*b.train, *_user_overrides()]
    stamp = time.strftime("%Y%m%d-%H%M%S")
    scratch = (Path(".coreach") / "bench" / f"sweep-{stamp}-{os.getpid()}").resolve()
    scratch.mkdir(parents=True, exist_ok=True)
    if b.tracking == "scratch":
        train_overrides += [f"tracking.uri=sqlite:///{scratch / 'mlflow.db'}",
                            f"tracking.artifacts={scratch / 'mlartifacts'}"]  # fmt: skip
    elif b.tracking != "configured":
        raise CoreachError("bench.tracking", f"expected scratch or configured, got {b.tracking!r}")
    # demonstrations generated once, before timing: both passes then read the same cache
    prepare(compose_config("train", train_overrides))

    seeds = "seed=" + ",".join(str(i) for i in range(int(b.runs)))
    # no progress bars in the children; the same torch thread count per run in both passes (joblib's loky
    # workers would otherwise get cores/workers threads and the serial run all cores, which on a shared
    # 2-core machine measured 5x slower per run than one thread: spinning threads, not work)
    threads = str(int(b.threads_per_run))
    env = {**os.environ, "CI": os.environ.get("CI", "true"), "OMP_NUM_THREADS": threads,
           "MKL_NUM_THREADS": threads}  # fmt: skip
    load_before = os.getloadavg()[0]
    ceiling_before = cpu_ceiling(int(b.workers))
    serial_wall, serial_runs = _sweep([*train_overrides, "hydra/launcher=basic", seeds], env)
    parallel_args = [*train_overrides, "hydra/launcher=joblib", f"hydra.launcher.n_jobs={int(b.workers)}", seeds]
    parallel_wall, parallel_runs = _sweep(parallel_args, env)
    for name, runs in (("serial", serial_runs), ("parallel", parallel_runs)):
        if len(runs) != int(b.runs):
            raise CoreachError("bench sweep", f"the {name} sweep returned {len(runs)} runs, expected {b.runs}")
    efficiency = serial_wall / (int(b.workers) * parallel_wall)
    ceiling = (ceiling_before + cpu_ceiling(int(b.workers))) / 2
    return {
        "runs_per_sweep": int(b.runs),
        "workers": int(b.workers),
        "threads_per_run": int(b.threads_per_run),
        "cpu_count": os.cpu_count(),
        "training": " ".join(train_overrides[: len(b.train)]),
        "serial_wall_s": serial_wall,
        "parallel_wall_s": parallel_wall,
        "speedup": serial_wall / parallel_wall,
        "parallel_efficiency": efficiency,
        "target_efficiency": float(b.target_efficiency),
        "meets_target": efficiency >= float(b.target_efficiency),
        "mean_run_s_serial": sum(r["seconds"] for r in serial_runs) / len(serial_runs),
        "mean_run_s_parallel": sum(r["seconds"] for r in parallel_runs) / len(parallel_runs),
        # other work on the machine takes cores from the parallel pass: read the efficiency beside what a
        # plain busy loop gets from the same cores, measured before and after the sweeps
        "machine_ceiling_efficiency": ceiling,
        "efficiency_vs_ceiling": efficiency / ceiling,
        "load_avg_1m_before": load_before,
        "load_avg_1m_after": os.getloadavg()[0],
        "tracking": "scratch store " + str(scratch / "mlflow.db") if b.tracking == "scratch" else "configured",
    }
