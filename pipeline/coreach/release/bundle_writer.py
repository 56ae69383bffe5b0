"""Writing a release bundle: manifest content from the policy and release metadata, ONNX export with its
parity check, model card, hashes; written to a temporary folder, verified, then renamed into place."""

from __future__ import annotations

import dataclasses
import datetime as _dt
import json
import math
import os
import shutil
import tempfile
from pathlib import Path
from typing import Any, Callable

import numpy as np

from coreach.errors import ConfigError
from coreach.release.export import export_onnx, onnx_parity
from coreach.runtime.belief_manifest import belief_from_manifest
from coreach.runtime.kinematics import Chain
from coreach.runtime.manifest import (CORE_FILES, DEFAULT_DEADBAND, DEFAULT_LOOKAHEAD_S, DEFAULT_WATCHDOG_S,
                                      MANIFEST, PARITY_TOLERANCE, SCHEMA_VERSION, BundleError, Manifest,
                                      onnx_interface)
from coreach.runtime.model_card import model_card
from coreach.runtime.verify import _check_name, sha256_file, verify_bundle
from coreach.safety import DEFAULT_TCP_SPEED_MAX
from coreach.world.urdf import robot_name as urdf_robot_name  # a local robot_name is the manifest's


def _plain(value: Any, where: str) -> Any:
    """JSON-safe copy: numpy scalars/arrays to lists, tuples to lists, non-finite floats to None."""
    if isinstance(value, dict):
        return {str(k): _plain(v, f"{where}.{k}") for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v, f"{where}[{i}]") for i, v in enumerate(value)]
    if isinstance(value, np.ndarray):
        return _plain(value.tolist(), where)
    if isinstance(value, np.generic):
        return _plain(value.item(), where)
    if hasattr(value, "tolist") and hasattr(value, "shape"):  # torch tensors, without importing torch
        return _plain(value.tolist(), where)
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if value is None or isinstance(value, (bool, int, str)):
        return value
    if isinstance(value, Path):
        return str(value)
    raise ConfigError(where, f"expected JSON data (numbers, strings, lists, mappings), got {type(value).__name__}")


def _vector(meta: dict, key: str, length: int, default: Any = ...) -> np.ndarray:
    node: Any = meta
    for part in key.split("."):
        node = node.get(part, ...) if isinstance(node, dict) else ...
    if node is ...:
        if default is ...:
            raise ConfigError(f"release meta.{key}", f"missing; expected {length} numbers")
        node = default
    try:
        out = [float(v) for v in node]
    except (TypeError, ValueError):
        raise ConfigError(f"release meta.{key}", f"expected {length} numbers, got {node!r}") from None
    if len(out) != length or not all(math.isfinite(v) for v in out):
        raise ConfigError(f"release meta.{key}", f"expected {length} finite numbers, got {node!r}")
    return np.array(out, dtype=np.float64)


def _matrix(meta: dict, key: str, rows: int, cols: int) -> np.ndarray:
    node = meta.get("nominal_layout", {}).get(key) if isinstance(meta.get("nominal_layout"), dict) else None
    arr = None
    try:
        arr = np.asarray(node, dtype=np.float64)
    except (TypeError, ValueError):
        pass
    if arr is None or arr.shape != (rows, cols) or not np.isfinite(arr).all():
        raise ConfigError(f"release meta.nominal_layout.{key}", f"expected {rows} rows of {cols} finite numbers")
    return arr


def _number(meta: dict, key: str, default: float, lo: float, hi: float = math.inf) -> float:
    """meta["a"]["b"] for key "a.b", or `default` when absent; must lie in [lo, hi]."""
    section, _, name = key.rpartition(".")
    node = (meta.get(section) if section else meta) or {}
    if not isinstance(node, dict):
        raise ConfigError(f"release meta.{section}", f"expected a mapping, got {type(node).__name__}")
    v = node.get(name, default)
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or not lo <= v <= hi:
        raise ConfigError(f"release meta.{key}", f"expected a finite number in [{lo}, {hi}], got {v!r}")
    return float(v)


def _text(meta: dict, key: str) -> str:
    v = meta.get(key)
    if not isinstance(v, str) or not v:
        raise ConfigError(f"release meta.{key}", "missing; expected a non-empty string")
    return v


def _belief_section(meta: dict) -> dict:
    """The belief model's own manifest section (`to_manifest()`), rebuilt through the allow-list to check it.

    meta.belief is what the model wrote ({"model": name, **parameters}); metadata without a model name is read
    as the Boltzmann model (the only one before models named themselves), missing parameters take the model's
    defaults.
    """
    section = meta.get("belief") or {}
    if not isinstance(section, dict):
        raise ConfigError("release meta.belief", f"expected a mapping, got {type(section).__name__}")
    section = {"model": "boltzmann", **section}
    try:
        model = belief_from_manifest(section)
    except ConfigError as exc:
        raise ConfigError("release meta.belief", exc.problem) from None
    return _plain(model.to_manifest(), "release meta.belief")


def build_manifest(policy, chain, robot_name: str, meta: dict, gate: dict, parity: dict,
                   folder: str | Path = ".") -> Manifest:
    """The manifest of a bundle in `folder` for `policy` on `chain` (coreach.runtime.kinematics.Chain).

    meta (required): goal_names, nominal_layout {goal_pos [G,3], goal_quat [G,4] (w,x,y,z), goal_fine
    [G,3]}, dataset_fingerprint, training_run_id, git_commit, safety.workspace_min/max [3] (m, base frame).
    meta (optional): tool_link, q_home, belief {beta, floor, min_motion}, safety {tcp_speed_max,
    watchdog_timeout_s, lookahead_s, speed_fraction}, stick {deadband}, tolerances {...}, world (the manifest's
    safety.world section, coreach.world.scene_bodies.world_json; {} without bodies).
    Bad metadata is a one-line ConfigError naming `release meta.<key>`; `files` stays empty for write_bundle.
    """
    spec = policy.spec
    n, g, d = policy.action_dim, spec.n_goals, policy.latent_dim
    goal_names = meta.get("goal_names")
    if (not isinstance(goal_names, (list, tuple)) or len(goal_names) != g
            or not all(isinstance(s, str) for s in goal_names)):
        raise ConfigError("release meta.goal_names", f"expected {g} goal names (the decoder's n_goals)")
    if chain.dof != n or spec.dof != n:
        raise ConfigError("release robot.urdf", f"the chain has {chain.dof} joints, the decoder drives {n} "
                                                f"(context dof {spec.dof}); expected the same arm")
    fraction = _number(meta, "safety.speed_fraction", 1.0, 1e-6, 1.0)
    home_default = np.where(np.isfinite(chain.q_lower + chain.q_upper), (chain.q_lower + chain.q_upper) / 2, 0.0)
    buffers = {k: v.detach().cpu().double().numpy() for k, v in policy.state_dict().items()
               if k in ("context_cols", "ctx_mean", "ctx_std", "act_mean", "act_std", "stick_scale")}
    return Manifest(
        folder=Path(folder),
        schema_version=SCHEMA_VERSION,
        created=_dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        latent_dim=d,
        context_dim=spec.width,
        action_dim=n,
        n_goals=g,
        context_blocks=tuple(policy.decoder.context_blocks),
        onnx=onnx_interface(d, spec.width, n),
        joint_names=tuple(chain.joint_names),
        goal_names=tuple(goal_names),
        goal_pos=_matrix(meta, "goal_pos", g, 3),
        goal_quat=_matrix(meta, "goal_quat", g, 4),
        goal_fine=_matrix(meta, "goal_fine", g, 3),
        normalisation=buffers,
        stick_low=-1.0,
        stick_high=1.0,
        deadband=_number(meta, "stick.deadband", DEFAULT_DEADBAND, 0.0, 0.5),
        belief=_belief_section(meta),
        robot_name=robot_name,
        urdf="robot.urdf",
        tool_link=chain.tool_link,
        q_lower=np.asarray(chain.q_lower, dtype=np.float64),
        q_upper=np.asarray(chain.q_upper, dtype=np.float64),
        qd_max=np.asarray(chain.qd_max, dtype=np.float64) * fraction,
        q_home=_vector(meta, "q_home", n, home_default.tolist()),
        tcp_speed_max=_number(meta, "safety.tcp_speed_max", DEFAULT_TCP_SPEED_MAX, 1e-6),
        workspace_min=_vector(meta, "safety.workspace_min", 3),
        workspace_max=_vector(meta, "safety.workspace_max", 3),
        watchdog_timeout_s=_number(meta, "safety.watchdog_timeout_s", DEFAULT_WATCHDOG_S, 1e-4, 10.0),
        lookahead_s=_number(meta, "safety.lookahead_s", DEFAULT_LOOKAHEAD_S, 1e-4, 10.0),
        speed_fraction=fraction,
        world=_plain(meta.get("world") or {}, "release meta.world"),
        tolerances={"onnx_parity_max_abs_diff": PARITY_TOLERANCE,
                    **_plain(meta.get("tolerances") or {}, "release meta.tolerances")},
        gate=_plain(gate or {}, "release gate"),
        dataset_fingerprint=_text(meta, "dataset_fingerprint"),
        training_run_id=_text(meta, "training_run_id"),
        git_commit=_text(meta, "git_commit"),
        onnx_parity=dict(parity),
        files={},  # filled by write_bundle once every other file is written
    )


def write_bundle(out_dir: str | Path, policy, robot_urdf_path: str | Path, meta: dict,
                 extra_files: dict[str, str | Path] | None = None, gate: dict | None = None,
                 staging_prefix: str | None = None, before_rename: Callable[[], None] | None = None) -> Path:
    """Write a complete bundle for `policy` (a coreach.decoder.policy.DecoderPolicy) to the new folder `out_dir`.

    Everything is written into a temporary sibling folder, verified, and renamed into place only when
    complete; an existing `out_dir` is never overwritten. The ONNX export must match torch within
    PARITY_TOLERANCE on meta.get("parity_n", 10_000) samples, or nothing is written. `extra_files` maps bundle
    names (e.g. "report.html") to source files. See `build_manifest` for the keys of `meta`; meta["metrics"]
    (optional) goes into the model card. `staging_prefix` names the temporary folder (a publish puts its run id
    there, so a clean-up after a crash can tell whose it is); `before_rename` runs when the staged bundle is
    complete and verified.
    """
    out_dir = Path(out_dir)
    if out_dir.exists() or out_dir.is_symlink():
        raise BundleError(str(out_dir), "already exists; bundles are never overwritten, choose a new folder")
    src_urdf = Path(robot_urdf_path)
    if not src_urdf.is_file():
        raise ConfigError(str(src_urdf), "robot URDF not found")
    urdf_text = src_urdf.read_text(encoding="utf-8")
    chain = Chain.from_string(urdf_text, str(meta.get("tool_link", "tool")), str(src_urdf))
    robot_name = str(meta.get("robot_name") or _urdf_robot_name(urdf_text) or "robot")
    extra_files = dict(extra_files or {})
    for name, src in extra_files.items():
        if name in CORE_FILES or name == MANIFEST:
            raise ConfigError(f"release extra_files[{name!r}]", f"name is reserved for the bundle's own {name}")
        _check_name(out_dir, name, f"release extra_files[{name!r}]")
        if not Path(src).is_file():
            raise ConfigError(f"release extra_files[{name!r}]", f"source file {src} not found")

    # check the metadata before the (slower) export, so a mistake costs nothing
    manifest = build_manifest(policy, chain, robot_name, meta, gate or {}, {}, out_dir)
    n_parity = meta.get("parity_n", 10_000)
    if isinstance(n_parity, bool) or not isinstance(n_parity, int) or n_parity < 1:
        raise ConfigError("release meta.parity_n", f"expected a positive integer, got {n_parity!r}")

    out_dir.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=staging_prefix or f".{out_dir.name}.", suffix=".partial", dir=out_dir.parent))
    try:
        policy.save(tmp)  # decoder.safetensors + decoder.json
        onnx_path = export_onnx(policy, tmp / "decoder.onnx")
        diff = onnx_parity(policy, onnx_path, n=n_parity, seed=0)
        if not diff <= PARITY_TOLERANCE:
            raise BundleError(str(onnx_path), f"onnxruntime differs from torch by {diff:.3g} rad/s on {n_parity} "
                                              f"samples; expected <= {PARITY_TOLERANCE}")
        (tmp / "robot.urdf").write_text(urdf_text, encoding="utf-8")
        for name, src in extra_files.items():
            (tmp / name).parent.mkdir(parents=True, exist_ok=True)
            shutil.copyfile(src, tmp / name)
        manifest = dataclasses.replace(manifest, onnx_parity={"n": n_parity, "max_abs_diff": diff})
        card_meta = {**meta, "robot_name": robot_name, "safety": manifest.to_json()["safety"]}
        (tmp / "MODEL_CARD.md").write_text(model_card(card_meta, manifest.gate, meta.get("metrics") or {}),
                                           encoding="utf-8")
        manifest = dataclasses.replace(manifest, files={name: sha256_file(tmp / name)
                                                        for name in [*CORE_FILES, *extra_files]})
        text = json.dumps(manifest.to_json(), indent=2, allow_nan=False)
        (tmp / MANIFEST).write_text(text + "\n", encoding="utf-8")
        verify_bundle(tmp)
        os.chmod(tmp, 0o755)  # mkdtemp makes the folder private; a release is meant to be read
        if before_rename is not None:
            before_rename()
        if out_dir.exists():  # appeared while we were writing
            raise BundleError(str(out_dir), "appeared while the bundle was being written; not overwritten")
        os.rename(tmp, out_dir)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return out_dir


def _urdf_robot_name(text: str) -> str | None:
    return urdf_robot_name(text)  # the one URDF reader; the text was already parsed by Chain
