"""Vetting metrics of recorded drives, in the summary dict shape of coreach.vetting.metrics.summarise.

A person's drives then sit next to the simulated operators' summaries in one vetting report
(`coreach vet drives=[...]`). Host-side (it shares the Wilson interval with vetting); the test-drive server
itself never imports this module.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq

from coreach.episodes import load_parquet
from coreach.episodes.drive_files import META_MANIFEST, META_TOLERANCES, check_drive_file
from coreach.errors import DataError
from coreach.vetting.rates import wilson_interval

NAN = float("nan")


def _rate(flags: list[bool], level: float) -> dict:
    n, k = len(flags), int(sum(flags))
    lo, hi = wilson_interval(k, n, level)
    return {"value": k / n if n else NAN, "lo": lo, "hi": hi, "n": n}


def _quantiles(values: list[float], qs: tuple[float, ...]) -> list[float]:
    return [float(np.quantile(values, q)) if values else NAN for q in qs]


def drive_summary(paths, label: str = "person (recorded drives)", confidence: float = 0.95) -> dict:
    """Summary of recorded drives (Parquet files written by `coreach test-drive`), one episode per drive.

    Success: the drive's goal reached (approach pose, then the end of its fine motion, with the tolerances
    the drive was recorded with; the `arrived` column). Time: from the first recorded step to arrival.
    Path efficiency: straight line start -> end of the goal's fine motion over the tool path up to arrival.
    Limit scalings: steps where a limit scaled the command (joint position look-ahead, speed caps,
    workspace box); `limit_scalings` gives each one's share. Stick gain: decoder output per unit stick.
    Metrics a person's drive cannot give (recovery after a scripted goal switch, reachability, the
    ultimate bound) are reported as not measured.
    """
    paths = [Path(p) for p in paths]
    if not paths:
        raise DataError("recorded drives", "no drive files given")
    succ, times, eff, gain, dt = [], [], [], [], NAN
    limits = {"position_limited": [], "speed_capped": [], "workspace_limited": []}
    any_limit, goal_names, hashes = [], None, set()
    for path in paths:
        eps = load_parquet(path)  # the same checks as any demonstration file
        check_drive_file(path)
        table = pq.read_table(path)
        meta = table.schema.metadata or {}
        hashes.add(meta[META_MANIFEST.encode()].decode())
        goal_names, dt = eps.goal_names, eps.dt
        cols = table.to_pydict()
        episode_col = np.asarray(cols["episode"])
        for ep in eps:
            rows = np.flatnonzero(episode_col == ep.episode_id)
            rows = rows[np.argsort(np.asarray(cols["step"])[rows])]
            arrived = np.array([cols["arrived"][r][ep.goal] for r in rows])
            hit = np.flatnonzero(arrived)
            succ.append(hit.size > 0)
            pos = ep.ee_pos  # [T, 3]
            if hit.size:
                t = int(hit[0])
                times.append(t * eps.dt)
                length = float(np.linalg.norm(np.diff(pos[: t + 1], axis=0), axis=-1).sum())
                end = ep.goal_targets[ep.goal, 1]
                if length > 1e-9:
                    eff.append(float(np.linalg.norm(end - pos[0])) / length)
            pl = np.array([cols["position_limited"][r] for r in rows])
            sc = np.array([cols["speed_capped"][r] for r in rows])
            ws = np.array([cols["workspace_scale"][r] < 1.0 for r in rows])
            limits["position_limited"] += pl.tolist()
            limits["speed_capped"] += sc.tolist()
            limits["workspace_limited"] += ws.tolist()
            step_limited = pl | sc | ws
            any_limit.append(bool(step_limited.any()))
            for r in rows:
                s = math.hypot(*cols["stick"][r])
                if s > 1e-6:
                    gain.append(float(np.linalg.norm(cols["qd_decoder"][r])) / s)
    all_steps = limits["position_limited"]
    n_steps = len(all_steps)
    step_any = [a or b or c for a, b, c in zip(*limits.values())]
    q25, q50, q75 = _quantiles(times, (0.25, 0.5, 0.75))
    a05, a50 = _quantiles(gain, (0.05, 0.5))
    success = _rate(succ, confidence)
    tolerances = json.loads(meta.get(META_TOLERANCES.encode(), b"{}"))
    return {
        "interface": label,
        "suite": "recorded drives",
        "n_episodes": len(succ),
        "dt": float(dt),
        "goal_names": list(goal_names or []),
        "confidence_level": confidence,
        "success": success,
        "time_to_success": {"median": q50, "q25": q25, "q75": q75, "n": len(times)},
        "path_efficiency": {"mean": float(np.mean(eff)) if eff else NAN, "n": len(eff)},
        "recovery": {"none": success},  # no scripted goal switch in a person's drive
        "belief": {"at_switch_original_mean": NAN, "at_switch_n": 0},
        "limit_scaled": {
            "step_share": float(np.mean(step_any)) if n_steps else NAN,
            "episodes_with_any": _rate(any_limit, confidence),
        },
        "limit_scalings": {k: float(np.mean(v)) if v else NAN for k, v in limits.items()},
        "stick_gain": {"median": a50, "p05": a05, "n": len(gain), "threshold": NAN, "collapsed": False},
        "reachability": {"share": NAN, "n": 0},
        "mode_switches": {"mean": 0.0},
        "ultimate_bound": [],
        "diagnosis": None,
        "bundle_manifest_sha256": sorted(hashes),
        "tolerances": tolerances,
    }
