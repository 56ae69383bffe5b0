"""The one exception type users see: a single line naming the item at fault and what was expected."""

from __future__ import annotations


class CoreachError(Exception):
    """A problem with the user's input or environment, reported as one line without a traceback."""

    def __init__(self, where: str, problem: str):
        self.where = where
        self.problem = problem
        super().__init__(f"{where}: {problem}")


class DataError(CoreachError):
    """Bad demonstration data (file, episode, column)."""


class ConfigError(CoreachError):
    """Bad configuration (option, plugin name, file named by an option)."""
