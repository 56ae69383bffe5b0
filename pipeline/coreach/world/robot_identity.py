"""Which arm a decoder was trained on: tagged on its training run, checked wherever the decoder is used.

Only the number of joints is visible in the decoder itself, so a decoder trained on one 7-joint arm would
otherwise vet and ship against another arm's kinematics (or the shipped arm's, when the robot options are
forgotten). Runs made before these tags existed carry none and are not checked.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping

from coreach.errors import ConfigError

TAG_JOINTS = "coreach.robot_joints"
TAG_URDF = "coreach.robot_urdf_sha256"


def robot_tags(robot) -> dict[str, str]:
    """The joint names and the sha256 of the URDF text (with its placement) of `robot`."""
    tags = {TAG_JOINTS: ",".join(map(str, getattr(robot, "joint_names", [])))}
    text = robot.urdf_text() if hasattr(robot, "urdf_text") else None
    if text:
        tags[TAG_URDF] = hashlib.sha256(text.encode("utf-8")).hexdigest()
    return tags


def check_same_robot(tags: Mapping[str, str], robot, where: str) -> None:
    """ConfigError (one line) unless `robot` is the arm the run's `tags` describe."""
    mine = robot_tags(robot)
    joints = tags.get(TAG_JOINTS)
    if joints is not None and joints != mine[TAG_JOINTS]:
        raise ConfigError(where, f"trained on an arm with joints [{joints}]; the configured robot {robot.name!r} has "
                                 f"[{mine[TAG_JOINTS]}]: give the same robot options as for training")  # fmt: skip
    theirs = tags.get(TAG_URDF)
    if theirs is not None and TAG_URDF in mine and theirs != mine[TAG_URDF]:
        raise ConfigError(where, f"trained on another URDF of this arm (sha256 {theirs[:12]}, configured "
                                 f"{mine[TAG_URDF][:12]}: another file, base placement or tool offset); give the same "
                                 "robot options as for training")  # fmt: skip
