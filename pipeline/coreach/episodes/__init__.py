"""Demonstration episodes in joint space and the validated Parquet format (schema v1) they are stored in.

Parquet schema (schema version 1): one row per time step, rows of an episode holding steps 0..T-1.

==========  =====================================  ==========================================================
column      type                                   meaning
==========  =====================================  ==========================================================
episode     int64                                  episode id (any integer, unique per episode)
step        int32                                  time step within the episode: 0, 1, ..., T-1, no gaps
goal        string                                 name of the goal demonstrated (one of coreach.goal_names)
q           fixed_size_list<float64>[n]            joint positions (rad) before the step, in joint_names order
qd          fixed_size_list<float64>[n]            commanded joint velocities (rad/s) for the step
ee_pos      fixed_size_list<float64>[3]            tool position (m, base frame) at q          (optional*)
ee_quat     fixed_size_list<float64>[4]            tool orientation (w, x, y, z) at q          (optional*)
goal_pos    list<fixed_size_list<float64>[3]>[G]   approach point of every goal in this episode's layout (m)
goal_quat   list<fixed_size_list<float64>[4]>[G]   approach orientation of every goal (w, x, y, z)
goal_fine   list<fixed_size_list<float64>[3]>[G]   fine-motion displacement of every goal (m, base frame)
==========  =====================================  ==========================================================

goal_pos/goal_quat/goal_fine are the episode's layout repeated on each of its rows, in coreach.goal_names order.
(*) Files may leave out ee_pos and ee_quat; they are then computed from q with the robot's forward kinematics.
Plain `list<double>` and float32 columns are accepted as long as every row has the expected length.

File key-value metadata:
    coreach.schema_version  "1"
    coreach.goal_names      JSON list of the G goal names (order of the goal_* lists)
    coreach.joint_names     JSON list of the n joint names (order of q/qd); optional when a robot is given
    coreach.dt              time between steps in seconds, as a decimal string

Loading checks every rule above and raises DataError naming the file, episode and column at fault.
"""

from coreach.episodes.episode_set import OPTIONAL_COLUMNS, REQUIRED_COLUMNS, SCHEMA_VERSION, Episode, EpisodeSet
from coreach.episodes.parquet_loader import load_parquet
from coreach.episodes.parquet_writer import save_parquet, to_table

__all__ = ["Episode", "EpisodeSet", "save_parquet", "load_parquet", "to_table", "SCHEMA_VERSION", "REQUIRED_COLUMNS",
           "OPTIONAL_COLUMNS"]
