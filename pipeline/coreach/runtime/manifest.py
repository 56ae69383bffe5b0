"""The release manifest (manifest.json): its constants, the checked `Manifest` and reading it from JSON.

Needs only numpy, so the robot computer can read a bundle. The writer is `coreach.release.bundle_writer`,
verification of the folder (hashes, listing) `coreach.runtime.verify`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
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
    belief: dict[str, Any]  # {"model": name, **parameters}: rebuild with belief_manifest.belief_from_manifest
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

    @classmethod
    def from_json(cls, folder: Path, data: dict) -> Manifest:
        """The checked manifest of the bundle in `folder` from its parsed manifest.json; BundleError (one line,
        naming the field) for anything malformed."""
        return _parse_manifest(Path(folder), data)


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


def _read_belief(f: _Fields) -> dict[str, Any]:
    """The manifest's belief section as written by the model; its name must be on the host's allow-list.

    The model is built once through `belief_from_manifest` so its own parameter checks refuse a bad bundle.
    """
    from coreach.runtime.belief_manifest import BELIEF_MODELS, belief_from_manifest

    section = f.get("belief")
    if not isinstance(section, dict):
        raise f.fail("belief", "a mapping", section)
    model = f.string("belief.model")
    if model not in BELIEF_MODELS:
        raise f.fail("belief.model", f"one of {sorted(BELIEF_MODELS)}", model)
    out: dict[str, Any] = {"model": model}
    for key, value in section.items():
        if key != "model":
            out[key] = f.number(f"belief.{key}")
    try:
        belief_from_manifest(out)
    except ConfigError as exc:
        raise BundleError(f.where, f"field 'belief': {exc.problem}") from None
    return out


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
        belief=_read_belief(f),
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
