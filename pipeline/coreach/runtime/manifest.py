"""The release manifest (manifest.json): its constants and its schema, written once as the `Manifest` dataclass.

Each field of `Manifest` declares its place in the JSON and its check; `from_json` and `to_json` follow those
declarations, then a short list of checks across fields. Needs only numpy, so the robot computer can read a
bundle. The writer is `coreach.release.bundle_writer`, verification of the folder (hashes, listing)
`coreach.runtime.verify`.
"""

from __future__ import annotations

import copy
import math
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

import numpy as np

from coreach.errors import ConfigError, CoreachError
from coreach.runtime.belief_manifest import BELIEF_MODELS, belief_from_manifest
from coreach.world.scene_bodies import world_from_json

# 2: the manifest carries the scene's bodies (safety.world); a runtime that reads schema 1 would run such a
# bundle without its separation step, so it must refuse it, and this one refuses schema 1 bundles (no world)
SCHEMA_VERSION = "2"
MANIFEST = "manifest.json"
CORE_FILES = ("decoder.onnx", "decoder.safetensors", "decoder.json", "robot.urdf", "MODEL_CARD.md")
# Common practice for joystick deadbands is 5-10 % of full deflection.
DEFAULT_DEADBAND = 0.08
DEFAULT_WATCHDOG_S = 0.2
DEFAULT_LOOKAHEAD_S = 0.1
PARITY_TOLERANCE = 1e-5  # rad/s, largest |torch - onnxruntime| accepted on the parity sample


class BundleError(CoreachError):
    """A bundle that must not be used (or written): `where` names the file, `problem` what is wrong."""


class _Bad(Exception):
    """One malformed field (the message names it); `Manifest.from_json` raises it as a BundleError."""


def _bad(path: str, expected: str, got: Any) -> _Bad:
    return _Bad(f"field {path!r}: expected {expected}, got {repr(got)[:80]}")


def _at(json: str, check: str, **options: Any) -> Any:
    """Declares a manifest field: its dotted place in the JSON, its check (a key of _READ) and the check's options.

    A length in `length`/`shape` is a number or the name of an integer field declared earlier; any other name is
    bound by the first array that uses it (all arrays naming it must then agree)."""
    return field(metadata={"json": json, "check": check, **options})


@dataclass(frozen=True, eq=False)
class Manifest:
    """The checked contents of manifest.json; arrays are float64 numpy, infinite limits as +-inf.

    Fields are declared in the order they appear in the JSON, which `to_json` keeps.
    """

    folder: Path
    schema_version: str = _at("schema_version", "string")
    created: str = _at("created", "string")
    latent_dim: int = _at("decoder.latent_dim", "integer", min=1)
    context_dim: int = _at("decoder.context_dim", "integer", min=1)  # C: width of the raw context the ONNX graph takes
    action_dim: int = _at("decoder.action_dim", "integer", min=1)
    n_goals: int = _at("decoder.n_goals", "integer", min=1)
    context_blocks: tuple[str, ...] = _at("decoder.context_blocks", "strings")
    onnx: dict[str, Any] = _at("decoder.onnx", "mapping")  # always onnx_interface(d, C, n)
    joint_names: tuple[str, ...] = _at("joint_names", "strings", length="action_dim")
    goal_names: tuple[str, ...] = _at("goal_names", "strings", length="n_goals")
    goal_pos: np.ndarray = _at("nominal_layout.goal_pos", "array", shape=("n_goals", 3))  # [G, 3] nominal layout
    goal_quat: np.ndarray = _at("nominal_layout.goal_quat", "array", shape=("n_goals", 4))  # [G, 4] (w, x, y, z)
    goal_fine: np.ndarray = _at("nominal_layout.goal_fine", "array", shape=("n_goals", 3))  # [G, 3]
    normalisation: dict[str, np.ndarray] = _at("normalisation", "arrays", shapes={
        "context_cols": ("cols",), "ctx_mean": ("cols",), "ctx_std": ("cols",),
        "act_mean": ("action_dim",), "act_std": ("action_dim",), "stick_scale": ("latent_dim",)})
    stick_low: float = _at("stick.box_low", "number")
    stick_high: float = _at("stick.box_high", "number")
    deadband: float = _at("stick.deadband", "number", lo=0.0, hi=0.5)
    belief: dict[str, Any] = _at("belief", "mapping")  # {"model": name, **parameters}: belief_from_manifest
    robot_name: str = _at("robot.name", "string")
    urdf: str = _at("robot.urdf", "string")
    tool_link: str = _at("robot.tool_link", "string")
    # JSON has no infinity: an unlimited joint is written as null
    q_lower: np.ndarray = _at("robot.q_lower", "array", shape=("action_dim",), null=-math.inf)
    q_upper: np.ndarray = _at("robot.q_upper", "array", shape=("action_dim",), null=math.inf)
    qd_max: np.ndarray = _at("robot.qd_max", "array", shape=("action_dim",), lo=0.0, open_lo=True)  # rad/s
    q_home: np.ndarray = _at("robot.q_home", "array", shape=("action_dim",))
    tcp_speed_max: float = _at("safety.tcp_speed_max", "number", lo=0.0, open_lo=True)  # m/s
    workspace_min: np.ndarray = _at("safety.workspace_min", "array", shape=(3,))  # m, base frame
    workspace_max: np.ndarray = _at("safety.workspace_max", "array", shape=(3,))
    watchdog_timeout_s: float = _at("safety.watchdog_timeout_s", "number", lo=0.0, open_lo=True)
    lookahead_s: float = _at("safety.lookahead_s", "number", lo=0.0, open_lo=True)
    speed_fraction: float = _at("safety.speed_fraction", "number", lo=0.0, hi=1.0, open_lo=True)  # of URDF limits
    # the scene's bodies, the separation settings and the arm's sphere model (coreach.world.scene_bodies.world_json);
    # {} = no bodies (the separation step is off)
    world: dict[str, Any] = _at("safety.world", "mapping")
    tolerances: dict[str, Any] = _at("tolerances", "mapping")
    gate: dict[str, Any] = _at("gate", "mapping")
    dataset_fingerprint: str = _at("dataset_fingerprint", "string")
    training_run_id: str = _at("training_run_id", "string")
    git_commit: str = _at("git_commit", "string")
    onnx_parity: dict[str, Any] = _at("onnx_parity", "mapping")  # {n, max_abs_diff}
    files: dict[str, str] = _at("files", "mapping")  # name -> sha256, checked by coreach.runtime.verify
    raw: dict[str, Any] = field(repr=False, default_factory=dict)  # the JSON read, if read

    def path(self, name: str) -> Path:
        return self.folder / name

    @classmethod
    def from_json(cls, folder: Path, data: dict) -> Manifest:
        """The checked manifest of the bundle in `folder` from its parsed manifest.json; BundleError (one line,
        naming the field) for anything malformed."""
        values: dict[str, Any] = {}  # fields read so far (and bound lengths), for the lengths of later ones
        try:
            for f in _declared():
                options = dict(f.metadata)
                path, check = options.pop("json"), options.pop("check")
                values[f.name] = _READ[check](path, _get(data, path), values, **options)
            manifest = cls(Path(folder), **{f.name: values[f.name] for f in _declared()}, raw=data)
            _check_across(manifest)
        except _Bad as bad:
            raise BundleError(str(Path(folder) / MANIFEST), str(bad)) from None
        return manifest

    def to_json(self) -> dict[str, Any]:
        """The manifest.json content: every declared field at its place, infinite joint limits as null."""
        out: dict[str, Any] = {}
        for f in _declared():
            *parents, key = f.metadata["json"].split(".")
            node = out
            for part in parents:
                node = node.setdefault(part, {})
            node[key] = _write(f.metadata, getattr(self, f.name))
        return out

    def __eq__(self, other: object) -> bool:
        """Same folder and same declared fields, arrays compared by value (`raw` is left out)."""
        if not isinstance(other, Manifest):
            return NotImplemented
        return self.folder == other.folder and all(_same(getattr(self, f.name), getattr(other, f.name))
                                                   for f in _declared())


def _declared() -> list:
    """Manifest's fields that live in the JSON (all but `folder` and `raw`), in declaration order."""
    return [f for f in fields(Manifest) if "json" in f.metadata]


def onnx_interface(latent_dim: int, context_dim: int, action_dim: int) -> dict[str, Any]:
    """The manifest's description of decoder.onnx: batch-dynamic float32 stick [B, d], context [B, C] -> qd [B, n]."""
    return {"file": "decoder.onnx", "inputs": {"stick": ["batch", latent_dim], "context": ["batch", context_dim]},
            "outputs": {"qd": ["batch", action_dim]}, "dtype": "float32"}


# ------------------------------------------------------------------------------------- reading one field
def _get(data: Any, dotted: str, within: str = "") -> Any:
    node = data
    for part in dotted.split("."):
        if not isinstance(node, dict) or part not in node:
            raise _Bad(f"field {f'{within}.{dotted}' if within else dotted!r} is missing")
        node = node[part]
    return node


def _is_number(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool)


def _interval(lo: float, hi: float, open_lo: bool) -> str:
    return f"{'(' if open_lo else '['}{lo}, {hi}]"


def _inside(x: Any, lo: float, hi: float, open_lo: bool) -> bool:
    x = np.asarray(x)
    return bool(np.all(((x > lo) if open_lo else (x >= lo)) & (x <= hi)))


def _string(path: str, v: Any, dims: dict | None = None) -> str:
    if not isinstance(v, str):
        raise _bad(path, "a string", v)
    return v


def _integer(path: str, v: Any, dims: dict | None = None, min: int = 0) -> int:
    if not _is_number(v) or not isinstance(v, int) or v < min:
        raise _bad(path, f"an integer >= {min}", v)
    return v


def _number(path: str, v: Any, dims: dict | None = None, lo: float = -math.inf, hi: float = math.inf,
            open_lo: bool = False) -> float:
    if not (_is_number(v) and math.isfinite(v) and _inside(v, lo, hi, open_lo)):
        raise _bad(path, f"a finite number in {_interval(lo, hi, open_lo)}", v)
    return float(v)


def _strings(path: str, v: Any, dims: dict, length: int | str | None = None) -> tuple[str, ...]:
    n = dims[length] if isinstance(length, str) else length
    if not isinstance(v, list) or not all(isinstance(s, str) for s in v) or n not in (None, len(v)):
        raise _bad(path, "a list of strings" if n is None else f"a list of {n} strings", v)
    return tuple(v)


def _mapping(path: str, v: Any, dims: dict | None = None) -> dict[str, Any]:
    if not isinstance(v, dict):
        raise _bad(path, "a mapping", v)
    return copy.deepcopy(v)


def _array(path: str, v: Any, dims: dict, shape: tuple, null: float | None = None, lo: float = -math.inf,
           hi: float = math.inf, open_lo: bool = False) -> np.ndarray:
    """Numbers of `shape` as float64; where `null` is given, a JSON null stands for it (an infinite limit)."""
    def conv(x):  # anything but a finite number (or an allowed null) becomes NaN and fails below
        if isinstance(x, list):
            return [conv(y) for y in x]
        if x is None and null is not None:
            return null
        return float(x) if _is_number(x) and math.isfinite(x) else math.nan

    try:
        arr = np.array(conv(v), dtype=np.float64)
    except ValueError:  # ragged nesting
        arr = np.full(1, math.nan)
    if arr.ndim == len(shape):
        for d, n in zip(shape, arr.shape):
            if isinstance(d, str):
                dims.setdefault(d, n)
    want = [dims.get(d, "?") if isinstance(d, str) else d for d in shape]
    if list(arr.shape) != want or np.isnan(arr).any() or not _inside(arr, lo, hi, open_lo):
        kind = "finite numbers" if null is None else f"numbers or null (= {null})"
        bounds = "" if (lo, hi) == (-math.inf, math.inf) else f" in {_interval(lo, hi, open_lo)}"
        raise _bad(path, f"{kind}{bounds} of shape {want}", v)
    return arr


def _arrays(path: str, v: Any, dims: dict, shapes: dict[str, tuple]) -> dict[str, np.ndarray]:
    """A mapping of named arrays (the normalisation buffers), each checked like `_array`."""
    if not isinstance(v, dict):
        raise _bad(path, "a mapping", v)
    return {k: _array(f"{path}.{k}", _get(v, k, path), dims, shape) for k, shape in shapes.items()}


_READ = {"string": _string, "integer": _integer, "number": _number, "strings": _strings, "mapping": _mapping,
         "array": _array, "arrays": _arrays}


def _write(spec: Any, value: Any) -> Any:
    """The JSON form of one declared field's value."""
    check = spec["check"]
    if check == "array":
        return _json_numbers(value, spec.get("null"))
    if check == "arrays":
        return {k: _json_numbers(value[k]) for k in spec["shapes"]}
    if check == "strings":
        return list(value)
    if check == "mapping":
        return copy.deepcopy(value)
    return {"number": float, "integer": int, "string": str}[check](value)


def _json_numbers(value: Any, null: float | None = None) -> Any:
    def conv(x):
        return [conv(y) for y in x] if isinstance(x, list) else (None if null is not None and x == null else x)

    return conv(np.asarray(value, dtype=np.float64).tolist())


def _same(a: Any, b: Any) -> bool:
    if isinstance(a, dict) or isinstance(b, dict):
        return (isinstance(a, dict) and isinstance(b, dict) and a.keys() == b.keys()
                and all(_same(a[k], b[k]) for k in a))
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        return np.array_equal(a, b)
    return a == b


# ------------------------------------------------------------------------------------- checks across fields
def _check_across(m: Manifest) -> None:
    """What relates fields, checked after every field passed its own check; _Bad names the first failure."""
    cols = m.normalisation["context_cols"]
    if np.any((cols < 0) | (cols >= m.context_dim) | (cols != np.round(cols))):
        raise _bad("normalisation.context_cols", f"integer column indices in [0, {m.context_dim})", cols.tolist())
    if m.onnx != onnx_interface(m.latent_dim, m.context_dim, m.action_dim):
        raise _bad("decoder.onnx", f"{onnx_interface(m.latent_dim, m.context_dim, m.action_dim)}", m.onnx)
    if m.urdf != "robot.urdf":  # the runtime reads the arm from this name
        raise _bad("robot.urdf", "'robot.urdf'", m.urdf)
    if not np.all(m.q_lower < m.q_upper):
        raise _bad("robot.q_lower", "values below robot.q_upper", m.q_lower.tolist())
    if not np.all(m.workspace_min < m.workspace_max):
        raise _bad("safety.workspace_min", "a box corner below safety.workspace_max on every axis",
                   m.workspace_min.tolist())
    if (m.stick_low, m.stick_high) != (-1.0, 1.0):  # decoders are trained on this box (DecoderPolicy.stick_scale)
        raise _bad("stick.box_low/box_high", "-1 and 1 (schema 1 fixes the stick box to [-1, 1]^d)",
                   [m.stick_low, m.stick_high])
    _integer("onnx_parity.n", _get(m.onnx_parity, "n", "onnx_parity"), min=1)
    _number("onnx_parity.max_abs_diff", _get(m.onnx_parity, "max_abs_diff", "onnx_parity"), lo=0.0)
    _check_belief(m.belief)
    if m.world:
        try:
            _, _, _, links = world_from_json(m.world, "safety.world")
        except ConfigError as exc:
            raise _Bad(f"field {exc.where!r}: {exc.problem}") from None


def _check_belief(section: dict[str, Any]) -> None:
    """The belief model must be on the host's allow-list; it is built once so its own checks refuse bad values."""
    model = _string("belief.model", _get(section, "model", "belief"))
    if model not in BELIEF_MODELS:
        raise _bad("belief.model", f"one of {sorted(BELIEF_MODELS)}", model)
    for key, value in section.items():
        if key != "model":
            _number(f"belief.{key}", value)
    try:
        belief_from_manifest(section)
    except ConfigError as exc:
        raise _Bad(f"field 'belief': {exc.problem}") from None
