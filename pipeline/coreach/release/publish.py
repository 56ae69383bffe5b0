"""Publishing a passed release as one transaction: bundle, registry version, release run and vetting metrics."""

from __future__ import annotations

import json
import re
import shutil
import time
from pathlib import Path

from omegaconf import OmegaConf

from coreach.release import gate as G
from coreach.release import registry
from coreach.release.bundle_writer import write_bundle
from coreach.vetting.metrics import flat_metrics


def gate_metric_name(gate: str) -> str:
    """The MLflow metric of a gate: `recovery@0.8[held-out]` -> `gate/held-out/recovery_at_0.8`, `latency_p99_us`
    -> `gate/latency_p99_us` (metric names allow only alphanumerics and _ - . space : /)."""
    m = re.fullmatch(r"(?P<check>[^\[]+)\[(?P<suite>[^\]]+)\]", gate)
    check, suite = (m["check"], m["suite"]) if m else (gate, "")
    path = "/".join(p for p in ("gate", suite, check.replace("@", "_at_")) if p)
    return re.sub(r"[^A-Za-z0-9_\-. :/]", "_", path)


def _headline(summary: dict) -> dict:
    return {k: v for k, v in flat_metrics(summary).items() if k.startswith(("success/", "recovery/", "stick_gain/"))}


def publish(cfg, client, policy, run, label: str, ev: dict) -> dict:
    """Bundle, registry version (gate passed), release run, and vetting metrics on the training run; all or nothing."""
    from mlflow.entities import Metric, Param

    name = registry.check_name(str(cfg.name))
    gate = G.as_json(ev["results"])
    run_id = run.info.run_id
    release_run = client.create_run(run.info.experiment_id, run_name=f"release {name} ({label})", tags={
        "coreach.stage": "release", "coreach.source_run": run_id, "coreach.label": label, "coreach.model_name": name,
    })  # fmt: skip
    rid = release_run.info.run_id
    version, created, folder = None, False, None
    root = Path(cfg.out_dir).expanduser()
    fresh = [d for d in (root, root / name) if not d.exists()]  # folders to remove again on failure
    try:
        mv, created = registry.register(client, name, run_id, f"{label} from training run {run_id}")
        version = str(mv.version)
        folder = root / name / f"v{version}"
        meta = {**ev["meta"], "name": f"{name} v{version} ({label})"}
        write_bundle(folder, policy, ev["urdf"], meta, {"report.html": ev["report"]}, gate=gate)
        registry.mark_gate_passed(client, name, version, folder, gate, rid)
        client.set_tag(rid, "coreach.model_version", version)
        client.set_tag(rid, "coreach.bundle", str(folder.resolve()))
        now = int(time.time() * 1000)
        params = {"name": name, "suites": ",".join(ev["summaries"]), "training_run": run_id,
                  **{f"gates.{k}": str(v) for k, v in OmegaConf.to_container(cfg.gates).items()}}  # fmt: skip
        client.log_batch(rid, params=[Param(k, v) for k, v in params.items()])
        values = [Metric(gate_metric_name(k), v["value"], now, 0) for k, v in gate.items()
                  if v["value"] is not None]  # fmt: skip
        client.log_batch(rid, metrics=values)
        for fname in ("manifest.json", "MODEL_CARD.md", "report.html"):
            client.log_artifact(rid, str(folder / fname), "bundle")
        client.log_text(rid, json.dumps(ev["summaries"], indent=2, default=str), "summaries.json")
        # the vetting metrics `coreach replay` compares a replay with, as `coreach vet` records them
        for suite, s in ev["summaries"].items():
            client.log_batch(run_id, metrics=[Metric(f"vet/{suite}/{k}", v, now, 0) for k, v in _headline(s).items()])
        client.set_tag(run_id, f"coreach.release.{name}", version)
        client.set_terminated(rid)
    except BaseException:
        if folder is not None and folder.exists():
            shutil.rmtree(folder, ignore_errors=True)
        for d in reversed(fresh):
            if d.is_dir() and not any(d.iterdir()):
                d.rmdir()
        registry.unregister(client, name, version, created)
        client.delete_run(rid)
        raise
    return {"version": version, "bundle": str(folder.resolve()), "release_run": rid}
