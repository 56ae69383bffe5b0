"""Shared network builder for decoder plugins: a plain multilayer perceptron."""

from __future__ import annotations

from torch import nn

from coreach.errors import ConfigError

ACTIVATIONS: dict[str, type[nn.Module]] = {
    "silu": nn.SiLU,
    "relu": nn.ReLU,
    "gelu": nn.GELU,
    "tanh": nn.Tanh,
    "elu": nn.ELU,
}


def mlp(in_dim: int, out_dim: int, hidden: list[int], activation: str = "silu") -> nn.Sequential:
    """Linear layers of widths in_dim -> *hidden -> out_dim with `activation` between them (none at the end,
    so outputs are unbounded); `hidden=[]` gives a single affine map."""
    if activation not in ACTIVATIONS:
        raise ConfigError("model.activation", f"expected one of {sorted(ACTIVATIONS)}, got {activation!r}")
    widths = [in_dim, *hidden, out_dim]
    if any(not isinstance(w, int) or isinstance(w, bool) or w < 1 for w in widths):
        raise ConfigError("model.hidden", f"expected positive integer layer widths, got {widths}")
    layers: list[nn.Module] = []
    for i, (a, b) in enumerate(zip(widths[:-1], widths[1:])):
        if i > 0:
            layers.append(ACTIVATIONS[activation]())
        layers.append(nn.Linear(a, b))
    return nn.Sequential(*layers)


def check_width(where: str, value: int, minimum: int = 1) -> int:
    """A layer or block width from configuration, as an int of at least `minimum`."""
    if not isinstance(value, int) or isinstance(value, bool) or value < minimum:
        raise ConfigError(where, f"expected an integer >= {minimum}, got {value!r}")
    return value
