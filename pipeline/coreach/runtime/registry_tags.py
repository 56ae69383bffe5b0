"""Names of our own that releases write into the tracking store, in one place: the contract between
`coreach release` / `coreach promote` (the workstation) and `coreach-robot fetch` (the robot computer).

Model version: `coreach.release_run` (the run that published it), `coreach.bundle_uri` (the bundle's folder
in the store, also the version's source), `coreach.manifest_sha256`, `coreach.gate` (compact gate results)
and, written last, `coreach.gate_passed=true`: a version without it was never fully published.
Registered model: aliases `gate-passed` (newest release) and `fielded` (on the robots), and the fielding
history tag. Release run: `coreach.publish` (pending -> done | rolled-back) and the intent's details.
"""

import re

# a registered model name; it is also a folder name under releases/ and in the robot's cache
MODEL_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,99}$")

# the description of a registered model coreach created (how `finish-releases --leftovers` tells its own models apart)
MODEL_DESCRIPTION = "coreach latent-action decoders that passed the release gate"

GATE_PASSED_ALIAS = "gate-passed"
FIELDED_ALIAS = "fielded"

TAG_GATE_PASSED = "coreach.gate_passed"
TAG_BUNDLE_URI = "coreach.bundle_uri"
TAG_MANIFEST = "coreach.manifest_sha256"
TAG_GATE = "coreach.gate"
TAG_GATE_RELAXED = "coreach.gate_relaxed"  # set only when released with settings looser than shipped: which
TAG_RELEASE_RUN = "coreach.release_run"
TAG_HISTORY = "coreach.fielded_history"

TAG_PUBLISH = "coreach.publish"
TAG_OWNER = "coreach.owner"  # host:pid:process-start of the publishing process
TAG_ROOT = "coreach.releases_dir"  # absolute local releases folder of the publishing process
TAG_CREATED_MODEL = "coreach.created_model"  # the publish created the registered model
TAG_VERSION = "coreach.model_version"
TAG_MODEL_NAME = "coreach.model_name"
TAG_SOURCE_RUN = "coreach.source_run"


def release_tag(name: str) -> str:
    """Training-run tag: the newest version of model `name` released from that run (written once usable)."""
    return f"coreach.release.{name}"
