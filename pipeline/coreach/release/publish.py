"""Publishing a passed release so that a crash at any moment leaves nothing half-done.

The steps, in order (STEPS; the design is in coreach.release.settle and docs/release-design.md):
  intent    the release run, tagged coreach.publish=pending with this process as owner
  register  the model version (registered model first if new), source = the bundle's place in the store
  bundle    the bundle folder <out_dir>/<name>/v<version>/, staged beside it and renamed
  renamed   (the staged bundle is complete and verified; the rename follows)
  upload    every bundle file to the release run's `bundle/` artifacts
  record    gate metrics, params and summaries on the release run, vetting metrics and a release tag on the
            training run, the version's tags (bundle URI, manifest hash, gate results)
  usable    coreach.gate_passed=true on the version and the gate-passed alias: from here it is released
  finish    coreach.publish=done, the release run FINISHED
An exception or SIGTERM part-way settles the publish at once (coreach.release.settle.settle_run: rolled back
unless it was already usable); a SIGKILL leaves the intent for the next `coreach release` or `coreach
releases` to settle.
"""

from __future__ import annotations

import json
import os
import re
import signal
import sys
import time
from pathlib import Path

from mlflow.entities import Metric, Param
from omegaconf import OmegaConf

from coreach.release import gate as G
from coreach.release import registry
from coreach.release.bundle_store import bundle_uri, releases_root, staging_prefix, upload
from coreach.release.bundle_writer import write_bundle
from coreach.release.settle import owner, settle_run
from coreach.runtime.registry_tags import (GATE_PASSED_ALIAS, MODEL_DESCRIPTION, TAG_BUNDLE_URI, TAG_CREATED_MODEL,
                                           TAG_GATE, TAG_GATE_PASSED, TAG_GATE_RELAXED, TAG_MANIFEST, TAG_MODEL_NAME,
                                           TAG_OWNER, TAG_PUBLISH, TAG_RELEASE_RUN, TAG_ROOT, TAG_SOURCE_RUN,
                                           TAG_VERSION, release_tag)
from coreach.runtime.bundle import MANIFEST, sha256_file
from coreach.vetting.metrics import flat_metrics

STEPS = ("intent", "register", "bundle", "renamed", "upload", "record", "usable", "finish")
# Fault injection for the crash tests: on reaching the named step the process sends itself SIGKILL (as a
# power cut would) or SIGTERM (as a cluster's pre-emption would).
KILL_AT_ENV = "COREACH_FAULT_KILL_AT"
TERM_AT_ENV = "COREACH_FAULT_TERM_AT"


def _boundary(step: str) -> None:
    for env, sig in ((KILL_AT_ENV, signal.SIGKILL), (TERM_AT_ENV, signal.SIGTERM)):
        if os.environ.get(env) == step:
            os.kill(os.getpid(), sig)


def gate_metric_name(gate: str) -> str:
    """The MLflow metric of a gate: `recovery@0.8[held-out]` -> `gate/held-out/recovery_at_0.8`, `latency_p99_us`
    -> `gate/latency_p99_us` (metric names allow only alphanumerics and _ - . space : /)."""
    m = re.fullmatch(r"(?P<check>[^\[]+)\[(?P<suite>[^\]]+)\]", gate)
    check, suite = (m["check"], m["suite"]) if m else (gate, "")
    path = "/".join(p for p in ("gate", suite, check.replace("@", "_at_")) if p)
    return re.sub(r"[^A-Za-z0-9_\-. :/]", "_", path)


def _headline(summary: dict) -> dict:
    return {k: v for k, v in flat_metrics(summary).items() if k.startswith(("success/", "recovery/", "stick_gain/"))}


def _warn(line: str) -> None:
    print(f"coreach: {line}", file=sys.stderr)


def publish(cfg, client, policy, run, label: str, ev: dict) -> dict:
    """Bundle, store copy, registry version (usable last) and release run for a decoder that passed the gate."""
    name = registry.check_name(str(cfg.name))
    root = releases_root(cfg.out_dir)
    run_id = run.info.run_id
    _boundary("intent")
    rid = client.create_run(run.info.experiment_id, run_name=f"release {name} ({label})", tags={
        "coreach.stage": "release", TAG_SOURCE_RUN: run_id, "coreach.label": label, TAG_MODEL_NAME: name,
        TAG_PUBLISH: "pending", TAG_OWNER: owner(), TAG_ROOT: str(root.resolve()),
    }).info.run_id  # fmt: skip
    try:
        return _steps(cfg, client, policy, run, label, ev, name, root, rid)
    except BaseException as exc:  # an error, Ctrl-C or SIGTERM (see terminate_as_interrupt): settle before leaving
        try:
            outcome = settle_run(client, client.get_run(rid), _warn)
        except Exception as settle_exc:  # noqa: BLE001 - the original failure is what the user must see
            _warn(f"could not settle release run {rid} ({str(settle_exc).splitlines()[0][:160]}); the next "
                  "`coreach release` or `coreach finish-releases` settles it")
            raise exc from None
        if outcome == "finished" and isinstance(exc, Terminated):
            raise Terminated(f"stopped by SIGTERM after the publish had finished: {name} version "
                             f"{client.get_run(rid).data.tags.get(TAG_VERSION, '?')} is released") from None
        raise


def _steps(cfg, client, policy, run, label, ev, name, root: Path, rid: str) -> dict:
    run_id = run.info.run_id
    gate = G.as_json(ev["results"])
    _boundary("register")
    if registry.get_model(client, name) is None:
        client.set_tag(rid, TAG_CREATED_MODEL, "true")  # before creating it: a roll-back knows it may remove it
        client.create_registered_model(name, description=MODEL_DESCRIPTION)
    uri = bundle_uri(client, rid)
    mv = client.create_model_version(name, source=uri, run_id=rid, tags={TAG_RELEASE_RUN: rid},
                                     description=f"{label} from training run {run_id}")  # fmt: skip
    version = str(mv.version)
    client.set_tag(rid, TAG_VERSION, version)

    _boundary("bundle")
    folder = root / name / f"v{version}"
    meta = {**ev["meta"], "name": f"{name} v{version} ({label})"}
    write_bundle(folder, policy, ev["urdf"], meta, {"report.html": ev["report"]}, gate=gate,
                 staging_prefix=staging_prefix(version, rid), before_rename=lambda: _boundary("renamed"))  # fmt: skip
    _boundary("upload")
    upload(client, rid, folder)

    _boundary("record")
    now = int(time.time() * 1000)
    params = {"name": name, "suites": ",".join(ev["summaries"]), "training_run": run_id,
              **{f"gates.{k}": str(v) for k, v in OmegaConf.to_container(cfg.gates).items()}}  # fmt: skip
    client.log_batch(rid, params=[Param(k, v) for k, v in params.items()])
    client.log_batch(rid, metrics=[Metric(gate_metric_name(k), v["value"], now, 0) for k, v in gate.items()
                                   if v["value"] is not None])  # fmt: skip
    client.log_text(rid, json.dumps(ev["summaries"], indent=2, default=str), "summaries.json")
    # the vetting metrics `coreach replay` compares a replay with, as `coreach vet` records them
    for suite, s in ev["summaries"].items():
        client.log_batch(run_id, metrics=[Metric(f"vet/{suite}/{k}", v, now, 0) for k, v in _headline(s).items()])
    tags = {TAG_BUNDLE_URI: uri, TAG_MANIFEST: sha256_file(folder / MANIFEST),
            TAG_GATE: json.dumps(registry.compact_gate(gate), separators=(",", ":"))}
    if ev.get("relaxed"):
        tags[TAG_GATE_RELAXED] = "; ".join(ev["relaxed"])[:4900]  # tag values are limited to 5000 characters
    for key, value in tags.items():
        client.set_model_version_tag(name, version, key, value)

    _boundary("usable")
    client.set_model_version_tag(name, version, TAG_GATE_PASSED, "true")
    client.set_registered_model_alias(name, GATE_PASSED_ALIAS, version)
    # on the training run only once usable: a roll-back then never has to undo it (and lose an earlier value)
    client.set_tag(run_id, release_tag(name), version)

    _boundary("finish")
    client.set_tag(rid, TAG_PUBLISH, "done")
    client.set_terminated(rid)
    return {"version": version, "bundle": str(folder.resolve()), "bundle_uri": uri, "release_run": rid}


class Terminated(KeyboardInterrupt):
    """SIGTERM (cluster pre-emption) while publishing: unwinds like Ctrl-C, so the publish is settled first."""

    exit_code = 143

    def __init__(self, message: str = "stopped by SIGTERM; nothing was published (an unfinished publish was "
                                      "rolled back)"):  # fmt: skip
        super().__init__(message)
        self.message = message


class terminate_as_interrupt:
    def __enter__(self):
        def on_term(signum, frame):
            raise Terminated()

        try:
            self.previous = signal.signal(signal.SIGTERM, on_term)
        except ValueError:  # not the main thread: leave signals alone
            self.previous = None
        return self

    def __exit__(self, *exc):
        if self.previous is not None:
            signal.signal(signal.SIGTERM, self.previous)
        return False


__all__ = ["publish", "gate_metric_name", "STEPS", "KILL_AT_ENV", "TERM_AT_ENV", "Terminated", "terminate_as_interrupt"]
