"""`coreach release`: gate a trained decoder in closed loop and, only if every gate passes, publish it.

Everything the gate needs (rollouts, vetting report, a staged bundle for the parity and latency checks) is
made in a temporary folder that is always deleted. A refusal leaves nothing: no bundle folder, no MLflow
run, no registry version. A pass publishes (coreach.release.publish): intent, model version, bundle under
<out_dir>/<name>/v<version>/, the bundle uploaded to the tracking store, records, and last the mark that
makes the version usable. Before anything, what an earlier crashed publish left is settled
(coreach.release.settle); SIGTERM unwinds like Ctrl-C, so an interrupted publish is settled before exit.
"""

from __future__ import annotations

import shutil
import sys
import tempfile
import time
from pathlib import Path

from omegaconf import DictConfig, OmegaConf

from coreach import tracking
from coreach.errors import ConfigError
from coreach.decoder import reference as decoder_reference
from coreach.release import gate as G
from coreach.release import registry
from coreach.runtime.model_card import CAUTIONS
from coreach.vetting.diagnosis import without_episodes
from coreach.release.evaluation import evaluate, suite_refs
from coreach.release.publish import publish, terminate_as_interrupt
from coreach.release.settle import scratch_prefix, settle

REFUSED_EXIT = 3  # distinct from 2 (bad input): the input was fine, the decoder did not pass


def _training_run(client, ref: str, uri: str):
    """Policy, training run id and run of `ref` (a run id or models:/...); folders cannot be released."""
    if not ref:
        raise ConfigError("option run", "missing; expected the MLflow run id of a training run (coreach release "
                                        "run=<run id>)")  # fmt: skip
    if Path(str(ref)).expanduser().exists():
        raise ConfigError("option run", f"{ref} is a folder; release needs the MLflow training run (its "
                                        "dataset fingerprint, commit and decoder artifact are part of it)")  # fmt: skip
    try:
        policy, run_id = decoder_reference.load(str(ref), uri)
    except ConfigError as exc:  # name the option of this command, not the interface's
        raise ConfigError("option run", exc.problem) from None
    run = client.get_run(run_id)
    if "coreach.dataset_sha256" not in run.data.tags:
        raise ConfigError("option run", f"run {run_id} has no coreach.dataset_sha256 tag; was it logged by coreach train?")
    return policy, run_id, run


def _vetting_view(summaries: dict) -> dict:
    """The numbers a person reads from each suite (the full summaries are in the release run)."""
    out = {}
    for suite, s in summaries.items():
        out[suite] = {"success": s["success"], "recovery": s["recovery"], "stick_gain_median": s["stick_gain"]["median"],
                      "time_to_success_median": s["time_to_success"]["median"], "n_episodes": s["n_episodes"],
                      "diagnosis": without_episodes(s.get("diagnosis"))}
    return out


def release(cfg: DictConfig) -> dict:
    """Gate `cfg.run`; refuse (exit_code 3, nothing written) or publish it as a gate-passed registry version."""
    t0 = time.perf_counter()
    uri = tracking.resolve_uri(cfg.tracking.get("uri"))
    registry.check_name(str(cfg.name))
    client = registry.client_for(uri)
    policy, run_id, run = _training_run(client, "" if OmegaConf.is_missing(cfg, "run") else str(cfg.run), uri)
    label = run.data.tags.get("coreach.label") or f"decoder-{run_id[:8]}"
    settle(client, lambda line: print(f"coreach release: {line}", file=sys.stderr))

    with terminate_as_interrupt():
        return _gate_and_publish(cfg, client, policy, run, label, uri, t0)


def _gate_and_publish(cfg, client, policy, run, label: str, uri: str, t0: float) -> dict:
    run_id = run.info.run_id
    staging = Path(tempfile.mkdtemp(prefix=scratch_prefix()))
    try:
        ev = evaluate(cfg, policy, run, label, staging)
        ok = G.passed(ev["results"])
        out = {
            "released": ok,
            "name": str(cfg.name),
            "label": label,
            "training_run": run_id,
            "gates": G.as_json(ev["results"]),
            "failed": [r.name for r in ev["results"] if not r.passed],
            "vetting": _vetting_view(ev["summaries"]),
            "suite_refs": suite_refs(cfg),
            "latency": ev["latency"],
            "gate_relaxed": ev["relaxed"],
            "cautions": list(CAUTIONS),
            "tracking": uri,
        }
        if ok:
            out.update(publish(cfg, client, policy, run, label, ev))
            out["aliases"] = [registry.GATE_PASSED_ALIAS]
        else:
            out["exit_code"] = REFUSED_EXIT
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    out["seconds"] = time.perf_counter() - t0
    return out


__all__ = ["release", "evaluate", "publish", "REFUSED_EXIT"]
