"""The public host API for plugins: the only coreach module a plugin may import (an import-linter contract).

What is here is what a lab's robot, dataset, network, loss, operator, baseline or labeller needs from the
host; everything else may change without notice. Add a name here (and to DEVELOPERS.md's plugin section)
rather than importing a host module from a plugin.
"""

from __future__ import annotations

from coreach.arrival import DEFAULT_MIN_ARRIVAL
from coreach.config.option_specs import choice, integer, number, sizes, text, vector
from coreach.control.belief_model import distance_to_path
from coreach.control.servo import dls_step, servo
from coreach.demonstrator import expert_action, expert_twist, generate, rollout
from coreach.episodes import SCHEMA_VERSION, EpisodeSet, load_parquet, save_parquet
from coreach.errors import ConfigError
from coreach.host.interfaces import STICK_DIM, check_positive, episode_sticks
from coreach.host.nn import check_width, mlp
from coreach.host.protocols import Posterior, Robot
from coreach.training.terms import TermBatch
from coreach.world.detour import null_space_push
from coreach.world.robot_identity import TAG_URDF, robot_tags
from coreach.world.scenario import load_scenario

__all__ = [
    # errors and option declarations
    "ConfigError", "choice", "integer", "number", "sizes", "text", "vector",
    # protocols' data types
    "Posterior", "Robot", "TermBatch",
    # networks
    "check_width", "mlp",
    # sticks and interfaces
    "STICK_DIM", "check_positive", "episode_sticks",
    # control math shared with vetting and the robot
    "distance_to_path", "dls_step", "servo", "null_space_push", "DEFAULT_MIN_ARRIVAL",
    # demonstrations and their files
    "expert_action", "expert_twist", "generate", "rollout", "SCHEMA_VERSION", "EpisodeSet", "load_parquet",
    "save_parquet", "load_scenario",
    # robot identity tags a robot plugin writes
    "TAG_URDF", "robot_tags",
]  # fmt: skip
