"""A release killed at any step of publishing leaves nothing half-done (the same test against the tracking
server CI starts is tests/lab/test_release_crash_server.py, a file of its own so the two run side by side).

Fault injection: the real `coreach release` process is started with COREACH_FAULT_KILL_AT=<step> and sends
itself SIGKILL on reaching that step boundary of publishing (a hook in coreach.release.publish, as the issue
allows; the kill itself is the real signal, so no cleanup code of the process runs). After each kill,
`coreach finish-releases` then `coreach bundles` must show no unusable version, no bundle without its version,
no staging folder and no RUNNING release run; a following release must then succeed with the next version number.
"""

from __future__ import annotations

import json
import shutil
import signal
import subprocess
import sys
import uuid
from pathlib import Path

import pytest
from conftest import SMALL, cli_env
from mlflow.entities import ViewType
from mlflow.tracking import MlflowClient

from coreach.release.publish import STEPS
from coreach.release.settle import owner
from coreach.runtime.registry_tags import (MODEL_DESCRIPTION, TAG_GATE_PASSED, TAG_GATE_RELAXED, TAG_MODEL_NAME,
                                           TAG_OWNER, TAG_PUBLISH, TAG_RELEASE_RUN, TAG_VERSION)

COREACH = str(Path(sys.executable).parent / "coreach")
SUITE = "held-out-short"
HELD_OUT = Path(__file__).resolve().parents[1] / "conf" / "coreach_conf" / "suite" / "held-out.yaml"
# the cheapest release that still runs every gate; thresholds a barely trained decoder meets
QUICK = [f"gate_suites=[{SUITE}.yaml]", "episodes=1", "latency.steps=100", "latency.warmup=10", "parity_n=1000",
         "gates.success_lo=0", "gates.recovery_lo=0", "gates.max_violations=1000000", "gates.stick_gain_median=0",
         "gates.latency_p99_us=1000000"]  # fmt: skip

pytestmark = pytest.mark.slow


def _cli(args, cwd, uri, **env):
    return subprocess.run([COREACH, *args], cwd=cwd, capture_output=True, text=True, timeout=900,
                          env=cli_env(MLFLOW_TRACKING_URI=uri, **env))  # fmt: skip


def train_small(cwd: Path, uri: str) -> str:
    text = HELD_OUT.read_text().replace("name: held-out", f"name: {SUITE}").replace("horizon_s: 30.0", "horizon_s: 5.0")
    (cwd / f"{SUITE}.yaml").write_text(text)
    res = _cli(["--json", "train", *SMALL, f"tracking.experiment=crash-{uuid.uuid4().hex[:8]}"], cwd, uri)
    assert res.returncode == 0, res.stderr[-2000:]
    return json.loads(res.stdout)["runs"][0]["run_id"]


def _nothing_half_done(cwd: Path, uri: str, name: str, run_id: str) -> list[int]:
    """`coreach finish-releases` settles, `coreach bundles` lists; check the store and the folder; the usable
    versions."""
    res = _cli(["finish-releases"], cwd, uri)
    assert res.returncode == 0, res.stderr
    res = _cli(["--json", "bundles"], cwd, uri)
    assert res.returncode == 0, res.stderr
    rows = [r for r in json.loads(res.stdout) if r["name"] == name]
    assert all(r["gate_passed"] for r in rows), rows  # no unusable (orphan) version is left or listed
    assert all(r["bundle_status"] in ("ok", "in store") for r in rows), rows
    usable = sorted(int(r["version"]) for r in rows)
    folder = cwd / "releases" / name
    left = sorted(p.name for p in folder.iterdir()) if folder.exists() else []
    assert left == [f"v{v}" for v in usable], left  # no staging folder, no bundle without its version
    client = MlflowClient(uri)
    exp = client.get_run(run_id).info.experiment_id
    runs = client.search_runs([exp], f"tags.`coreach.model_name` = '{name}'", run_view_type=ViewType.ACTIVE_ONLY)
    assert [r.info.status for r in runs] == ["FINISHED"] * len(usable), [(r.info.status, r.data.tags) for r in runs]
    gone = client.search_runs([exp], f"tags.`coreach.model_name` = '{name}'", run_view_type=ViewType.DELETED_ONLY)
    assert all(client.list_artifacts(r.info.run_id) == [] for r in gone)  # no uploaded bundle of a rolled-back run
    tag = client.get_run(run_id).data.tags.get(f"coreach.release.{name}")
    assert tag is None or int(tag) in usable
    return usable


def kill_at_every_step(cwd: Path, uri: str, run_id: str) -> None:
    name = f"crash-{uuid.uuid4().hex[:8]}"
    base = [f"run={run_id}", f"name={name}", *QUICK]
    usable: list[int] = []
    for step in STEPS:
        res = _cli(["release", *base], cwd, uri, COREACH_FAULT_KILL_AT=step)
        assert res.returncode == -signal.SIGKILL, (step, res.returncode, res.stderr[-2000:])
        now = _nothing_half_done(cwd, uri, name, run_id)
        # only a kill after the version was marked usable leaves a release (finished by finish-releases)
        assert len(now) == len(usable) + (step == "finish"), (step, usable, now)
        usable = now
    before = _nothing_half_done(cwd, uri, name, run_id)
    res = _cli(["--json", "release", *base], cwd, uri)
    assert res.returncode == 0, res.stderr[-2000:]
    version = int(json.loads(res.stdout)["version"])
    assert version > max(before, default=0)
    assert _nothing_half_done(cwd, uri, name, run_id) == [*before, version]
    promoted = _cli(["promote", name, str(version)], cwd, uri)
    assert promoted.returncode == 0, promoted.stderr


def test_sigkill_at_every_step_on_the_embedded_store(tmp_path):
    uri = f"sqlite:///{tmp_path / 'mlflow.db'}"
    kill_at_every_step(tmp_path, uri, train_small(tmp_path, uri))


def test_sigterm_rolls_back_before_exit(tmp_path):
    uri = f"sqlite:///{tmp_path / 'mlflow.db'}"
    run_id = train_small(tmp_path, uri)
    res = _cli(["release", f"run={run_id}", "name=preempted", *QUICK], tmp_path, uri, COREACH_FAULT_TERM_AT="upload")
    assert res.returncode == 143, res.stderr
    assert res.stderr.strip().splitlines()[-1].startswith("coreach: error: stopped by SIGTERM"), res.stderr
    client = MlflowClient(uri)
    # rolled back by the process itself, before any later listing could settle it
    assert client.search_model_versions("name='preempted'") == []
    assert not (tmp_path / "releases").exists()
    exps = [e.experiment_id for e in client.search_experiments()]
    assert client.search_runs(exps, "tags.`coreach.stage` = 'release'") == []


def test_repair_removes_what_no_intent_covers(tmp_path):
    """Leftovers of releases before crash-safe publishing: an unusable version, a RUNNING release run, a stray
    staging folder and a bundle folder without a version; `finish-releases --leftovers` removes each and says so."""
    uri = f"sqlite:///{tmp_path / 'mlflow.db'}"
    client = MlflowClient(uri)
    exp = client.create_experiment("old")
    old = client.create_run(exp, tags={"coreach.stage": "release"}).info.run_id
    client.create_registered_model("old-model", description=MODEL_DESCRIPTION)  # as coreach created it
    client.create_model_version("old-model", "runs:/x/decoder", old)
    (tmp_path / "releases" / "old-model" / ".v1.abc.partial").mkdir(parents=True)
    (tmp_path / "releases" / "old-model" / "v7").mkdir()
    # not coreach's: a model another tool registered, one version without any coreach tag
    other = client.create_run(exp).info.run_id
    client.create_registered_model("other-tool-model")
    client.create_model_version("other-tool-model", "runs:/x/model", other)
    # a publish still running (its owner, this test process, is alive): its version and folder must stay
    live = client.create_run(exp, tags={"coreach.stage": "release", TAG_PUBLISH: "pending", TAG_OWNER: owner(),
                                        TAG_MODEL_NAME: "live-model", TAG_VERSION: "1"}).info.run_id  # fmt: skip
    client.create_registered_model("live-model", description=MODEL_DESCRIPTION)
    client.create_model_version("live-model", "runs:/x/bundle", live, tags={TAG_RELEASE_RUN: live})
    (tmp_path / "releases" / "live-model" / "v1").mkdir(parents=True)
    scratch = tmp_path / "tmp"  # its own temp folder: repair also clears killed releases' scratch folders there
    scratch.mkdir()
    res = _cli(["finish-releases", "--leftovers"], tmp_path, uri, TMPDIR=str(scratch))
    assert res.returncode == 0, res.stderr
    said = res.stdout
    for needle in ("model version old-model 1", f"release run {old}", ".v1.abc.partial", "v7", "registered model old-model"):
        assert needle in said, (needle, said)
    assert "other-tool-model" not in said and "live-model" not in said, said
    assert sorted(m.name for m in client.search_registered_models()) == ["live-model", "other-tool-model"]
    assert [str(mv.version) for mv in client.search_model_versions("name='other-tool-model'")] == ["1"]
    assert [str(mv.version) for mv in client.search_model_versions("name='live-model'")] == ["1"]
    assert client.get_run(old).info.lifecycle_stage == "deleted"
    assert client.get_run(live).info.status == "RUNNING"
    assert sorted(p.name for p in (tmp_path / "releases").iterdir()) == ["live-model"]
    assert (tmp_path / "releases" / "live-model" / "v1").is_dir()
    client.delete_registered_model("live-model")  # the live publish "ends"; what is left is not half-done
    client.set_terminated(live)
    client.set_tag(live, TAG_PUBLISH, "done")
    shutil.rmtree(tmp_path / "releases")
    again = _cli(["finish-releases", "--leftovers"], tmp_path, uri, TMPDIR=str(scratch))
    assert "nothing was half-done" in again.stdout, again.stdout
    assert [m.name for m in client.search_registered_models()] == ["other-tool-model"]


def test_sigterm_after_usable_reports_the_release(tmp_path):
    """SIGTERM once the version is usable: the process finishes the publish and says it is released."""
    uri = f"sqlite:///{tmp_path / 'mlflow.db'}"
    run_id = train_small(tmp_path, uri)
    res = _cli(["release", f"run={run_id}", "name=late-stop", *QUICK], tmp_path, uri, COREACH_FAULT_TERM_AT="finish")
    assert res.returncode == 143, res.stderr
    last = res.stderr.strip().splitlines()[-1]
    assert "after the publish had finished: late-stop version 1 is released" in last, res.stderr
    client = MlflowClient(uri)
    (mv,) = client.search_model_versions("name='late-stop'")
    assert mv.tags.get(TAG_GATE_PASSED) == "true"
    assert client.get_run(run_id).data.tags.get("coreach.release.late-stop") == "1"
    exps = [e.experiment_id for e in client.search_experiments()]
    (rel,) = client.search_runs(exps, "tags.`coreach.stage` = 'release'")
    assert rel.info.status == "FINISHED" and rel.data.tags[TAG_PUBLISH] == "done"
    # QUICK relaxes the gates: the version says so, and so does promote
    assert "gates.success_lo=0 (shipped 0.3)" in mv.tags.get(TAG_GATE_RELAXED, "")
    promoted = _cli(["promote", "late-stop", "1"], tmp_path, uri)
    assert promoted.returncode == 0, promoted.stderr
    assert "was released with gate settings looser than shipped, so it is NOT a vetted decoder" in promoted.stderr
