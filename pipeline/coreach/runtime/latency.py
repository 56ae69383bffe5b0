"""Per-step latency of a bundle's runtime Session against a bare onnxruntime call, with per-stage times.

Both are timed in one run, interleaved step by step (alternating which goes first, so drift on a shared
machine hits both), with time.perf_counter_ns. The session drives a simulated arm (q += qd * dt) with a
slowly turning stick outside the deadband, so every timed step runs the whole pipeline: kinematics, belief
update (whenever the tool has moved far enough), context, decoder and safety filter. The bare side runs
the same InferenceSession options on the decoder input the session built in its latest step.
A per-stage breakdown (median of repeated calls on one state) shows where the time goes.
"""

from __future__ import annotations

import math
import time
from pathlib import Path

import numpy as np
import onnxruntime as ort

from coreach.context import build_context
from coreach.runtime.session import Session

GOAL_P99_US = 100.0
GOAL_RATIO = 2.0


def _percentiles(ns: list[int]) -> tuple[float, float]:
    arr = np.asarray(ns, dtype=np.float64) / 1e3  # us
    return float(np.percentile(arr, 50)), float(np.percentile(arr, 99))


def _median_us(fn, reps: int = 500) -> float:
    fn()
    out = []
    clock = time.perf_counter_ns
    for _ in range(reps):
        t0 = clock()
        fn()
        out.append(clock() - t0)
    return float(np.median(out)) / 1e3


def _stages(session: Session, q: np.ndarray, stick: np.ndarray) -> dict[str, float]:
    """Median latency (us) of each stage of a step, called on its own with the same inputs."""
    m = session.manifest
    pos, rot, jac = session.chain.fk_jacobian(q)
    layout = session._layout
    belief = session._belief
    moved = pos + np.array([0.004, 0.0, 0.0])  # past min_motion, so the update does its full work
    context = build_context(q[None], pos[None], rot[None], belief, layout.targets, layout.goal_rot)
    feeds = {"stick": stick[None].astype(np.float32), "context": context.astype(np.float32)}
    qd = np.ones(m.action_dim)
    jac_lin = jac[:3]
    return {
        "kinematics": _median_us(lambda: session.chain.fk_jacobian(q)),
        "belief_update": _median_us(
            lambda: session.belief_model.update(belief, pos[None], moved[None], layout.targets)),
        "context": _median_us(lambda: build_context(q[None], pos[None], rot[None], belief, layout.targets,
                                                    layout.goal_rot)),
        "decoder": _median_us(lambda: session._ort.run(session._out_names, feeds)),
        "stick": _median_us(lambda: session.limits.condition_stick(stick)),
        "filter": _median_us(lambda: session.limits.limit(q, qd, jac_lin, pos)),
    }


def run_runtime_bench(bundle_folder: str | Path, steps: int = 5000, dt: float = 0.01, warmup: int = 200) -> dict:
    """Latency figures (us) of `Session.step` and of a bare `InferenceSession.run` on the same input."""
    session = Session.open(bundle_folder)
    m = session.manifest
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    opts.inter_op_num_threads = 1
    opts.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    opts.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
    bare = ort.InferenceSession(str(m.path("decoder.onnx")), opts, providers=["CPUExecutionProvider"])
    names = [bare.get_outputs()[0].name]

    q = m.q_home.copy()
    feeds = {"stick": np.zeros((1, m.latent_dim), np.float32), "context": np.zeros((1, m.context_dim), np.float32)}
    clock = time.perf_counter_ns
    t_session: list[int] = []
    t_bare: list[int] = []
    runs = belief_updates = limit_scaled = 0
    for i in range(warmup + steps):
        now = i * dt
        angle = 0.5 * now  # one turn of the stick every 12.6 s of simulated time
        stick = np.array([0.8 * math.cos(angle), 0.8 * math.sin(angle)] + [0.0] * (m.latent_dim - 2))[: m.latent_dim]
        session_first = i % 2 == 0
        if not session_first:
            t0 = clock()
            bare.run(names, feeds)
            tb = clock() - t0
        t0 = clock()
        qd = session.step(stick, q, now)
        ts = clock() - t0
        info = session.last
        if info.context is not None:
            feeds = {"stick": info.stick[None].astype(np.float32), "context": info.context}
        if session_first:
            t0 = clock()
            bare.run(names, feeds)
            tb = clock() - t0
        q = q + qd * dt
        if i >= warmup:
            t_session.append(ts)
            t_bare.append(tb)
            runs += info.context is not None
            belief_updates += info.belief_updated
            limit_scaled += info.intervened
    s50, s99 = _percentiles(t_session)
    b50, b99 = _percentiles(t_bare)
    return {
        "steps": steps,
        "session_p50_us": s50,
        "session_p99_us": s99,
        "bare_p50_us": b50,
        "bare_p99_us": b99,
        "ratio_p50": s50 / b50,
        "ratio_p99": s99 / b99,
        "goal_p99_us": GOAL_P99_US,
        "goal_ratio": GOAL_RATIO,
        "meets_p99_goal": s99 <= GOAL_P99_US,
        "meets_ratio_goal": s99 <= GOAL_RATIO * b99,
        "decoder_runs": runs,
        "belief_updates": belief_updates,
        "filter_actions": limit_scaled,
        "stages_p50_us": _stages(session, q, np.array([0.5, 0.5] + [0.0] * (m.latent_dim - 2))[: m.latent_dim]),
    }
