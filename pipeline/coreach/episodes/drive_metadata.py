"""File metadata keys of a recorded test drive: written by the test drive, read by vetting and fine-tuning."""

META_MANIFEST = "coreach.bundle_manifest_sha256"  # sha256 of the bundle's manifest.json the drive ran
META_SESSION = "coreach.testdrive_session"  # the test-drive session id
META_TOLERANCES = "coreach.testdrive_tolerances"  # JSON: the arrival tolerances the drive was judged with
