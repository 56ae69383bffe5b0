"""Release pieces in process: gate thresholds and verdicts, limit-violation counts, the ONNX bundle interface
against the torch decoder in the vetting loop, the replay comparison, and fielding through the registry."""

from __future__ import annotations

import json
import shutil
from pathlib import Path
from types import SimpleNamespace

import pytest
import torch
from mlflow.tracking import MlflowClient
from omegaconf import OmegaConf

from coreach.context import ContextSpec
from coreach.errors import ConfigError, CoreachError
from coreach.control.belief_model import BoltzmannGoalBelief
from coreach.decoder.torch_interface import DecoderInterface
from coreach.decoder.onnx_interface import OnnxBundleInterface
from coreach_plugins.robot.planar3 import Planar3
from coreach.world.urdf_arm import SEVEN_JOINT_ARM_HOME, UrdfArm, shipped_urdf
from coreach.decoder.policy import DecoderPolicy
from coreach.release import gate as G
from coreach.release import bundle_store, registry
from coreach.release.replay import bundle_limits, compare, replay
from coreach.release.bundle_writer import write_bundle
from coreach.runtime.bundle import MANIFEST, BundleError, sha256_file
from coreach.safety import SafetyLimits
from coreach.vetting.loop import rollout
from coreach.vetting.rates import wilson_interval
from coreach.vetting.suite import load_suite

GATES = {"success_lo": 0.6, "recovery_lo": 0.5, "max_violations": 0, "stick_gain_median": 0.02,
         "parity_max_abs": 1e-5, "latency_p99_us": 2000.0, "max_contacts": 0, "max_keep_out": 0,
         "min_separation_m": 0.01, "max_excess": 0}  # fmt: skip
SHELF_GOALS = ["lamp_switch", "bottle", "book", "drawer_knob"]


# ------------------------------------------------------------------------------------------ thresholds
def test_thresholds_read_and_checked():
    th = G.Thresholds.from_config(GATES, parity_ceiling=1e-5)
    assert th.max_violations == 0 and th.latency_p99_us == 2000.0
    with pytest.raises(ConfigError, match=r"gates\.speed"):
        G.Thresholds.from_config({**GATES, "speed": 1}, 1e-5)
    with pytest.raises(ConfigError, match=r"gates\.recovery_lo"):
        G.Thresholds.from_config({k: v for k, v in GATES.items() if k != "recovery_lo"}, 1e-5)
    with pytest.raises(ConfigError, match=r"gates\.parity_max_abs"):  # a gate may tighten the writer's limit only
        G.Thresholds.from_config({**GATES, "parity_max_abs": 1e-3}, 1e-5)
    with pytest.raises(ConfigError, match=r"gates\.max_violations"):
        G.Thresholds.from_config({**GATES, "max_violations": 0.5}, 1e-5)


def _rate(k: int, n: int) -> dict:
    lo, hi = wilson_interval(k, n)
    return {"value": k / n, "lo": lo, "hi": hi, "n": n}


def _summary(success=(45, 50), recovery=None, stick_gain=0.3, collapsed=False) -> dict:
    recovery = recovery or {"none": (20, 20), "0.5": (15, 15), "0.8": (10, 15)}
    return {"success": _rate(*success), "recovery": {c: _rate(*kn) for c, kn in recovery.items()},
            "stick_gain": {"median": stick_gain, "p05": stick_gain / 2, "n": 100, "collapsed": collapsed}}  # fmt: skip


NO_VIOLATIONS = {"joint_speed": 0, "joint_position": 0, "tool_speed": 0, "total": 0, "steps": 100}


def test_rates_are_gated_on_the_wilson_lower_bound():
    th = G.Thresholds.from_config(GATES, 1e-5)
    # 45/50 = 0.9 but its 95% Wilson lower bound is about 0.786 (Wilson 1927; worked with z = 1.96);
    # 10/15 at the latest switch (0.8) is 0.667 with a lower bound near 0.417, below 0.5, although the
    # earlier switch (15/15) would pass: the gate looks at the latest switch.
    results = {r.name: r for r in G.suite_gates("s", _summary(), NO_VIOLATIONS, th)}
    assert results["success[s]"].value == pytest.approx(0.7864, abs=1e-3) and results["success[s]"].passed
    rec = results["recovery@0.8[s]"]
    assert rec.value == pytest.approx(0.4171, abs=1e-3) and not rec.passed
    assert "recovery@0.5[s]" not in results
    assert results["violations[s]"].passed and results["stick_gain[s]"].passed


def test_thin_evidence_fails_even_at_a_perfect_rate():
    th = G.Thresholds.from_config(GATES, 1e-5)
    # 3 successes in 3 episodes: the Wilson lower bound at p = 1 is n / (n + z^2) = 3 / 6.84 = 0.44 < 0.6
    # (Wilson 1927, with z = 1.96 for 95%)
    r = G.suite_gates("s", _summary(success=(3, 3), recovery={"none": (3, 3)}), NO_VIOLATIONS, th)[0]
    assert r.value == pytest.approx(3 / (3 + 1.96**2), abs=1e-3) and not r.passed


def test_collapsed_stick_gain_and_any_violation_fail():
    th = G.Thresholds.from_config(GATES, 1e-5)
    bad = {**NO_VIOLATIONS, "tool_speed": 1, "total": 1}
    results = {r.name: r for r in G.suite_gates("s", _summary(stick_gain=0.5, collapsed=True), bad, th)}
    assert not results["stick_gain[s]"].passed  # above the gate's threshold, but vetting flagged it collapsed
    assert not results["violations[s]"].passed and results["violations[s]"].value == 1
    assert not G.passed(list(results.values()))


def test_unmeasured_artifact_gates_fail():
    th = G.Thresholds.from_config(GATES, 1e-5)
    parity, latency = G.artifact_gates(None, 10_000, None, th)
    assert not parity.passed and not latency.passed and parity.value is None
    ok = G.artifact_gates(2e-7, 10_000, {"session_p99_us": 150.0, "session_p50_us": 50.0, "bare_p99_us": 30.0,
                                         "steps": 100}, th)  # fmt: skip
    assert all(r.passed for r in ok)
    assert json.loads(json.dumps(G.as_json(ok)))["latency_p99"]["threshold"] == 2000.0


# ------------------------------------------------------------------------------------------ violations
def test_count_violations_against_hand_computed_planar_arm():
    robot = Planar3()  # links 0.35, 0.30, 0.15: at q = 0 the tool moves along y at 0.8 qd0 + 0.45 qd1 + 0.15 qd2
    limits = SafetyLimits(qd_max=(1.0, 1.0, 1.0), tcp_speed_max=0.25, q_lower=(-1.0,) * 3, q_upper=(1.0,) * 3)
    T = 5
    q = torch.zeros(1, T + 1, 3, dtype=torch.float64)
    qd = torch.zeros(1, T, 3, dtype=torch.float64)
    qd[0, 0] = torch.tensor([0.1, 0.0, 0.0])  # tool 0.08 m/s: fine
    qd[0, 1] = torch.tensor([0.0, 0.0, 1.2])  # joint 3 at 1.2 > 1 rad/s; tool 0.18 m/s: fine
    qd[0, 2] = torch.tensor([0.4, 0.0, 0.0])  # tool 0.32 > 0.25 m/s
    qd[0, 3] = torch.tensor([0.3125, 0.0, 0.0])  # tool exactly 0.25 m/s: at the limit is not beyond it
    q[0, 5] = torch.tensor([0.0, 0.0, 1.2])  # step 4 ends beyond the joint limit
    path = torch.zeros(1, T + 1, 3, dtype=torch.float64)
    path[0, 3] = torch.tensor([2.0, 0.0, 0.0])  # step 2 ends outside the box
    record = SimpleNamespace(extras={"q": q, "qd": qd}, ee_path=path)
    out = G.count_violations(record, robot, limits, ([-1.0] * 3, [1.0] * 3))
    assert out == {"joint_speed": 1, "joint_position": 1, "tool_speed": 1, "workspace": 1,
                   "workspace_max_overshoot_m": 1.0, "total": 3, "steps": 5}  # 2.0 m against the box's 1.0 m face


# ------------------------------------------------------------------------------------------ bundles
def _policy(seed: int = 0) -> DecoderPolicy:
    torch.manual_seed(seed)
    policy = DecoderPolicy.build({"_target_": "coreach_plugins.model.cvae.BeliefCVAE", "latent_dim": 2,
                                  "hidden": [32, 32]}, ContextSpec(dof=7, n_goals=4), 7)  # fmt: skip
    # actions of ~0.3 rad/s so the arm moves and the caps act now and then
    policy.set_normalisation(torch.randn(400, policy.spec.width) * 0.5, torch.randn(400, 7) * 0.3)
    return policy.eval()


def _meta(run_id: str) -> dict:
    return {
        "goal_names": SHELF_GOALS,
        "nominal_layout": {"goal_pos": [[0.56, 0.24, 0.30], [0.60, -0.22, 0.06], [0.55, 0.14, -0.08],
                                        [0.62, -0.08, -0.17]],
                           "goal_quat": [[0.7071068, 0.0, 0.7071068, 0.0]] * 4,
                           "goal_fine": [[0.03, 0, 0], [0, 0, 0.06], [0, 0.08, 0], [-0.07, 0, 0]]},
        "dataset_fingerprint": "sha256:test", "training_run_id": run_id, "git_commit": "0" * 40,
        "q_home": list(SEVEN_JOINT_ARM_HOME), "parity_n": 1000,
        "safety": {"workspace_min": [0.15, -0.45, -0.35], "workspace_max": [0.85, 0.45, 0.60]},
    }  # fmt: skip


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    """A sqlite store with one training-like run that bundles can name."""
    root = tmp_path_factory.mktemp("store")
    client = MlflowClient(f"sqlite:///{root / 'mlflow.db'}")
    exp = client.create_experiment("t", artifact_location=(root / "art").as_uri())
    run = client.create_run(exp)
    client.log_text(run.info.run_id, "{}", "decoder/decoder.json")
    return SimpleNamespace(root=root, client=client, run_id=run.info.run_id)


@pytest.fixture(scope="module")
def bundle(store) -> Path:
    return write_bundle(store.root / "bundle", _policy(), shipped_urdf(), _meta(store.run_id), {}, {"ok": True})


def test_onnx_bundle_interface_drives_the_loop_like_the_torch_decoder(bundle):
    robot = UrdfArm()
    belief = BoltzmannGoalBelief()
    limits = SafetyLimits.for_robot(robot)
    suite = load_suite("goal-switch", episodes=1, horizon_s=3.0)  # 4 episodes x 30 steps
    onnx = OnnxBundleInterface(str(bundle))
    torch_dec = DecoderInterface(_policy(), "torch")
    a = rollout(robot, torch_dec, suite.build_operator(), suite, belief, limits, suite.generator())
    b = rollout(robot, onnx, suite.build_operator(), suite, belief, limits, suite.generator())
    torch.testing.assert_close(b.extras["q"], a.extras["q"], rtol=0, atol=1e-5)
    assert float(a.extras["qd"].abs().max()) > 1e-3  # the arm really moved
    assert torch.equal(a.success, b.success)
    # stick_gain: central differences on the graph against autograd on the torch module
    fin = torch.isfinite(a.stick_gain)
    torch.testing.assert_close(b.stick_gain[fin], a.stick_gain[fin], rtol=1e-3, atol=1e-5)


def test_onnx_bundle_interface_refuses_an_altered_bundle(bundle, tmp_path):
    copy = Path(shutil.copytree(bundle, tmp_path / "b"))
    data = bytearray((copy / "decoder.onnx").read_bytes())
    data[len(data) // 2] ^= 0x01
    (copy / "decoder.onnx").write_bytes(bytes(data))
    with pytest.raises(BundleError, match="sha256"):
        OnnxBundleInterface(str(copy))


def test_replay_without_a_vetting_record_reports_and_passes(bundle, tmp_path):
    from coreach.config.check import compose_config

    cfg = compose_config("replay", [f"bundle={bundle}", "suite=nominal", "suite.episodes=1",
                                    f"tracking.uri=sqlite:///{tmp_path / 'absent.db'}"])  # fmt: skip
    out = replay(cfg)
    assert out["comparison"] is None and "no tracking store" in out["comparison_source"]
    assert not (tmp_path / "absent.db").exists()  # looking for a record must not create a store
    assert "exit_code" not in out and set(out["violations"]) >= {"joint_speed", "tool_speed", "workspace"}
    limits = bundle_limits(OnnxBundleInterface(str(bundle)).manifest_)
    assert limits.tcp_speed_max == 0.25 and len(limits.qd_max) == 7


def test_replay_comparison_tolerances():
    tol = OmegaConf.create({"rate_episodes": 2, "median_rel": 0.01})
    summary = _summary(success=(30, 50), recovery={"none": (10, 25), "0.8": (20, 25)}, stick_gain=0.30)
    vetted = {"success/value": 0.6, "success/n": 50, "recovery/none/value": 0.4, "recovery/0.8/value": 0.8,
              "stick_gain/median": 0.301}  # fmt: skip
    same = compare(summary, vetted, tol)
    assert same["comparable"] and same["match"] and len(same["rows"]) == 4
    off = compare(summary, {**vetted, "recovery/0.8/value": 0.8 + 3 / 25}, tol)  # 3 episodes apart in a cell of 25
    assert off["comparable"] and not off["match"]
    assert [r["metric"] for r in off["rows"] if not r["ok"]] == ["recovery/0.8/value"]
    other_size = compare(summary, {**vetted, "success/n": 150}, tol)
    assert not other_size["comparable"] and "150" in other_size["note"]
    assert compare(summary, None, tol) is None


# ------------------------------------------------------------------------------------------ registry
GATE_OK = {"success[s]": {"value": 0.9, "threshold": 0.6, "op": ">=", "passed": True, "what": "", "detail": ""}}


def _vetted_version(store, bundle: Path, name: str, usable: bool = True) -> str:
    """A version published as coreach release leaves it: bundle uploaded to a release run, tags, usable mark."""
    c = store.client
    rid = c.create_run(c.get_run(store.run_id).info.experiment_id,
                       tags={"coreach.stage": "release", "coreach.source_run": store.run_id}).info.run_id  # fmt: skip
    bundle_store.upload(c, rid, bundle)
    uri = bundle_store.bundle_uri(c, rid)
    if registry.get_model(c, name) is None:
        c.create_registered_model(name)
    v = str(c.create_model_version(name, uri, rid, tags={"coreach.release_run": rid}).version)
    for k, val in {"coreach.bundle_uri": uri, "coreach.manifest_sha256": sha256_file(bundle / MANIFEST),
                   "coreach.gate": json.dumps(registry.compact_gate(GATE_OK))}.items():  # fmt: skip
        c.set_model_version_tag(name, v, k, val)
    if usable:
        c.set_model_version_tag(name, v, "coreach.gate_passed", "true")
        c.set_registered_model_alias(name, "gate-passed", v)
    c.set_terminated(rid)
    return v


@pytest.fixture(autouse=True)
def _releases_cache(tmp_path, monkeypatch):
    """Each test its own local releases folder (the cache of the store's bundles)."""
    monkeypatch.setenv("COREACH_RELEASES_DIR", str(tmp_path / "releases"))


def test_promote_fields_and_back_restores(store, bundle):
    c, name = store.client, "promote-back"
    v1 = _vetted_version(store, bundle, name)
    v2 = _vetted_version(store, bundle, name)
    assert {k: str(v) for k, v in c.get_registered_model(name).aliases.items()} == {"gate-passed": v2}
    first = registry.promote(c, name, v1)
    assert first["fielded"] == v1 and first["previous"] is None
    second = registry.promote(c, name, v2)
    assert second["previous"] == v1 and second["history"] == [v1, v2]
    assert str(c.get_model_version_by_alias(name, "fielded").version) == v2
    back = registry.promote_back(c, name)
    assert back["fielded"] == v1 and back["previous"] == v2
    assert str(c.get_model_version_by_alias(name, "fielded").version) == v1
    with pytest.raises(CoreachError, match="no earlier fielded version"):
        registry.promote_back(c, name)
    rows = {r["version"]: r for r in registry.list_releases(c, name)}
    assert rows[v1]["aliases"] == ["fielded"] and rows[v2]["aliases"] == ["gate-passed"]
    assert rows[v1]["gate_passed"] and rows[v1]["bundle_status"] == "ok" and rows[v1]["gates_passed"] == 1


def test_promote_refuses_a_version_that_did_not_pass_the_gate(store, bundle):
    c, name = store.client, "unvetted"
    v = _vetted_version(store, bundle, name, usable=False)  # a publish that never reached its last step
    with pytest.raises(CoreachError, match="has not passed the release gate"):
        registry.promote(c, name, v)
    assert "fielded" not in (c.get_registered_model(name).aliases or {})


def _flip_byte(b: Path):
    data = bytearray((b / "decoder.onnx").read_bytes())
    data[100] ^= 0x01
    (b / "decoder.onnx").write_bytes(bytes(data))


def _reformat_manifest(b: Path):  # same content, other bytes: hashes of the files still match
    (b / MANIFEST).write_text(json.dumps(json.loads((b / MANIFEST).read_text()), indent=1))


def _escape(b: Path):
    data = json.loads((b / MANIFEST).read_text())
    data["files"]["../outside.txt"] = "0" * 64
    (b / MANIFEST).write_text(json.dumps(data))


TAMPER = {
    "changed byte": (_flip_byte, "does not verify"),
    "missing file": (lambda b: (b / "MODEL_CARD.md").unlink(), "does not verify"),
    "extra file": (lambda b: (b / "notes.txt").write_text("x"), "does not verify"),
    "path escape": (_escape, "does not verify"),
    "replaced manifest": (_reformat_manifest, "manifest other than the one released"),
}


def _store_copy(c, name: str, version: str) -> Path:
    """The bundle's folder in the store's (file) artifact location: what a tamperer with store access changes."""
    return Path(c.get_model_version(name, version).tags["coreach.bundle_uri"].removeprefix("file://"))


@pytest.mark.parametrize("case", list(TAMPER))
def test_promote_refuses_a_bundle_tampered_in_the_store(store, bundle, case):
    c, name = store.client, f"tamper-{case.replace(' ', '-')}"
    good = _vetted_version(store, bundle, name)
    registry.promote(c, name, good)  # fine before the change
    bad = _vetted_version(store, bundle, name)
    alter, message = TAMPER[case]
    alter(_store_copy(c, name, bad))
    with pytest.raises(CoreachError, match=message):
        registry.promote(c, name, bad)
    assert str(c.get_model_version_by_alias(name, "fielded").version) == good  # fielding unchanged
    assert not (registry.releases_root() / name / f"v{bad}").exists()  # nothing of it cached
    assert [p.name for p in (registry.releases_root() / name).iterdir()] == [f"v{good}"]  # no staging left


def test_a_changed_local_cache_is_refused_and_listed(store, bundle):
    c, name = store.client, "tamper-cache"
    v = _vetted_version(store, bundle, name)
    folder = Path(registry.promote(c, name, v)["bundle"])  # downloaded from the store into the cache
    assert folder == (registry.releases_root() / name / f"v{v}").resolve()
    _flip_byte(folder)
    with pytest.raises(CoreachError, match="cached copy .* does not verify"):
        registry.promote(c, name, v)
    assert registry.list_releases(c, name)[0]["bundle_status"].startswith("FAILS")
    shutil.rmtree(folder)  # a cache: removed, it is fetched again from the store
    assert registry.promote(c, name, v)["fielded"] == v


def test_bundle_references_resolve_through_the_store(store, bundle, monkeypatch, tmp_path):
    """replay, bench runtime and test-drive take a folder or NAME@ALIAS / NAME/VERSION from the store."""
    c, name = store.client, "by-reference"
    monkeypatch.setenv("MLFLOW_TRACKING_URI", c.tracking_uri)
    v = _vetted_version(store, bundle, name)
    folder = bundle_store.bundle_folder(f"{name}@gate-passed")
    assert folder == registry.releases_root() / name / f"v{v}"
    assert (folder / MANIFEST).read_bytes() == (bundle / MANIFEST).read_bytes()
    assert bundle_store.bundle_folder(f"models:/{name}/{v}") == folder
    assert bundle_store.bundle_folder(str(bundle)) == bundle  # a folder stays a folder
    # the store a command was configured with (tracking.uri) is the one asked, not the default
    monkeypatch.delenv("MLFLOW_TRACKING_URI")
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    assert bundle_store.bundle_folder(f"{name}/{v}", uri=c.tracking_uri).name == f"v{v}"
    assert not (elsewhere / "mlflow.db").exists()
    monkeypatch.setenv("MLFLOW_TRACKING_URI", c.tracking_uri)
    unfinished = _vetted_version(store, bundle, name, usable=False)
    for ref, needle in ((f"{name}@fielded", "has no alias @fielded"), (f"{name}/{unfinished}", "not a finished release"),
                        ("nobody@fielded", "no registered model 'nobody'"), ("no/such/folder", "neither a bundle folder")):  # fmt: skip
        with pytest.raises(CoreachError, match=needle):
            bundle_store.bundle_folder(ref)


def test_model_names_are_checked():
    assert registry.check_name("bedside-shelf-decoder") == "bedside-shelf-decoder"
    for bad in ("../x", "a/b", "", "x" * 200):
        with pytest.raises(ConfigError, match="option name"):
            registry.check_name(bad)


def test_demo_ranks_decoders_by_their_own_vetting_even_when_labels_differ():
    # an aggregated decoder is vetted under its round label (<label>/agg<r>); the demo must still find its
    # summary, through the training run id vetting recorded
    from coreach.release.demo_helpers import _ranked

    def summary(lo, value):
        return {"success": {"lo": lo, "value": value}}

    demo = {
        "runs": [{"run_id": "a" * 32, "label": "cvae"}, {"run_id": "b" * 32, "label": "cvae+goal_entropy+agg"},
                 {"run_id": "c" * 32, "label": "unvetted"}],
        "vetting": {"summaries": {"cvae": summary(0.3, 0.4), "cvae+goal_entropy+agg/agg3": summary(0.96, 1.0)},
                    "sources": {"cvae": "a" * 32, "cvae+goal_entropy+agg/agg3": "b" * 32}},
    }
    assert [r["label"] for r in _ranked(demo)] == ["cvae+goal_entropy+agg", "cvae", "unvetted"]


def test_release_takes_the_urdf_from_the_robot_protocol(tmp_path):
    from coreach.release.evaluation import _urdf

    with pytest.raises(ConfigError, match="a release ships the arm's URDF; robot 'planar3' has none"):
        _urdf(Planar3(), tmp_path)
    written = _urdf(UrdfArm(), tmp_path)
    assert written.read_bytes() == Path(shipped_urdf()).read_bytes()


def test_gate_metric_names_are_readable_paths():
    from coreach.release.publish import gate_metric_name

    assert gate_metric_name("recovery@0.8[held-out]") == "gate/held-out/recovery_at_0.8"
    assert gate_metric_name("success[held-out]") == "gate/held-out/success"
    assert gate_metric_name("latency_p99_us") == "gate/latency_p99_us"


def test_a_failing_settle_does_not_hide_why_the_publish_failed(tmp_path, monkeypatch, capsys):
    """The publish's own error reaches the user even when settling it fails too (the store went away)."""
    from coreach.release import publish as P

    client = MlflowClient(f"sqlite:///{tmp_path / 'mlflow.db'}")
    run = client.get_run(client.create_run(client.create_experiment("p")).info.run_id)

    def broken_steps(*args, **kwargs):
        raise ValueError("disk full while writing the bundle")

    def broken_settle(*args, **kwargs):
        raise RuntimeError("tracking store unreachable")

    monkeypatch.setattr(P, "_steps", broken_steps)
    monkeypatch.setattr(P, "settle_run", broken_settle)
    cfg = OmegaConf.create({"name": "m", "out_dir": str(tmp_path / "releases")})
    with pytest.raises(ValueError, match="disk full"):
        P.publish(cfg, client, None, run, "label", {})
    err = capsys.readouterr().err
    assert "could not settle release run" in err and "tracking store unreachable" in err, err


def test_release_settings_looser_than_shipped_are_named():
    """The shipped release settings are not relaxed; each loosened gate, fewer episodes than a suite's own, other
    suites, fewer parity samples or latency steps is named with its shipped value."""
    from coreach.config.check import compose_config
    from coreach.release.relaxation import relaxed_settings
    from coreach.runtime.model_card import model_card

    own = {"held-out": load_suite("held-out").episodes}
    assert relaxed_settings(compose_config("release", ["run=x"]), own) == []
    # stricter than shipped is not relaxed
    assert relaxed_settings(compose_config("release", ["run=x", "gates.success_lo=0.5", "episodes=80"]), own) == []
    cfg = compose_config("release", ["run=x", "gates.success_lo=0", "gates.max_violations=5", "episodes=1",
                                     "parity_n=1000", "latency.steps=100"])  # fmt: skip
    assert relaxed_settings(cfg, own) == [
        "gates.success_lo=0 (shipped 0.3)", "gates.max_violations=5 (shipped 0)",
        f"episodes=1 per switch cell (the suites' own: held-out {own['held-out']})",
        "parity_n=1000 (shipped 10000)", "latency.steps=100 (shipped 3000)"]  # fmt: skip
    card = model_card({"gate_relaxed": ["gates.success_lo=0 (shipped 0.3)"]}, {}, {})
    assert "**Warning: released with gate settings looser than shipped, so it is NOT a vetted decoder" in card
    assert "Warning" not in model_card({}, {}, {})


def test_model_card_gate_table_parses_as_a_table():
    """A Markdown parser (markdown-it-py with its GFM table rule) reads the gate table as five columns with a
    verdict per gate, not a Python dict. (A GFM parser pads or drops cells, so the cell count on the raw source,
    which catches an unescaped `|`, is checked in tests/test_bundle.py.)"""
    from markdown_it import MarkdownIt

    from coreach.runtime.model_card import model_card

    th = G.Thresholds(success_lo=0.3, recovery_lo=0.15, max_violations=0, stick_gain_median=0.02,
                      parity_max_abs=1e-5, latency_p99_us=2000.0)  # fmt: skip
    latency = {"session_p50_us": 120.0, "session_p99_us": 250.0, "bare_p99_us": 30.0, "steps": 3000}
    gate = G.as_json(G.artifact_gates(3e-7, 1000, latency, th))
    assert any("|" in v["what"] for v in gate.values())  # the case that broke the table
    tokens = MarkdownIt("commonmark").enable("table").parse(model_card({}, gate, {"success": 0.9}))
    rows, cells, table = [], 0, 0
    for t in tokens:
        if t.type == "table_open":
            table += 1
        elif t.type == "tr_open":
            cells = 0
        elif t.type in ("th_open", "td_open"):
            cells += 1
        elif t.type == "tr_close" and table == 2:  # the second table: the release gate
            rows.append(cells)
    assert rows == [5] * (len(gate) + 1), rows
    assert "| pass |" in model_card({}, gate, {}) and "{'value'" not in model_card({}, gate, {})


def test_scratch_folders_of_dead_release_processes_are_cleared(tmp_path, monkeypatch):
    """A release killed during the gate leaves its scratch folder; the next settle removes it, but never the
    folder of a release process that still runs."""
    import subprocess
    import sys

    from coreach.release import settle as S

    monkeypatch.setattr(S.tempfile, "gettempdir", lambda: str(tmp_path))
    done = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    dead_pid = int(done.stdout)  # that process has exited
    dead = tmp_path / f"{S.TMP_PREFIX}{dead_pid}-abc"
    live = tmp_path / f"{S.scratch_prefix()}def"  # this process's own
    other = tmp_path / "coreach-release-notapid-x"
    for folder in (dead, live, other):
        folder.mkdir()
    said = []
    S._clean_scratch(said.append)
    assert not dead.exists() and live.is_dir() and other.is_dir()
    assert said == [f"removed {dead}: scratch folder of a release that was killed"]
