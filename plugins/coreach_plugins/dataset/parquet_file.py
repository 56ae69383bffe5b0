"""Dataset plugin: demonstrations recorded elsewhere (e.g. a lab's own teleoperation) in coreach's Parquet schema."""

from __future__ import annotations

from coreach.host.api import EpisodeSet, load_parquet
from coreach.host.api import ConfigError
from coreach.host.api import Robot


class ParquetFile:
    """Episodes read from `path`; see coreach.episodes for the schema and the checks applied."""

    def __init__(self, path: str, min_steps: int = 2):
        if not isinstance(path, str) or not path or path == "???":
            raise ConfigError("dataset.path", "expected the path of a Parquet file of demonstrations")
        if int(min_steps) < 1:
            raise ConfigError("dataset.min_steps", f"expected at least 1, got {min_steps}")
        self.path, self.min_steps = path, int(min_steps)

    def load(self, robot: Robot) -> EpisodeSet:
        return load_parquet(self.path, robot=robot, min_steps=self.min_steps)
