"""Rebuilding a bundle's goal-belief model from its manifest section, through a short allow-list of classes."""

from __future__ import annotations

from typing import Any

from coreach.control.belief_model import BoltzmannGoalBelief
from coreach.errors import ConfigError

# A bundle names its belief model; only these classes may be built from one. A bundle never carries a
# `_target_` or a pickle: adding a model to what a robot may run is a reviewed change to this table.
BELIEF_MODELS: dict[str, type] = {
    BoltzmannGoalBelief.MANIFEST_MODEL: BoltzmannGoalBelief,
}


def belief_class(model: str):
    """The class allowed for belief model name `model`; ConfigError (one line) for an unknown name."""
    cls = BELIEF_MODELS.get(model)
    if cls is None:
        raise ConfigError("manifest belief.model", f"unknown belief model {model!r}; allowed: {sorted(BELIEF_MODELS)}")
    return cls


def belief_from_manifest(section: dict[str, Any]):
    """The belief model described by a manifest's `belief` section ({"model": name, **parameters})."""
    if not isinstance(section, dict):
        raise ConfigError("manifest belief", f"expected a mapping, got {type(section).__name__}")
    params = dict(section)
    model = params.pop("model", None)
    if not isinstance(model, str):
        raise ConfigError("manifest belief.model", f"expected a belief model name, got {model!r}")
    cls = belief_class(model)
    try:
        return cls.from_manifest(params)
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"manifest belief ({model})", str(exc).strip().splitlines()[0]) from None
