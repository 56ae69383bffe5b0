"""Options declared once with their type, range and unit; one checker reads the declarations and names the option.

Used for files that are not Hydra configs (vetting suites) so that their checks read like a table:

    @dataclass
    class ToleranceOptions:
        position_m: float = number(0.02, 1e-6, 1.0, "m")

`check_options(ToleranceOptions, data, where)` returns the checked values (defaults filled in) or raises a
ConfigError naming `where, option <key>` and what was expected.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

from omegaconf import ListConfig, OmegaConf

from coreach.errors import ConfigError

__all__ = ["number", "integer", "choice", "text", "vector", "sizes", "check_options", "check_ranges", "is_number"]


def is_number(v: Any) -> bool:
    """A finite int or float (bool is not a number here, though Python says it is)."""
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def number(default, lo: float, hi: float = math.inf, unit: str = "", *, optional: bool = False,
           open_range: bool = False):  # fmt: skip
    """A finite number in [lo, hi] ((lo, hi) with open_range); None allowed when optional."""
    return dataclasses.field(default=default, metadata={"kind": "number", "lo": lo, "hi": hi, "unit": unit,
                                                         "optional": optional, "open": open_range})


def integer(default, lo: int, why: str = ""):
    """An integer >= lo (not a bool, not a float with an integer value)."""
    return dataclasses.field(default=default, metadata={"kind": "integer", "lo": lo, "why": why})


def choice(default, options: tuple):
    return dataclasses.field(default=default, metadata={"kind": "choice", "options": options})


def text(default=dataclasses.MISSING, what: str = "a non-empty string", *, optional: bool = False):
    """A non-empty string; None allowed when optional."""
    return dataclasses.field(default=default, metadata={"kind": "text", "what": what, "optional": optional})


def vector(default: tuple, length: int, unit: str = ""):
    """A list of `length` finite numbers."""
    return dataclasses.field(default=default, metadata={"kind": "vector", "length": length, "unit": unit})


def sizes(default: list[int], what: str = "layer widths"):
    """A non-empty list of positive integers (e.g. hidden layer widths)."""
    return dataclasses.field(default_factory=lambda: list(default), metadata={"kind": "sizes", "what": what})


def _expected(meta: dict) -> str:
    kind = meta["kind"]
    if kind == "number":
        lo, hi, unit = meta["lo"], meta["hi"], f" {meta['unit']}" if meta["unit"] else ""
        brackets = "()" if meta["open"] else "[]"
        span = f"a number in {brackets[0]}{lo}, {hi}{brackets[1]}{unit}"
        return span + (" or null" if meta["optional"] else "")
    if kind == "integer":
        return f"an integer >= {meta['lo']}{meta['why']}"
    if kind == "choice":
        return "one of " + ", ".join(repr(o) for o in meta["options"])
    if kind == "vector":
        unit = f" in {meta['unit']}" if meta["unit"] else ""
        return f"a list of {meta['length']} numbers{unit}"
    if kind == "sizes":
        return f"a non-empty list of positive integers ({meta['what']})"
    return meta["what"]


def _fits(meta: dict, v: Any) -> bool:
    kind = meta["kind"]
    if kind == "number":
        if v is None:
            return meta["optional"]
        if not is_number(v):
            return False
        return meta["lo"] < v < meta["hi"] if meta["open"] else meta["lo"] <= v <= meta["hi"]
    if kind == "integer":
        return isinstance(v, int) and not isinstance(v, bool) and v >= meta["lo"]
    if kind == "choice":
        return v in meta["options"]
    if kind == "vector":
        return isinstance(v, (list, tuple)) and len(v) == meta["length"] and all(is_number(x) for x in v)
    if kind == "sizes":
        return (isinstance(v, (list, tuple)) and len(v) > 0
                and all(isinstance(x, int) and not isinstance(x, bool) and x > 0 for x in v))
    return (v is None and meta["optional"]) or (isinstance(v, str) and bool(v))


def check_options(spec: type, data: Any, where: str, prefix: str = "") -> dict:
    """Checked values of every field of the dataclass `spec` (defaults filled in). Fields without a kind
    (declared with a plain default) are passed through for the caller to check."""
    fields = {f.name: f for f in dataclasses.fields(spec)}
    if not isinstance(data, dict):
        raise ConfigError(f"{where}{', option ' + prefix.rstrip('.') if prefix else ''}",
                          f"expected a mapping with keys {list(fields)}, got {type(data).__name__}")  # fmt: skip
    extra = [k for k in data if k not in fields]
    if extra:
        raise ConfigError(f"{where}, option {prefix}{extra[0]}", f"unknown option; expected one of {list(fields)}")
    out = {}
    for name, f in fields.items():
        if name in data:
            v = data[name]
        elif f.default is not dataclasses.MISSING:
            v = f.default
        elif f.default_factory is not dataclasses.MISSING:
            v = f.default_factory()
        else:
            raise ConfigError(f"{where}, option {prefix}{name}", f"is required; expected {_expected(f.metadata)}")
        if "kind" in f.metadata and not _fits(f.metadata, v):
            raise ConfigError(f"{where}, option {prefix}{name}", f"expected {_expected(f.metadata)}, got {v!r}")
        out[name] = float(v) if f.metadata.get("kind") == "number" and v is not None else v
    return out


def check_ranges(spec: type, values: dict, where: str) -> None:
    """Range checks of the declared fields present in `values` (a composed Hydra node); the error names
    the dotted option, `where.key`, as an override would write it."""
    for f in dataclasses.fields(spec):
        if f.name in values and "kind" in f.metadata and not _fits(f.metadata, _plain(values[f.name])):
            raise ConfigError(f"{where}.{f.name}" if where else f.name,
                              f"expected {_expected(f.metadata)}, got {values[f.name]!r}")


def _plain(v: Any) -> Any:
    """OmegaConf ListConfig -> list, so a composed node checks like parsed YAML."""
    try:
        if isinstance(v, ListConfig):
            return OmegaConf.to_container(v)
    except ImportError:  # the runtime has no omegaconf and never composes configs
        pass
    return v
