"""`coreach plugins`: every plugin option by kind, with the package it came from."""

from __future__ import annotations

import json
from dataclasses import asdict

from rich.console import Console
from rich.table import Table

from coreach.errors import ConfigError
from coreach.host.registry import discover


def show_plugins(as_json: bool) -> int:
    found = discover()
    if as_json:
        print(json.dumps([asdict(p) for p in found], indent=2))
        return 0
    table = Table(title="coreach plugins")
    for col in ("kind", "name", "implementation", "from"):
        table.add_column(col)
    for p in found:
        table.add_row(p.kind, p.name, p.target, p.origin)
    Console().print(table)
    return 0


def plugins_command(args: list[str], as_json: bool) -> int:
    """`coreach plugins` as the command table calls it; it takes no arguments."""
    if args:
        raise ConfigError("coreach plugins", f"takes no arguments, got {' '.join(args)}")
    return show_plugins(as_json)
