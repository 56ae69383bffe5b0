"""Demo helpers: release the best decoder of a demo run, then try its bundle with the runtime Session."""

from __future__ import annotations

import logging

import numpy as np
from hydra import compose
from omegaconf import DictConfig

from coreach.config.compose import suite_overrides
from coreach.release import registry
from coreach.release.replay import replay
from coreach.release.stage import release
from coreach.runtime.session import Session

log = logging.getLogger("coreach.release")


def _ranked(demo_result: dict) -> list[dict]:
    """Trained runs, best first by the demo's vetting: success lower bound, then success rate; equals keep the
    order of demo.variants (sorted is stable)."""
    runs = [r for r in demo_result.get("runs", []) if r.get("run_id")]
    vetting = demo_result.get("vetting") or {}
    vetted = vetting.get("summaries", {})
    # vetting labels a decoder by its training run's label (an aggregated one as <label>/agg<round>), so
    # match summaries to runs by the training run id, and by label where no id was recorded
    by_run = {run: vetted[label] for label, run in (vetting.get("sources") or {}).items() if run and label in vetted}

    def key(r):
        s = by_run.get(r["run_id"]) or vetted.get(str(r.get("label")))
        return (s["success"]["lo"], s["success"]["value"]) if s else (-1.0, -1.0)

    return sorted(runs, key=key, reverse=True)


def runtime_tryout(bundle: str, seconds: float, stick=(0.6, 0.3), dt: float = 0.01) -> dict:
    """Step the bundle's runtime Session (verified on open; numpy + onnxruntime, what ships to a robot) for
    `seconds` of a constant simulated stick at a 100 Hz control rate (dt, common practice for arm velocity
    control), integrating q += qd dt from the home pose. Returns how far the tool went, the belief at the
    end and on how many steps each filter acted."""
    session = Session.open(bundle)
    m = session.manifest
    q = np.asarray(m.q_home, dtype=np.float64).copy()
    start = session.chain.fk(q)[0].copy()
    steps = max(1, int(round(seconds / dt)))
    acted = {"speed_capped": 0, "position_limited": 0, "workspace_limited": 0, "zeroed": 0}
    for k in range(steps):
        qd = session.step(np.asarray(stick), q, now_s=k * dt)
        info = session.last
        for key in acted:
            acted[key] += bool(getattr(info, key))
        q = q + qd * dt
    end = session.chain.fk(q)[0]
    names = list(m.goal_names)
    belief = session.belief
    return {"steps": steps, "seconds": steps * dt, "stick": list(stick), "fault": session.fault,
            "tool_moved_m": float(np.linalg.norm(end - start)), "belief": dict(zip(names, belief.round(3).tolist())),
            "filters": acted}  # fmt: skip


def release_best(demo_result: dict, cfg: DictConfig) -> dict:
    """Release the best demo decoder that passes the gate, then replay its bundle through vetting and step its runtime.

    Candidates are tried best first (by the demo's own vetting: success lower bound) until one passes, at
    most cfg.demo.release.max_tries (default 2) of them; each try is the release gate at demo size,
    cfg.demo.release.overrides of conf/release.yaml (default episodes=10, i.e. 30 held-out episodes, and
    latency.steps=1500; about 15-45 s a try on 2 cores). The gate's thresholds stay the release defaults, so
    thin demo evidence may well be refused: that is the honest outcome, and the refusal tables are the result.
    Returns {"attempts": [release summaries], "release": the passing one or None, "replay": its replay}.
    """
    node = (cfg.get("demo") or {}).get("release") or {}
    overrides = [str(o) for o in node.get("overrides", ["episodes=10", "latency.steps=1500"])]
    max_tries = int(node.get("max_tries", 2))
    attempts, best = [], None
    for r in _ranked(demo_result)[:max_tries]:
        rcfg = compose(config_name="release", overrides=[f"run={r['run_id']}", *overrides])
        log.info("release gate for %s", r.get("label"))
        summary = release(rcfg)
        attempts.append(summary)
        if summary["released"]:
            best = summary
            break
    out = {"attempts": attempts, "release": best, "replay": None, "fielded": None, "tryout": None}
    if best is not None:
        out["fielded"] = registry.promote(registry.client_for(best["tracking"]), best["name"], best["version"])
        out["tryout"] = runtime_tryout(best["bundle"], float(node.get("tryout_s", 3.0)))
        episodes = next((o.split("=", 1)[1] for o in overrides if o.startswith("episodes=")), "null")
        suite = best["suite_refs"][0]
        sized = None if episodes == "null" else int(episodes)  # as the gate ran it
        dcfg = compose(config_name="replay", overrides=[f"bundle={best['bundle']}", *suite_overrides(suite, sized)])
        out["replay"] = replay(dcfg)
    return out
