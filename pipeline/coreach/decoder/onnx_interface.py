"""A release bundle's decoder.onnx as a vetting interface, run by onnxruntime inside the vetting loop.

This is how `coreach replay` proves a bundle is the vetted decoder: the loop (plant, operator, limits) is the
torch vetting loop, but every command comes from the exported graph, loaded from a verified bundle.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import onnxruntime as ort
import torch
from torch import Tensor

from coreach.errors import ConfigError
from coreach.host.interfaces import STICK_DIM, episode_sticks
from coreach.runtime.bundle import BundleError, Manifest, sha256_bytes, verify_bundle

# Stick step of the central differences behind `stick_gain`: the graph runs in float32, so the rounding error
# of a difference quotient is about 1e-7 * |qd| / FD_STEP; the truncation error is zero wherever the decoder
# is piecewise linear across +-FD_STEP and O(FD_STEP^2) for smooth activations.
FD_STEP = 1e-2


class OnnxBundleInterface:
    """stick [K, 2] (or [E, K, 2]) -> decoder.onnx(stick, context) in every episode; one mode.

    `bundle`: a release bundle folder. It is verified (schema, listing, every sha256) and the graph is loaded
    from the very bytes that were hashed.
    """

    n_modes = 1

    def __init__(self, bundle: str = "???", name: str = "", threads: int = 1):
        if not isinstance(bundle, str) or not bundle or bundle == "???":
            raise ConfigError("option interface.bundle", f"expected a release bundle folder, got {bundle!r}")
        self.bundle = bundle
        self.manifest_: Manifest = verify_bundle(Path(bundle).expanduser())
        m = self.manifest_
        if m.latent_dim != STICK_DIM:
            raise ConfigError(f"interface {name or bundle}", f"bundle decoder has a {m.latent_dim}-D latent; "
                                                             f"a {STICK_DIM}-axis stick needs 2")  # fmt: skip
        data = m.path("decoder.onnx").read_bytes()
        if sha256_bytes(data) != m.files["decoder.onnx"]:
            raise BundleError(str(m.path("decoder.onnx")), "changed since the bundle was verified; sha256 differs")
        opts = ort.SessionOptions()
        # intra-op threads help the big E*K batches of a rollout; the robot's Session uses 1 for one sample
        opts.intra_op_num_threads = int(threads)
        opts.inter_op_num_threads = 1
        self.session_ = ort.InferenceSession(data, opts, providers=["CPUExecutionProvider"])
        self.name = str(name or Path(bundle).resolve().name)

    def _context(self, state) -> np.ndarray:
        width = self.manifest_.context_dim
        if state.context.shape[-1] != width:
            m = self.manifest_
            raise ConfigError(f"interface {self.name}", f"bundle decoder takes context width {width} ({m.action_dim} "
                              f"joints, {m.n_goals} goals); the suite gives {state.context.shape[-1]}")  # fmt: skip
        return state.context.to(torch.float32).numpy()

    def _run(self, stick: np.ndarray, context: np.ndarray) -> np.ndarray:
        (qd,) = self.session_.run(["qd"], {"stick": np.ascontiguousarray(stick, np.float32),
                                           "context": np.ascontiguousarray(context, np.float32)})  # fmt: skip
        return qd

    def reset(self, n_episodes: int, state) -> None:
        self._context(state)

    def act(self, stick: Tensor, state) -> Tensor:
        ctx = self._context(state)  # [E, C]
        E, C = ctx.shape
        sticks = episode_sticks(stick, E, f"interface {self.name}").to(torch.float32).numpy()  # [E, K, 2]
        K = sticks.shape[1]
        flat_ctx = np.broadcast_to(ctx[:, None, :], (E, K, C)).reshape(E * K, C)  # [E*K, C]
        qd = self._run(sticks.reshape(E * K, STICK_DIM), flat_ctx)  # [E*K, n]
        return torch.from_numpy(qd).reshape(E, 1, K, -1).to(state.context.dtype)  # [E, 1, K, n]

    def stick_jacobian(self, context: np.ndarray) -> np.ndarray:
        """d qd / d stick [E, n, 2] at the centre of the stick box, by central differences of step FD_STEP."""
        E, C = context.shape
        probes = np.concatenate([np.eye(STICK_DIM), -np.eye(STICK_DIM)]) * FD_STEP  # [4, 2]: +e0, +e1, -e0, -e1
        qd = self._run(np.tile(probes, (E, 1)), np.repeat(context, len(probes), axis=0))  # [E*4, n]
        qd = qd.astype(np.float64).reshape(E, 2, STICK_DIM, -1)  # [E, sign, axis, n]
        return ((qd[:, 0] - qd[:, 1]) / (2 * FD_STEP)).transpose(0, 2, 1)  # [E, n, 2]

    def stick_gain(self, state) -> Tensor:
        jac = self.stick_jacobian(self._context(state))
        return torch.from_numpy(np.linalg.svd(jac, compute_uv=False)[..., -1]).to(state.context.dtype)


__all__ = ["OnnxBundleInterface", "FD_STEP"]
