"""Progress for a person at a terminal, quiet in CI and pipes (one rule for every long command)."""

from __future__ import annotations

import os
import sys

from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn


def interactive() -> bool:
    """A rich progress bar only for a person at a terminal; CI and pipes get quiet logs."""
    return sys.stderr.isatty() and not os.environ.get("CI")


def progress_bar(total: int, label: str):
    """(bar, update(done, total=None)): a rich bar with a count on a terminal, (None, None) in CI and pipes.
    The caller stops the bar. It draws on stderr: stdout belongs to a command's --json output."""
    if not interactive():
        return None, None
    bar = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TimeRemainingColumn(),
                   console=Console(stderr=True))  # fmt: skip
    bar.start()
    task = bar.add_task(label, total=total)
    return bar, lambda done, total=None: bar.update(task, completed=done, total=total)
