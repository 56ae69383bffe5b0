"""`coreach release`, `replay`, `promote`, `rollback`, `bundles` and `bench runtime` end to end on a tiny trained decoder."""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import SMALL, cli_env
from mlflow.entities import ViewType
from mlflow.tracking import MlflowClient

from coreach.runtime.bundle import verify_bundle

COREACH = str(Path(sys.executable).parent / "coreach")
NAME = "test-decoder"
# Small but real: held-out with a 10 s horizon (written by the `trained` fixture), 1 episode per switch cell
# (3 episodes x 100 steps), fewer latency steps.
SUITE = "held-out-short"
QUICK = [f"gate_suites=[{SUITE}.yaml]", "episodes=1", "latency.steps=300", "latency.warmup=20",
         f"name={NAME}"]
HELD_OUT = Path(__file__).resolve().parents[1] / "conf" / "coreach_conf" / "suite" / "held-out.yaml"
# Thresholds a barely trained decoder can meet, so the publishing path runs; parity stays at 1e-5.
PERMISSIVE = ["gates.success_lo=0", "gates.recovery_lo=0", "gates.max_violations=1000000",
              "gates.stick_gain_median=0", "gates.latency_p99_us=1000000"]  # fmt: skip

pytestmark = pytest.mark.slow


def run(args, cwd, **env):
    return subprocess.run([COREACH, *args], cwd=cwd, capture_output=True, text=True, env=cli_env(**env), timeout=900)


def _client(cwd: Path) -> MlflowClient:
    return MlflowClient(f"sqlite:///{cwd / 'mlflow.db'}")


def _all_runs(cwd: Path) -> set[str]:
    c = _client(cwd)
    exps = [e.experiment_id for e in c.search_experiments(view_type=ViewType.ALL)]
    return {r.info.run_id for r in c.search_runs(exps, run_view_type=ViewType.ALL)}


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    cwd = tmp_path_factory.mktemp("release")
    text = HELD_OUT.read_text().replace("name: held-out", f"name: {SUITE}")
    text = text.replace("horizon_s: 30.0", "horizon_s: 10.0")
    assert f"name: {SUITE}" in text and "horizon_s: 10.0" in text
    (cwd / f"{SUITE}.yaml").write_text(text)
    res = run(["--json", "train", *SMALL], cwd)
    assert res.returncode == 0, res.stderr
    return cwd, json.loads(res.stdout)["runs"][0]["run_id"]


def test_refusal_prints_every_gate_and_leaves_nothing(trained):
    cwd, run_id = trained
    before = _all_runs(cwd)
    (cwd / "tmp").mkdir(exist_ok=True)
    # 3 episodes can never show a success lower bound of 0.5 (at 3/3 it is 0.44), and no step takes 1 ns
    res = run(["release", f"run={run_id}", *QUICK, "gates.success_lo=0.5", "gates.latency_p99_us=0.001"], cwd,
              TMPDIR=str(cwd / "tmp"))
    assert res.returncode == 3, res.stderr
    rows = {line.split("│")[1].strip(): line for line in res.stdout.splitlines() if line.count("│") >= 5
            and line.split("│")[1].strip()}  # fmt: skip
    expected = {f"success[{SUITE}]", f"recovery@0.8[{SUITE}]", f"violations[{SUITE}]", f"stick_gain[{SUITE}]",
                "onnx_parity", "latency_p99"}  # fmt: skip
    assert expected <= set(rows), res.stdout
    assert "FAIL" in rows[f"success[{SUITE}]"] and "FAIL" in rows["latency_p99"]
    assert ">= 0.5" in rows[f"success[{SUITE}]"]  # the threshold is shown beside the measured value
    failed_line = [ln for ln in res.stderr.splitlines() if "release refused" in ln]
    assert failed_line and f"success[{SUITE}]" in failed_line[0] and "latency_p99" in failed_line[0]
    assert not (cwd / "releases").exists()
    assert list(_client(cwd).search_registered_models()) == []
    assert _all_runs(cwd) == before
    assert list((cwd / "tmp").iterdir()) == []  # the staging folder went too


@pytest.fixture(scope="module")
def released(trained):
    cwd, run_id = trained
    res = run(["release", f"run={run_id}", *QUICK, *PERMISSIVE], cwd)
    assert res.returncode == 0, res.stderr
    return cwd, run_id, res.stdout


def test_passing_release_bundle_registry_and_cautions(released):
    cwd, run_id, stdout = released
    folder = cwd / "releases" / NAME / "v1"
    m = verify_bundle(folder)
    client = _client(cwd)
    train = client.get_run(run_id)
    assert m.training_run_id == run_id
    assert m.dataset_fingerprint == train.data.tags["coreach.dataset_sha256"]
    if "mlflow.source.git.commit" in train.data.tags:
        assert m.git_commit == train.data.tags["mlflow.source.git.commit"]
    assert m.onnx_parity["n"] == 10_000 and m.onnx_parity["max_abs_diff"] <= 1e-5
    assert all(g["passed"] for g in m.gate.values()) and f"success[{SUITE}]" in m.gate
    assert "report.html" in m.files and "not a medical device" in (folder / "MODEL_CARD.md").read_text()

    mv = client.get_model_version_by_alias(NAME, "gate-passed")
    rel = client.get_run(mv.tags["coreach.release_run"])
    assert str(mv.version) == "1" and mv.run_id == rel.info.run_id  # the version's source is the release run's
    assert mv.tags["coreach.gate_passed"] == "true"
    # the whole bundle is in the tracking store, and the version points at it
    assert mv.source == mv.tags["coreach.bundle_uri"] == rel.info.artifact_uri + "/bundle"
    stored = Path(client.download_artifacts(rel.info.run_id, "bundle", str(cwd / "fetched")))
    assert verify_bundle(stored).files == m.files
    assert (stored / "manifest.json").read_bytes() == (folder / "manifest.json").read_bytes()
    assert rel.info.status == "FINISHED" and rel.data.tags["coreach.publish"] == "done"
    assert mv.tags["coreach.manifest_sha256"] == hashlib.sha256((folder / "manifest.json").read_bytes()).hexdigest()
    assert json.loads(mv.tags["coreach.gate"])["onnx_parity"]["passed"] is True
    assert rel.data.tags["coreach.stage"] == "release" and rel.data.tags["coreach.source_run"] == run_id
    assert f"vet/{SUITE}/success/value" in train.data.metrics  # what drive compares with

    text = " ".join(stdout.split())
    for phrase in ("not a medical device", "ethics review", "emergency stop", "ISO 10218-1/-2", "ISO/TS 15066",
                   "ISO 13482", "local regulations", "qualified professionals", "always on"):
        assert phrase in text, phrase


def test_drive_matches_vet_on_the_same_suite_and_seeds(released):
    cwd, run_id, _ = released
    vet = run(["--json", "vet", f"candidates=[{run_id}]", f"suite={SUITE}.yaml", "suite.episodes=1", "report_dir=rep"], cwd)
    assert vet.returncode == 0, vet.stderr
    vetted = next(iter(json.loads(vet.stdout)["summaries"].values()))
    res = run(["--json", "replay", f"bundle=releases/{NAME}/v1", f"suite={SUITE}.yaml", "suite.episodes=1"], cwd)
    assert res.returncode == 0, res.stderr
    out = json.loads(res.stdout)
    c = out["comparison"]
    assert c["comparable"] and c["match"], c
    assert {r["metric"] for r in c["rows"]} >= {"success/value", "recovery/0.8/value", "stick_gain/median"}
    driven = next(iter(out["summaries"].values()))
    # the same episodes through the ONNX graph: outcomes equal, stick_gain (finite differences on the graph
    # against autograd on torch) within the stated 1%
    assert driven["success"]["n"] == vetted["success"]["n"] == 3
    assert driven["success"]["value"] == vetted["success"]["value"]
    assert driven["stick_gain"]["median"] == pytest.approx(vetted["stick_gain"]["median"], rel=0.01)


def test_promote_rollback_and_bundles_commands(released):
    cwd, run_id, _ = released
    second = run(["release", f"run={run_id}", *QUICK, *PERMISSIVE], cwd)
    assert second.returncode == 0, second.stderr
    assert run(["promote", NAME, "1"], cwd).returncode == 0
    res = run(["--json", "promote", NAME, "2"], cwd)
    assert res.returncode == 0, res.stderr
    promoted = json.loads(res.stdout)
    assert promoted["history"] == ["1", "2"] and "not a medical device" in promoted["cautions"][0]
    back = run(["rollback", NAME], cwd)
    assert back.returncode == 0 and "version 1 restored" in back.stdout, back.stderr
    assert str(_client(cwd).get_model_version_by_alias(NAME, "fielded").version) == "1"

    (cwd / "releases" / NAME / "v2" / "extra.txt").write_text("not part of the release")
    refused = run(["promote", NAME, "2"], cwd)
    assert refused.returncode == 2 and "does not verify" in refused.stderr
    assert len(refused.stderr.strip().splitlines()) == 1

    listing = run(["--json", "bundles", NAME], cwd)
    assert listing.returncode == 0, listing.stderr
    rows = {r["version"]: r for r in json.loads(listing.stdout)}
    assert set(rows) == {"1", "2"}
    assert rows["1"]["aliases"] == ["fielded"] and rows["2"]["aliases"] == ["gate-passed"]
    assert rows["2"]["bundle_status"].startswith("FAILS") and rows["1"]["bundle_status"] == "ok"
    table = run(["bundles"], cwd)
    assert table.returncode == 0 and NAME in table.stdout and "@fielded" in table.stdout


def test_bench_runtime_on_a_released_bundle(released):
    cwd, _, _ = released
    # by reference: version 1 of the model, as the tracking store holds it (checked against the local cache)
    res = run(["--json", "bench", "runtime", f"bundle={NAME}/1", "steps=200", "warmup=10"], cwd)
    assert res.returncode == 0, res.stderr
    out = json.loads(res.stdout)["runs"][0]
    assert out["steps"] == 200 and out["decoder_runs"] > 0
    assert out["session_p50_us"] <= out["session_p99_us"] and out["bare_p50_us"] <= out["bare_p99_us"]
    assert out["ratio_p99"] == pytest.approx(out["session_p99_us"] / out["bare_p99_us"])


def test_release_best_releases_a_demo_decoder_and_drives_it(trained, monkeypatch):
    from hydra import initialize_config_module
    from omegaconf import OmegaConf

    from coreach.release.demo_helpers import release_best

    cwd, run_id = trained
    monkeypatch.chdir(cwd)
    monkeypatch.setenv("MLFLOW_TRACKING_URI", f"sqlite:///{cwd / 'mlflow.db'}")
    demo_result = {"runs": [{"run_id": run_id, "label": "tiny"}], "vetting": {"summaries": {}}}
    cfg = OmegaConf.create({"demo": {"release": {"overrides": [*QUICK[:-1], "name=demo-decoder", *PERMISSIVE]}}})
    with initialize_config_module("coreach_conf", version_base="1.3"):
        out = release_best(demo_result, cfg)
    assert out["release"] is not None and out["release"]["released"]
    assert Path(out["release"]["bundle"]).parent.name == "demo-decoder"
    assert out["replay"]["comparison"]["match"], out["replay"]["comparison"]
    # fielded in the registry, and stepped through the runtime session that ships
    from mlflow import MlflowClient

    assert out["fielded"]["fielded"] == str(out["release"]["version"])
    model = MlflowClient(f"sqlite:///{cwd / 'mlflow.db'}").get_registered_model("demo-decoder")
    assert str(model.aliases["fielded"]) == str(out["release"]["version"])
    t = out["tryout"]
    assert t["steps"] == 300 and t["fault"] is None and t["tool_moved_m"] > 0.01
    # each belief value is rounded to 3 decimals in the summary: the sum is 1 within G * 0.0005
    assert sum(t["belief"].values()) == pytest.approx(1.0, abs=len(t["belief"]) * 5e-4 + 1e-9)


def test_bench_vet_reports_all_three_rates(tmp_path):
    res = run(["--json", "bench", "vet", "episodes=1", "per_episode=1", "horizon_s=1.0"], tmp_path)
    assert res.returncode == 0, res.stderr
    out = json.loads(res.stdout)["runs"][0]
    assert (out["episodes"], out["steps"], out["candidates"]) == (4, 10, 25)
    assert out["loop_episode_steps_per_s"] == pytest.approx(4 * 10 / out["loop_seconds"])
    assert out["speedup_over_per_episode"] == pytest.approx(
        out["loop_episode_steps_per_s"] / out["per_episode_episode_steps_per_s"])
    assert out["share_of_bare"] == pytest.approx(out["loop_episode_steps_per_s"] / out["bare_episode_steps_per_s"])


@pytest.mark.parametrize(
    "args, needle",
    [
        (["release"], "option run"),
        (["release", "run=0123456789abcdef0123456789abcdef"], "0123456789abcdef0123456789abcdef"),
        (["replay", "bundle=no/such/folder"], "no/such/folder"),
        (["promote", NAME], "usage"),
    ],
    ids=["release without run", "release unknown run", "drive missing bundle", "promote usage"],
)
def test_bad_input_is_one_line(tmp_path, args, needle):
    res = run(args, tmp_path)
    assert res.returncode == 2
    lines = [ln for ln in res.stderr.splitlines() if ln.strip() and "INFO" not in ln]
    assert len(lines) == 1 and lines[0].startswith("coreach: error:") and needle in lines[0], res.stderr
    assert not (tmp_path / "releases").exists()
