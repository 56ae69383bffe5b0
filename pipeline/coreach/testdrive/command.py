"""`coreach test-drive BUNDLE`: verify a release bundle, then serve a local page to drive it in simulation."""

from __future__ import annotations

import json
import math
import signal
import threading

from coreach.errors import ConfigError
from coreach.release.bundle_store import bundle_folder
from coreach.runtime.cautions import caution_lines, cautions
from coreach.runtime.session import Session
from coreach.testdrive.server import TestDriveServer
from coreach.testdrive.sim import Drive

USAGE = ("coreach test-drive BUNDLE_FOLDER|NAME@ALIAS|NAME/VERSION [--host 127.0.0.1] [--port 8765] [--rate 50] "
         "[--record-dir drives] [--position-tol 0.02] [--orientation-tol-deg 15]")
OPTIONS = {"--host": str, "--port": int, "--rate": float, "--record-dir": str, "--position-tol": float,
           "--orientation-tol-deg": float}  # fmt: skip
NOTICE = ("SIMULATION ONLY. Research software, not a medical device. Nothing this server or its page does can "
          "command a real robot: the arm is a kinematic simulation.")


def parse(args: list[str]) -> tuple[str, dict]:
    opts = {"--host": "127.0.0.1", "--port": 8765, "--rate": 50.0, "--record-dir": "drives",
            "--position-tol": 0.02, "--orientation-tol-deg": 15.0}  # fmt: skip
    folder, rest = None, list(args)
    while rest:
        a = rest.pop(0)
        key, eq, value = a.partition("=")
        if key in OPTIONS:
            if not eq:
                if not rest:
                    raise ConfigError(f"coreach test-drive {key}", f"needs a value; usage: {USAGE}")
                value = rest.pop(0)
            try:
                opts[key] = OPTIONS[key](value)
            except ValueError:
                raise ConfigError(f"coreach test-drive {key}", f"expected a {OPTIONS[key].__name__}, got {value!r}")
        elif a.startswith("-") or folder is not None:
            raise ConfigError("coreach test-drive", f"unexpected {a!r}; usage: {USAGE}")
        else:
            folder = a
    if folder is None:
        raise ConfigError("coreach test-drive", f"no bundle folder given; usage: {USAGE}")
    if not 0 <= opts["--port"] <= 65535:
        raise ConfigError("coreach test-drive --port", f"expected 0..65535 (0: any free port), got {opts['--port']}")
    if not (math.isfinite(opts["--rate"]) and 10.0 <= opts["--rate"] <= 1000.0):
        raise ConfigError("coreach test-drive --rate", f"expected a control rate in 10..1000 Hz, got {opts['--rate']}")
    for key in ("--position-tol", "--orientation-tol-deg"):
        if not (math.isfinite(opts[key]) and opts[key] > 0):
            raise ConfigError(f"coreach test-drive {key}", f"expected a positive number, got {opts[key]}")
    return folder, opts


def test_drive_command(args: list[str], as_json: bool) -> int:
    ref, opts = parse(args)
    session = Session.open(bundle_folder(ref, "coreach test-drive"))  # verifies the bundle; a tampered one raises BundleError (one line, exit 2)
    drive = Drive(session, opts["--rate"], opts["--position-tol"], opts["--orientation-tol-deg"], opts["--record-dir"])
    try:
        server = TestDriveServer(drive, opts["--host"], opts["--port"])
    except OSError as exc:
        raise ConfigError(f"coreach test-drive {opts['--host']}:{opts['--port']}", f"cannot listen: {exc.strerror}")
    # the handler is in place before the ready line, so a SIGTERM sent on reading it stops cleanly
    done = threading.Event()
    signal.signal(signal.SIGTERM, lambda *_: done.set())
    server.start()
    if as_json:
        print(json.dumps({"url": server.url, "session_id": drive.session_id, "bundle": str(session.manifest.folder),
                          "manifest_sha256": drive.manifest_sha256, "cautions": cautions(recording=True)}),
              flush=True)  # fmt: skip
    else:
        # before the page opens, not after Ctrl-C: a person is about to drive, and perhaps be recorded
        print(NOTICE)
        print("\n".join(caution_lines(recording=True)))
        print(f"bundle {session.manifest.folder} verified (manifest sha256 {drive.manifest_sha256[:16]}...)")
        print(f"test drive: open {server.url} (recordings go to {drive.record_dir}/; Ctrl-C stops)", flush=True)
    try:
        done.wait()
    except KeyboardInterrupt:
        pass
    finally:
        server.close()
    if not as_json and drive.saved:
        print(f"saved {len(drive.saved)} drive(s): {', '.join(drive.saved)}")
    return 0
