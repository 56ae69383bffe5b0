"""Release bundles: one folder with the decoder (ONNX + safetensors), robot, manifest and model card.

Layout (schema "1"): decoder.onnx, decoder.safetensors, decoder.json, robot.urdf, MODEL_CARD.md, optional
extra files (e.g. report.html), and manifest.json, which lists the sha256 of every other file.

This module gathers the robot-side public names: `coreach.runtime.manifest` (schema and reading) and
`coreach.runtime.verify` (checking a folder; numpy only). Writing a bundle is release work
(`coreach.release.bundle_writer`), which the runtime never imports.
"""

from __future__ import annotations

from coreach.runtime.manifest import (CORE_FILES, DEFAULT_DEADBAND, DEFAULT_LOOKAHEAD_S, DEFAULT_WATCHDOG_S,
                                      MANIFEST, PARITY_TOLERANCE, SCHEMA_VERSION, BundleError, Manifest)
from coreach.runtime.verify import sha256_bytes, sha256_file, verify_bundle

__all__ = [
    "CORE_FILES", "DEFAULT_DEADBAND", "DEFAULT_LOOKAHEAD_S", "DEFAULT_WATCHDOG_S", "MANIFEST", "PARITY_TOLERANCE",
    "SCHEMA_VERSION", "BundleError", "Manifest", "sha256_bytes", "sha256_file", "verify_bundle",
]
