"""Torch side of a release: the decoder policy as a self-contained ONNX file, and its parity with torch.

Never imported by the runtime (the robot computer has no torch); `bundle_writer.write_bundle` imports it lazily.
"""

from __future__ import annotations

import copy
import warnings
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import torch
from torch import Tensor, nn

from coreach.errors import CoreachError
from coreach.decoder.policy import DecoderPolicy

INPUTS = ("stick", "context")
OUTPUT = "qd"


class _Graph(nn.Module):
    """The policy's forward with named positional inputs, exactly as traced into the ONNX graph."""

    def __init__(self, policy: DecoderPolicy):
        super().__init__()
        self.policy = policy

    def forward(self, stick: Tensor, context: Tensor) -> Tensor:
        return self.policy(stick, context)


def export_onnx(policy: DecoderPolicy, path: str | Path, opset: int = 17) -> Path:
    """Write `policy` as ONNX: inputs stick [B, d] and raw context [B, C] (float32; normalisation happens
    inside the graph), output qd [B, n] (rad/s), dynamic batch axis, weights embedded in the one file.

    Uses the TorchScript-based exporter (`dynamo=False`): it needs no onnxscript and keeps initialisers
    inside the .onnx file (models under 2 GB), whereas the torch.export-based default needs onnxscript and
    writes weights to a side file unless told otherwise. torch 2.9+ flags the TorchScript exporter as
    deprecated with a DeprecationWarning; that notice is silenced here because the choice is deliberate
    and the output is checked (onnx.checker, and `onnx_parity` against torch before a bundle is written).
    """
    path = Path(path)
    policy = copy.deepcopy(policy).float().eval()  # float32 graph; the caller's module is left untouched
    spec = policy.spec
    stick = torch.zeros(2, policy.latent_dim)  # batch of 2 so no size-1 axis is mistaken for a constant
    context = torch.zeros(2, spec.width)
    batch = {0: "batch"}
    with warnings.catch_warnings(), torch.no_grad():
        warnings.filterwarnings("ignore", message=r".*legacy TorchScript-based ONNX export.*")
        warnings.filterwarnings("ignore", message=r".*feature will be removed.*", category=DeprecationWarning)
        torch.onnx.export(
            _Graph(policy),
            (stick, context),
            str(path),
            dynamo=False,
            input_names=list(INPUTS),
            output_names=[OUTPUT],
            dynamic_axes={"stick": batch, "context": batch, OUTPUT: batch},
            opset_version=opset,
            do_constant_folding=True,
            external_data=False,
        )
    model = onnx.load(str(path), load_external_data=False)
    for init in model.graph.initializer:
        if init.data_location == onnx.TensorProto.EXTERNAL:
            raise CoreachError(str(path), f"weight {init.name!r} was written to a side file; expected one file")
    onnx.checker.check_model(model, full_check=True)
    return path


def sample_inputs(policy: DecoderPolicy, n: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Sticks [n, d] uniform in the box [-1, 1]^d and raw contexts [n, C] (float32): the decoder's columns
    drawn around its normalisation stats (mean + 2 std * N(0, 1), wider than training data), the unused
    columns standard normal."""
    rng = np.random.default_rng(seed)
    d, width = policy.latent_dim, policy.spec.width
    stick = rng.uniform(-1.0, 1.0, size=(n, d))
    context = rng.standard_normal((n, width))
    cols = policy.context_cols.cpu().numpy()
    mean = policy.ctx_mean.detach().cpu().double().numpy()
    std = policy.ctx_std.detach().cpu().double().numpy()
    context[:, cols] = mean + 2.0 * std * rng.standard_normal((n, len(cols)))
    return stick.astype(np.float32), context.astype(np.float32)


def onnx_parity(policy: DecoderPolicy, onnx_path: str | Path, n: int = 10_000, seed: int = 0) -> float:
    """Largest absolute difference (rad/s) between torch and onnxruntime outputs on `sample_inputs`."""
    stick, context = sample_inputs(policy, n, seed)
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    opts.inter_op_num_threads = 1
    sess = ort.InferenceSession(str(onnx_path), opts, providers=["CPUExecutionProvider"])
    (got,) = sess.run([OUTPUT], {"stick": stick, "context": context})
    ref_policy = copy.deepcopy(policy).float().eval()
    with torch.no_grad():
        ref = ref_policy(torch.from_numpy(stick), torch.from_numpy(context)).numpy()
    if got.shape != ref.shape:
        raise CoreachError(str(onnx_path), f"onnxruntime output shape {list(got.shape)} differs from torch "
                                           f"{list(ref.shape)}")
    return float(np.max(np.abs(got.astype(np.float64) - ref.astype(np.float64))))
