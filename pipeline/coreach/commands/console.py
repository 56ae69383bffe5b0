"""The terminal console of command output, and the cautions printed at its end.

Kept apart from coreach.commands.summaries so a plain command (promote, bundles, ...) can end with the
cautions without importing the vetting and release tables the summaries show.
"""

from __future__ import annotations

import sys

from rich.console import Console

from coreach.runtime.cautions import cautions


def plain_console() -> Console:
    """Rich console; a fixed width when stdout is not a terminal, so logs and tests see whole lines."""
    return Console(width=None if sys.stdout.isatty() else 160)


def print_cautions(console, recording: bool = False) -> None:
    """The cautions (with the consent line where a person is recorded), as `coreach-robot` prints them."""
    console.print("[bold]Cautions[/bold]")
    for c in cautions(recording):
        console.print(f"  - {c}", markup=False)
