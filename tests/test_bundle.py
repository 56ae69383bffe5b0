"""Release bundles: written completely or not at all, verified by hash, ONNX export equal to torch."""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import torch

from coreach.context import ContextSpec
from coreach.errors import ConfigError, CoreachError
from coreach.world.urdf_arm import SEVEN_JOINT_ARM_HOME, shipped_urdf
from coreach.decoder.policy import DecoderPolicy
from coreach.release.bundle_writer import write_bundle
from coreach.runtime.bundle import CORE_FILES, MANIFEST, BundleError, verify_bundle
from coreach.release.export import export_onnx, onnx_parity, sample_inputs

CVAE = {"_target_": "coreach_plugins.model.cvae.BeliefCVAE", "latent_dim": 2, "hidden": [32, 32]}
SPEC = ContextSpec(dof=7, n_goals=4)


def small_policy(seed: int = 0) -> DecoderPolicy:
    torch.manual_seed(seed)
    policy = DecoderPolicy.build(CVAE, SPEC, 7)
    policy.set_normalisation(torch.randn(400, SPEC.width) * 0.5 + 0.1, torch.randn(400, 7) * 0.8)
    return policy.eval()


def release_meta() -> dict:
    return {
        "goal_names": ["cup", "switch", "drawer", "bottle"],
        "nominal_layout": {
            "goal_pos": [[0.55, 0.20, 0.35], [0.50, -0.25, 0.45], [0.60, 0.0, 0.15], [0.45, 0.10, 0.60]],
            "goal_quat": [[0.7071068, 0.0, 0.7071068, 0.0]] * 4,
            "goal_fine": [[0.03, 0.0, 0.0], [0.0, 0.0, 0.05], [-0.05, 0.0, 0.0], [0.0, 0.0, 0.04]],
        },
        "dataset_fingerprint": "sha256:0123abcd",
        "training_run_id": "run-test-0001",
        "git_commit": "0000000000000000000000000000000000000000",
        "episodes": 40,
        "q_home": list(SEVEN_JOINT_ARM_HOME),
        "safety": {"workspace_min": [-0.3, -0.8, -0.1], "workspace_max": [1.0, 0.8, 1.2]},
        "metrics": {"success_rate": {"value": 0.9, "low": 0.8, "high": 0.96, "level": 0.95}},
    }


@pytest.fixture(scope="module")
def policy():
    return small_policy()


@pytest.fixture(scope="module")
def bundle(tmp_path_factory, policy) -> Path:
    root = tmp_path_factory.mktemp("release")
    report = root / "report.html"
    report.write_text("<html><body>vetting report</body></html>")
    return write_bundle(root / "bundle", policy, shipped_urdf(), release_meta(), {"report.html": report},
                        {"passed": True, "success_rate_low": 0.8})


@pytest.fixture
def copy(bundle, tmp_path) -> Path:
    """A private copy of the bundle to tamper with."""
    return Path(shutil.copytree(bundle, tmp_path / "copy"))


def _manifest(folder: Path) -> dict:
    return json.loads((folder / MANIFEST).read_text())


def _rewrite(folder: Path, data: dict) -> None:
    (folder / MANIFEST).write_text(json.dumps(data))


# ------------------------------------------------------------------------------------------ good bundle
def test_written_bundle_verifies_and_lists_every_file(bundle, policy):
    m = verify_bundle(bundle)
    assert m.schema_version == "2"
    assert (m.latent_dim, m.context_dim, m.action_dim, m.n_goals) == (2, SPEC.width, 7, 4)
    assert sorted(os.listdir(bundle)) == sorted([*CORE_FILES, "report.html", MANIFEST])
    assert set(m.files) == {*CORE_FILES, "report.html"}
    for name, digest in m.files.items():
        assert hashlib.sha256((bundle / name).read_bytes()).hexdigest() == digest  # hashlib as the reference
    np.testing.assert_allclose(m.normalisation["ctx_mean"], policy.ctx_mean.double().numpy())
    np.testing.assert_allclose(m.normalisation["act_std"], policy.act_std.double().numpy())
    assert m.gate == {"passed": True, "success_rate_low": 0.8}
    assert m.onnx_parity["n"] == 10_000 and m.onnx_parity["max_abs_diff"] <= 1e-5
    assert (m.dataset_fingerprint, m.training_run_id) == ("sha256:0123abcd", "run-test-0001")
    assert m.deadband == 0.08 and m.watchdog_timeout_s == 0.2 and m.tcp_speed_max == 0.25
    assert m.joint_names == tuple(f"joint_{i}" for i in range(1, 8))
    assert not list(bundle.parent.glob(".bundle.*"))  # the temporary folder was renamed, not left behind


def test_manifest_read_back_writes_the_same_json(bundle):
    """Reading and re-writing loses nothing: same keys, nesting, order and values (json module as reference)."""
    text = (bundle / MANIFEST).read_text()
    m = verify_bundle(bundle)
    assert json.dumps(m.to_json(), indent=2, allow_nan=False) + "\n" == text
    assert m.speed_fraction == 1.0 and m.urdf == "robot.urdf"


def test_safetensors_copy_reloads_to_the_same_policy(bundle, policy):
    again = DecoderPolicy.load(bundle)
    stick, context = (torch.from_numpy(a) for a in sample_inputs(policy, 64, seed=5))
    with torch.no_grad():
        torch.testing.assert_close(again(stick, context), policy(stick, context), rtol=0, atol=0)


def test_onnx_file_is_valid_self_contained_and_batch_dynamic(bundle):
    model = onnx.load(str(bundle / "decoder.onnx"))
    onnx.checker.check_model(model, full_check=True)
    assert all(init.data_location != onnx.TensorProto.EXTERNAL for init in model.graph.initializer)
    assert sum(len(init.raw_data) for init in model.graph.initializer) > 32 * 32 * 4  # weights inside
    sess = ort.InferenceSession(str(bundle / "decoder.onnx"), providers=["CPUExecutionProvider"])
    assert [i.name for i in sess.get_inputs()] == ["stick", "context"]
    assert [o.name for o in sess.get_outputs()] == ["qd"]
    for batch in (1, 37):
        stick = np.zeros((batch, 2), np.float32)
        (qd,) = sess.run(None, {"stick": stick, "context": np.zeros((batch, SPEC.width), np.float32)})
        assert qd.shape == (batch, 7)


def test_onnx_parity_on_ten_thousand_contexts(bundle, policy):
    assert onnx_parity(policy, bundle / "decoder.onnx", n=10_000, seed=1) <= 1e-5


def test_parity_check_detects_a_different_model(bundle, policy):
    other = small_policy(seed=1)  # same shapes, other weights: the check must notice
    assert onnx_parity(other, bundle / "decoder.onnx", n=500) > 1e-3


def test_export_does_not_change_the_policy(tmp_path, policy):
    before = {k: v.clone() for k, v in policy.state_dict().items()}
    export_onnx(policy, tmp_path / "x.onnx")
    for k, v in policy.state_dict().items():
        assert torch.equal(v, before[k]) and v.dtype == before[k].dtype


def test_model_card_carries_the_cautions_and_metrics(bundle):
    card = (bundle / "MODEL_CARD.md").read_text()
    for phrase in ("not a medical device", "ethics review", "emergency stop", "ISO 10218-1/-2", "ISO/TS 15066",
                   "ISO 13482", "local regulations", "qualified professionals", "always on",
                   "sha256:0123abcd", "run-test-0001", "0.9 (95% interval 0.8 to 0.96)"):
        assert phrase in card, phrase


def test_model_card_tables_keep_their_columns_and_show_dicts_readably():
    """Every row of the card's tables has as many cells as its header, counted on the Markdown source (a GFM
    parser pads or drops cells, so it would hide a stray `|`); a Markdown parser (reference: markdown-it-py,
    CommonMark with its GFM table rule) reads each escaped `|` back as text; a dict value reads `key: value, ...`
    instead of a Python dict."""
    import re

    from markdown_it import MarkdownIt

    from coreach.runtime.model_card import model_card

    gate = {"onnx_parity": {"what": "max |onnxruntime - torch| (rad/s)", "value": 2e-6, "threshold": 1e-5,
                            "op": "<=", "passed": True, "detail": {"n": 10000, "worst joint": 3}},
            "latency_p99": 250.0}  # fmt: skip
    metrics = {"success | nominal": {"value": 0.9, "low": 0.8, "high": 0.96, "level": 0.95},
               "step time": {"p50": 120.0, "p99": 250.5}, "episodes": 200}  # fmt: skip
    card = model_card({}, gate, metrics)
    assert "{'" not in card and '{"' not in card

    # the source: a table is a run of lines starting with `|`; cells are split at unescaped `|`
    tables: list[list[int]] = []
    previous = ""
    for line in card.splitlines():
        if line.startswith("|"):
            if not previous.startswith("|"):
                tables.append([])
            tables[-1].append(len(re.split(r"(?<!\\)\|", line.strip())) - 2)
        previous = line
    assert tables == [[2] * (2 + len(metrics)), [5] * (2 + len(gate))], tables  # header, delimiter row, rows

    # the parsed cells: escaped `|` is text again, dicts read as key: value
    rows, cells = [], None
    for t in MarkdownIt("commonmark").enable("table").parse(card):
        if t.type == "tr_open":
            cells = []
            rows.append(cells)
        elif t.type == "inline" and cells is not None:
            cells.append(t.content)
        elif t.type == "tr_close":
            cells = None
    parsed = {r[0]: r[1:] for r in rows}
    assert parsed["step time"] == ["p50: 120, p99: 250.5"]
    assert parsed["success | nominal"] == ["0.9 (95% interval 0.8 to 0.96)"]
    assert parsed["onnx_parity"] == ["2e-06", "<= 1e-05", "pass",
                                     "max |onnxruntime - torch| (rad/s); n: 10000, worst joint: 3"]
    assert parsed["latency_p99"] == ["250", "", "", ""]


# ------------------------------------------------------------------------------------------ refusals
@pytest.mark.parametrize("name", ["decoder.onnx", "robot.urdf", "MODEL_CARD.md", "report.html"])
def test_changed_byte_is_refused(copy, name):
    data = bytearray((copy / name).read_bytes())
    data[len(data) // 2] ^= 0x01
    (copy / name).write_bytes(bytes(data))
    with pytest.raises(BundleError, match="sha256") as err:
        verify_bundle(copy)
    assert err.value.where.endswith(name)


def test_missing_file_is_refused(copy):
    (copy / "decoder.safetensors").unlink()
    with pytest.raises(BundleError, match="missing") as err:
        verify_bundle(copy)
    assert err.value.where.endswith("decoder.safetensors")


@pytest.mark.parametrize("extra", ["notes.txt", ".hidden", "sub/readme.md"])
def test_extra_file_is_refused(copy, extra):
    (copy / extra).parent.mkdir(exist_ok=True)
    (copy / extra).write_text("not part of the release")
    with pytest.raises(BundleError, match="not listed") as err:
        verify_bundle(copy)
    assert Path(extra).parts[0] in err.value.where


def test_extra_empty_folder_is_refused(copy):
    (copy / "stray").mkdir()
    with pytest.raises(BundleError, match="not listed"):
        verify_bundle(copy)


@pytest.mark.parametrize("bad, problem", [
    ("../outside.txt", "leaves the bundle"),
    ("/etc/hostname", "absolute"),
    ("C:/outside.txt", "absolute"),
    ("sub/../../outside.txt", "leaves the bundle"),
    ("./decoder.json", "canonical"),
    ("sub\\x.txt", "backslash"),
])
def test_path_escape_in_manifest_is_refused(copy, bad, problem):
    outside = copy.parent / "outside.txt"
    outside.write_text("outside")
    data = _manifest(copy)
    data["files"][bad] = hashlib.sha256(b"outside").hexdigest()
    _rewrite(copy, data)
    with pytest.raises(BundleError, match=problem):
        verify_bundle(copy)


def test_symlink_pointing_outside_is_refused(copy):
    outside = copy.parent / "elsewhere.html"
    shutil.copyfile(copy / "report.html", outside)  # same bytes, so only the location is wrong
    (copy / "report.html").unlink()
    (copy / "report.html").symlink_to(outside)
    with pytest.raises(BundleError, match="outside the bundle"):
        verify_bundle(copy)


# "1": a bundle from before the scene's bodies travelled in the manifest (safety.world), refused
@pytest.mark.parametrize("version", ["1", "3", 2, None, "2.0"])
def test_wrong_schema_version_is_refused(copy, version):
    data = _manifest(copy)
    if version is None:
        del data["schema_version"]
    else:
        data["schema_version"] = version
    _rewrite(copy, data)
    with pytest.raises(BundleError, match="schema_version") as err:
        verify_bundle(copy)
    assert err.value.where.endswith(MANIFEST)


def test_manifest_field_errors_name_the_field(copy):
    data = _manifest(copy)
    data["robot"]["qd_max"] = data["robot"]["qd_max"][:-1]
    _rewrite(copy, data)
    with pytest.raises(BundleError, match="robot.qd_max"):
        verify_bundle(copy)


def test_unreadable_manifest_is_refused(copy):
    (copy / MANIFEST).write_text("{not json")
    with pytest.raises(BundleError, match="JSON"):
        verify_bundle(copy)


# ------------------------------------------------------------------------------------------ writing
def test_existing_bundle_is_never_overwritten(bundle, policy):
    before = {p.name: p.stat().st_mtime_ns for p in bundle.iterdir()}
    with pytest.raises(BundleError, match="already exists"):
        write_bundle(bundle, policy, shipped_urdf(), release_meta(), {}, {})
    assert {p.name: p.stat().st_mtime_ns for p in bundle.iterdir()} == before


def test_bad_meta_leaves_nothing_behind(tmp_path, policy):
    meta = release_meta()
    del meta["safety"]["workspace_max"]
    with pytest.raises(ConfigError, match="workspace_max"):
        write_bundle(tmp_path / "b", policy, shipped_urdf(), meta, {}, {})
    assert list(tmp_path.iterdir()) == []


def test_wrong_goal_count_is_a_config_error(tmp_path, policy):
    meta = release_meta()
    meta["goal_names"] = meta["goal_names"][:3]
    with pytest.raises(CoreachError, match="goal_names"):
        write_bundle(tmp_path / "b", policy, shipped_urdf(), meta, {}, {})
    assert list(tmp_path.iterdir()) == []


# ------------------------------------------------------------------------------------ belief section
def test_belief_section_is_written_by_the_model_and_rebuilds_it(bundle):
    from coreach.runtime.belief_manifest import belief_from_manifest
    from coreach.control.belief_model import BoltzmannGoalBelief

    assert _manifest(bundle)["belief"] == {"model": "boltzmann", "beta": 40.0, "floor": 0.0, "min_motion": 1e-3}
    assert belief_from_manifest(verify_bundle(bundle).belief) == BoltzmannGoalBelief()


@pytest.mark.parametrize("section,problem", [
    ({"model": "pickle", "beta": 40.0}, "belief.model"),
    ({"model": "boltzmann", "beta": -1.0, "floor": 0.0, "min_motion": 1e-3}, "beta must be > 0"),
    ({"model": "boltzmann", "beta": 1.0, "_target_": "os.system"}, "belief._target_"),
])  # fmt: skip
def test_bad_belief_section_is_refused(copy, section, problem):
    data = _manifest(copy)
    data["belief"] = section
    _rewrite(copy, data)
    with pytest.raises(BundleError, match=problem):
        verify_bundle(copy)


def test_belief_from_manifest_builds_only_allowed_models():
    from coreach.errors import ConfigError
    from coreach.runtime.belief_manifest import belief_from_manifest

    with pytest.raises(ConfigError, match="unknown belief model 'custom'"):
        belief_from_manifest({"model": "custom"})
    with pytest.raises(ConfigError, match="unknown boltzmann belief parameters"):
        belief_from_manifest({"model": "boltzmann", "_target_": "os.system"})
    assert belief_from_manifest({"model": "boltzmann", "beta": 5.0}).beta == 5.0


def test_meta_with_an_unknown_belief_model_writes_nothing(tmp_path, policy):
    meta = {**release_meta(), "belief": {"model": "other", "beta": 3.0}}
    with pytest.raises(ConfigError, match="release meta.belief: unknown belief model 'other'"):
        write_bundle(tmp_path / "b", policy, shipped_urdf(), meta, {}, {})
    assert not (tmp_path / "b").exists()
