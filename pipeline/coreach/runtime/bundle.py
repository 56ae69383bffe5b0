"""Release bundles: one folder with the decoder (ONNX + safetensors), robot, manifest and model card.

`verify_bundle` needs only numpy, json and hashlib, so the robot computer can check a bundle before use;
`write_bundle` imports the torch side (`coreach.runtime.export`) only when called.

Layout (schema "1"): decoder.onnx, decoder.safetensors, decoder.json, robot.urdf, MODEL_CARD.md, optional
extra files (e.g. report.html), and manifest.json, which lists the sha256 of every other file.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import math
import os
import shutil
import tempfile
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath, PureWindowsPath
from typing import Any

import numpy as np

from coreach.errors import ConfigError, CoreachError

SCHEMA_VERSION = "1"
MANIFEST = "manifest.json"
CORE_FILES = ("decoder.onnx", "decoder.safetensors", "decoder.json", "robot.urdf", "MODEL_CARD.md")
# Common practice for joystick deadbands is 5-10 % of full deflection.
DEFAULT_DEADBAND = 0.08
DEFAULT_WATCHDOG_S = 0.2
DEFAULT_LOOKAHEAD_S = 0.1
PARITY_TOLERANCE = 1e-5  # rad/s, largest |torch - onnxruntime| accepted on the parity sample


class BundleError(CoreachError):
    """A bundle that must not be used (or written): `where` names the file, `problem` what is wrong."""


@dataclass(frozen=True)
class Manifest:
    """The checked contents of manifest.json; arrays are float64 numpy, infinite limits as +-inf."""

    folder: Path
    schema_version: str
    created: str
    latent_dim: int
    context_dim: int  # C: width of the full raw context the ONNX graph takes
    action_dim: int
    n_goals: int
    context_blocks: tuple[str, ...]
    joint_names: tuple[str, ...]
    goal_names: tuple[str, ...]
    goal_pos: np.ndarray  # [G, 3] nominal layout
    goal_quat: np.ndarray  # [G, 4] (w, x, y, z)
    goal_fine: np.ndarray  # [G, 3]
    normalisation: dict[str, np.ndarray]
    stick_low: float
    stick_high: float
    deadband: float
    belief: dict[str, float]
    robot_name: str
    tool_link: str
    q_lower: np.ndarray
    q_upper: np.ndarray
    qd_max: np.ndarray
    q_home: np.ndarray
    tcp_speed_max: float
    workspace_min: np.ndarray
    workspace_max: np.ndarray
    watchdog_timeout_s: float
    lookahead_s: float
    tolerances: dict[str, Any]
    gate: dict[str, Any]
    dataset_fingerprint: str
    training_run_id: str
    git_commit: str
    onnx_parity: dict[str, Any]
    files: dict[str, str]
    raw: dict[str, Any] = field(repr=False, default_factory=dict)

    def path(self, name: str) -> Path:
        return self.folder / name


# ----------------------------------------------------------------------------------------------- checks
def sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def sha256_bytes(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _check_name(folder: Path, name: Any, where: str) -> Path:
    """A listed file name must be a canonical relative POSIX path that stays inside the folder."""
    if not isinstance(name, str) or not name:
        raise BundleError(where, f"file entry {name!r} is not a non-empty relative path")
    if "\\" in name or "\x00" in name:
        raise BundleError(where, f"file entry {name!r} contains a backslash or NUL; expected a POSIX path")
    posix, win = PurePosixPath(name), PureWindowsPath(name)
    if posix.is_absolute() or win.is_absolute() or win.drive:
        raise BundleError(where, f"file entry {name!r} is an absolute path; expected a path inside the bundle")
    if ".." in posix.parts:
        raise BundleError(where, f"file entry {name!r} leaves the bundle folder ('..')")
    if posix.as_posix() != name or "." in posix.parts:
        raise BundleError(where, f"file entry {name!r} is not in canonical form (e.g. {posix.as_posix()!r})")
    if name == MANIFEST:
        raise BundleError(where, f"file entry {name!r}: the manifest cannot list itself")
    full = folder / name
    root = os.path.realpath(folder)
    real = os.path.realpath(full)
    if os.path.commonpath([root, real]) != root:
        raise BundleError(str(full), f"resolves to {real}, outside the bundle folder (symlink?)")
    return full


def _unlisted(folder: Path, listed: set[str]) -> list[str]:
    """Files, links and folders under `folder` that the manifest does not account for."""
    parents = {p.as_posix() for name in listed for p in PurePosixPath(name).parents if p.as_posix() != "."}
    extra = []
    for dirpath, dirnames, filenames in os.walk(folder):
        rel_dir = Path(dirpath).relative_to(folder)
        for d in dirnames:
            rel = (rel_dir / d).as_posix()
            if rel not in parents:
                extra.append(rel + "/")
        for f in filenames:
            rel = (rel_dir / f).as_posix()
            if rel not in listed and rel != MANIFEST:
                extra.append(rel)
    return sorted(extra)


# ------------------------------------------------------------------------------------ manifest parsing
class _Fields:
    """Typed access to manifest fields; every failure names the field."""

    def __init__(self, where: str, data: dict):
        self.where, self.data = where, data

    def get(self, dotted: str, default: Any = ...) -> Any:
        node: Any = self.data
        for part in dotted.split("."):
            if not isinstance(node, dict) or part not in node:
                if default is not ...:
                    return default
                raise BundleError(self.where, f"field {dotted!r} is missing")
            node = node[part]
        return node

    def fail(self, dotted: str, expected: str, got: Any) -> BundleError:
        text = repr(got)
        return BundleError(self.where, f"field {dotted!r}: expected {expected}, got {text[:80]}")

    def string(self, dotted: str) -> str:
        v = self.get(dotted)
        if not isinstance(v, str):
            raise self.fail(dotted, "a string", v)
        return v

    def integer(self, dotted: str, minimum: int = 0) -> int:
        v = self.get(dotted)
        if not isinstance(v, int) or isinstance(v, bool) or v < minimum:
            raise self.fail(dotted, f"an integer >= {minimum}", v)
        return v

    def number(self, dotted: str, lo: float = -math.inf, hi: float = math.inf, strict_lo: bool = False) -> float:
        v = self.get(dotted)
        ok = isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)
        if not ok or v > hi or v < lo or (strict_lo and v <= lo):
            raise self.fail(dotted, f"a finite number in {'(' if strict_lo else '['}{lo}, {hi}]", v)
        return float(v)

    def strings(self, dotted: str, length: int | None = None) -> tuple[str, ...]:
        v = self.get(dotted)
        wrong_length = length is not None and isinstance(v, list) and len(v) != length
        if not isinstance(v, list) or not all(isinstance(s, str) for s in v) or wrong_length:
            raise self.fail(dotted, "a list of strings" if length is None else f"a list of {length} strings", v)
        return tuple(v)

    def array(self, dotted: str, shape: tuple[int, ...], allow_inf: bool = False) -> np.ndarray:
        """Numbers of the given shape; `null` means +-inf where allowed (infinite joint limits)."""
        v = self.get(dotted)

        def conv(x):
            if isinstance(x, list):
                return [conv(y) for y in x]
            if x is None and allow_inf:
                return math.nan  # placeholder, replaced by the caller's sign
            if isinstance(x, (int, float)) and not isinstance(x, bool):
                return float(x)
            raise self.fail(dotted, f"numbers of shape {list(shape)}", v)

        try:
            arr = np.array(conv(v), dtype=np.float64)
        except ValueError:
            raise self.fail(dotted, f"numbers of shape {list(shape)}", v) from None
        if arr.shape != shape:
            raise self.fail(dotted, f"numbers of shape {list(shape)}", v)
        if not allow_inf and not np.isfinite(arr).all():
            raise self.fail(dotted, "finite numbers", v)
        return arr


def _parse_manifest(folder: Path, data: dict) -> Manifest:
    f = _Fields(str(folder / MANIFEST), data)
    latent = f.integer("decoder.latent_dim", 1)
    width = f.integer("decoder.context_dim", 1)
    n = f.integer("decoder.action_dim", 1)
    g = f.integer("decoder.n_goals", 1)
    blocks = f.strings("decoder.context_blocks")
    joints = f.strings("joint_names", n)
    goals = f.strings("goal_names", g)
    n_cols = len(f.get("normalisation.context_cols")) if isinstance(f.get("normalisation.context_cols"), list) else -1
    norm = {
        "context_cols": f.array("normalisation.context_cols", (n_cols,)),
        "ctx_mean": f.array("normalisation.ctx_mean", (n_cols,)),
        "ctx_std": f.array("normalisation.ctx_std", (n_cols,)),
        "act_mean": f.array("normalisation.act_mean", (n,)),
        "act_std": f.array("normalisation.act_std", (n,)),
        "stick_scale": f.array("normalisation.stick_scale", (latent,)),
    }
    cols = norm["context_cols"]
    if cols.size and (cols.min() < 0 or cols.max() >= width or np.any(cols != np.round(cols))):
        raise f.fail("normalisation.context_cols", f"integer column indices in [0, {width})", cols.tolist())
    lower = f.array("robot.q_lower", (n,), allow_inf=True)
    upper = f.array("robot.q_upper", (n,), allow_inf=True)
    lower = np.where(np.isnan(lower), -np.inf, lower)
    upper = np.where(np.isnan(upper), np.inf, upper)
    if not np.all(lower < upper):
        raise f.fail("robot.q_lower", "values below robot.q_upper", lower.tolist())
    qd_max = f.array("robot.qd_max", (n,))
    if not np.all(qd_max > 0):
        raise f.fail("robot.qd_max", "positive joint speed limits (rad/s)", qd_max.tolist())
    ws_min = f.array("safety.workspace_min", (3,))
    ws_max = f.array("safety.workspace_max", (3,))
    if not np.all(ws_min < ws_max):
        raise f.fail("safety.workspace_min", "a box corner below safety.workspace_max on every axis", ws_min.tolist())
    stick_low = f.number("stick.box_low")
    stick_high = f.number("stick.box_high")
    if (stick_low, stick_high) != (-1.0, 1.0):  # decoders are trained on this box (DecoderPolicy.stick_scale)
        raise f.fail("stick.box_low/box_high", "-1 and 1 (schema 1 fixes the stick box to [-1, 1]^d)",
                     [stick_low, stick_high])
    parity = f.get("onnx_parity")
    if not isinstance(parity, dict):
        raise f.fail("onnx_parity", "a mapping {n, max_abs_diff}", parity)
    f.integer("onnx_parity.n", 1)
    f.number("onnx_parity.max_abs_diff", 0.0)
    for key in ("tolerances", "gate"):
        if not isinstance(f.get(key), dict):
            raise f.fail(key, "a mapping", f.get(key))
    return Manifest(
        folder=folder,
        schema_version=f.string("schema_version"),
        created=f.string("created"),
        latent_dim=latent,
        context_dim=width,
        action_dim=n,
        n_goals=g,
        context_blocks=blocks,
        joint_names=joints,
        goal_names=goals,
        goal_pos=f.array("nominal_layout.goal_pos", (g, 3)),
        goal_quat=f.array("nominal_layout.goal_quat", (g, 4)),
        goal_fine=f.array("nominal_layout.goal_fine", (g, 3)),
        normalisation=norm,
        stick_low=stick_low,
        stick_high=stick_high,
        deadband=f.number("stick.deadband", 0.0, 0.5),
        belief={
            "beta": f.number("belief.beta", 0.0, strict_lo=True),
            "floor": f.number("belief.floor", 0.0, 0.999999),
            "min_motion": f.number("belief.min_motion", 0.0),
        },
        robot_name=f.string("robot.name"),
        tool_link=f.string("robot.tool_link"),
        q_lower=lower,
        q_upper=upper,
        qd_max=qd_max,
        q_home=f.array("robot.q_home", (n,)),
        tcp_speed_max=f.number("safety.tcp_speed_max", 0.0, strict_lo=True),
        workspace_min=ws_min,
        workspace_max=ws_max,
        watchdog_timeout_s=f.number("safety.watchdog_timeout_s", 0.0, strict_lo=True),
        lookahead_s=f.number("safety.lookahead_s", 0.0, strict_lo=True),
        tolerances=dict(f.get("tolerances")),
        gate=dict(f.get("gate")),
        dataset_fingerprint=f.string("dataset_fingerprint"),
        training_run_id=f.string("training_run_id"),
        git_commit=f.string("git_commit"),
        onnx_parity=dict(parity),
        files=dict(f.get("files")),
        raw=data,
    )


def verify_bundle(folder: str | Path) -> Manifest:
    """Check a bundle completely before use: schema version, every listed file present, inside the folder
    and matching its sha256, no unlisted file, and a well-formed manifest. Raises BundleError otherwise."""
    folder = Path(folder)
    if not folder.is_dir():
        raise BundleError(str(folder), "not a folder; expected a release bundle folder")
    mpath = folder / MANIFEST
    if not mpath.is_file():
        raise BundleError(str(mpath), "missing; every bundle has a manifest.json")
    try:
        data = json.loads(mpath.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise BundleError(str(mpath), f"not readable JSON ({exc})") from None
    if not isinstance(data, dict):
        raise BundleError(str(mpath), f"expected a JSON object, got {type(data).__name__}")
    version = data.get("schema_version")
    if version != SCHEMA_VERSION:
        shown = "missing" if version is None else repr(version)
        raise BundleError(str(mpath), f"schema_version {shown}; this runtime reads schema {SCHEMA_VERSION!r}")
    files = data.get("files")
    if not isinstance(files, dict) or not files:
        raise BundleError(str(mpath), "field 'files' must map every bundle file to its sha256")
    for name in CORE_FILES:
        if name not in files:
            raise BundleError(str(mpath), f"field 'files' does not list {name!r}; a bundle needs {list(CORE_FILES)}")
    paths = {name: _check_name(folder, name, str(mpath)) for name in files}
    for name, full in paths.items():
        digest = files[name]
        if not isinstance(digest, str) or len(digest) != 64 or any(c not in "0123456789abcdef" for c in digest):
            raise BundleError(str(mpath), f"files[{name!r}] must be a lowercase hex sha256, got {digest!r}")
        if not full.is_file():
            raise BundleError(str(full), "listed in the manifest but missing (or not a regular file)")
    extra = _unlisted(folder, set(files))
    if extra:
        raise BundleError(str(folder / extra[0]), f"not listed in {MANIFEST}; a bundle holds only listed files "
                                                   f"({len(extra)} unlisted: {', '.join(extra[:5])})")
    for name, full in paths.items():
        actual = sha256_file(full)
        if actual != files[name]:
            raise BundleError(str(full), f"sha256 {actual[:16]}... differs from the manifest's "
                                         f"{files[name][:16]}...; the file was changed after release")
    return _parse_manifest(folder, data)


# ----------------------------------------------------------------------------------------------- writing
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


def _vector(meta: dict, key: str, length: int, default: Any = ...) -> list[float]:
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
    return out


def _matrix(meta: dict, key: str, rows: int, cols: int) -> list[list[float]]:
    node = meta.get("nominal_layout", {}).get(key) if isinstance(meta.get("nominal_layout"), dict) else None
    arr = None
    try:
        arr = np.asarray(node, dtype=np.float64)
    except (TypeError, ValueError):
        pass
    if arr is None or arr.shape != (rows, cols) or not np.isfinite(arr).all():
        raise ConfigError(f"release meta.nominal_layout.{key}", f"expected {rows} rows of {cols} finite numbers")
    return arr.tolist()


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


def _limits(values: np.ndarray) -> list[float | None]:
    return [float(v) if math.isfinite(v) else None for v in values]


def build_manifest(policy, chain, robot_name: str, meta: dict, gate: dict, parity: dict) -> dict:
    """The manifest.json content for `policy` on `chain` (coreach.runtime.kinematics.Chain).

    meta (required): goal_names, nominal_layout {goal_pos [G,3], goal_quat [G,4] (w,x,y,z), goal_fine
    [G,3]}, dataset_fingerprint, training_run_id, git_commit, safety.workspace_min/max [3] (m, base frame).
    meta (optional): tool_link, q_home, belief {beta, floor, min_motion}, safety {tcp_speed_max,
    watchdog_timeout_s, lookahead_s, speed_fraction}, stick {deadband}, tolerances {...}.
    """
    # defaults for what the metadata leaves out; imported here so verify_bundle needs no more than numpy
    from coreach_plugins.belief.boltzmann import BoltzmannGoalBelief
    from coreach.safety import DEFAULT_TCP_SPEED_MAX

    belief_defaults = BoltzmannGoalBelief()
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
    q_home = _vector(meta, "q_home", n, home_default.tolist())
    buf = {k: v.detach().cpu().double().numpy() for k, v in policy.state_dict().items()
           if k in ("context_cols", "ctx_mean", "ctx_std", "act_mean", "act_std", "stick_scale")}
    return {
        "schema_version": SCHEMA_VERSION,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "decoder": {
            "latent_dim": d,
            "context_dim": spec.width,
            "action_dim": n,
            "n_goals": g,
            "context_blocks": list(policy.decoder.context_blocks),
            "onnx": {"file": "decoder.onnx", "inputs": {"stick": ["batch", d], "context": ["batch", spec.width]},
                     "outputs": {"qd": ["batch", n]}, "dtype": "float32"},
        },
        "joint_names": list(chain.joint_names),
        "goal_names": list(goal_names),
        "nominal_layout": {
            "goal_pos": _matrix(meta, "goal_pos", g, 3),
            "goal_quat": _matrix(meta, "goal_quat", g, 4),
            "goal_fine": _matrix(meta, "goal_fine", g, 3),
        },
        "normalisation": {k: buf[k].tolist() for k in ("context_cols", "ctx_mean", "ctx_std", "act_mean",
                                                       "act_std", "stick_scale")},
        "stick": {"box_low": -1.0, "box_high": 1.0,
                  "deadband": _number(meta, "stick.deadband", DEFAULT_DEADBAND, 0.0, 0.5)},
        "belief": {
            "model": "boltzmann",
            "beta": _number(meta, "belief.beta", belief_defaults.beta, 1e-12),
            "floor": _number(meta, "belief.floor", belief_defaults.floor, 0.0, 0.999999),
            "min_motion": _number(meta, "belief.min_motion", belief_defaults.min_motion, 0.0),
        },
        "robot": {
            "name": robot_name,
            "urdf": "robot.urdf",
            "tool_link": chain.tool_link,
            "q_lower": _limits(chain.q_lower),
            "q_upper": _limits(chain.q_upper),
            "qd_max": (chain.qd_max * fraction).tolist(),
            "q_home": q_home,
        },
        "safety": {
            "tcp_speed_max": _number(meta, "safety.tcp_speed_max", DEFAULT_TCP_SPEED_MAX, 1e-6),
            "workspace_min": _vector(meta, "safety.workspace_min", 3),
            "workspace_max": _vector(meta, "safety.workspace_max", 3),
            "watchdog_timeout_s": _number(meta, "safety.watchdog_timeout_s", DEFAULT_WATCHDOG_S, 1e-4, 10.0),
            "lookahead_s": _number(meta, "safety.lookahead_s", DEFAULT_LOOKAHEAD_S, 1e-4, 10.0),
            "speed_fraction": fraction,
        },
        "tolerances": {"onnx_parity_max_abs_diff": PARITY_TOLERANCE,
                       **_plain(meta.get("tolerances") or {}, "release meta.tolerances")},
        "gate": _plain(gate or {}, "release gate"),
        "dataset_fingerprint": _text(meta, "dataset_fingerprint"),
        "training_run_id": _text(meta, "training_run_id"),
        "git_commit": _text(meta, "git_commit"),
        "onnx_parity": parity,
        "files": {},  # filled by write_bundle once every other file is written
    }


def write_bundle(out_dir: str | Path, policy, robot_urdf_path: str | Path, meta: dict,
                 extra_files: dict[str, str | Path] | None = None, gate: dict | None = None) -> Path:
    """Write a complete bundle for `policy` (a coreach.policy.DecoderPolicy) to the new folder `out_dir`.

    Everything is written into a temporary sibling folder, verified, and renamed into place only when
    complete; an existing `out_dir` is never overwritten. The ONNX export must match torch within
    PARITY_TOLERANCE on meta.get("parity_n", 10_000) samples, or nothing is written. `extra_files` maps bundle
    names (e.g. "report.html") to source files. See `build_manifest` for the keys of `meta`; meta["metrics"]
    (optional) goes into the model card.
    """
    from coreach.runtime.export import export_onnx, onnx_parity  # torch side, only when writing
    from coreach.runtime.kinematics import Chain
    from coreach.runtime.model_card import model_card

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
    manifest = build_manifest(policy, chain, robot_name, meta, gate or {}, {})
    n_parity = meta.get("parity_n", 10_000)
    if isinstance(n_parity, bool) or not isinstance(n_parity, int) or n_parity < 1:
        raise ConfigError("release meta.parity_n", f"expected a positive integer, got {n_parity!r}")

    out_dir.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.", suffix=".partial", dir=out_dir.parent))
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
        manifest["onnx_parity"] = {"n": n_parity, "max_abs_diff": diff}
        card_meta = {**meta, "robot_name": robot_name, "safety": manifest["safety"]}
        (tmp / "MODEL_CARD.md").write_text(model_card(card_meta, manifest["gate"], meta.get("metrics") or {}),
                                           encoding="utf-8")
        manifest["files"] = {name: sha256_file(tmp / name) for name in [*CORE_FILES, *extra_files]}
        text = json.dumps(manifest, indent=2, allow_nan=False)
        (tmp / MANIFEST).write_text(text + "\n", encoding="utf-8")
        verify_bundle(tmp)
        os.chmod(tmp, 0o755)  # mkdtemp makes the folder private; a release is meant to be read
        if out_dir.exists():  # appeared while we were writing
            raise BundleError(str(out_dir), "appeared while the bundle was being written; not overwritten")
        os.rename(tmp, out_dir)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return out_dir


def _urdf_robot_name(text: str) -> str | None:
    from coreach.urdf import robot_name  # the one URDF reader; the text was already parsed by Chain

    return robot_name(text)
