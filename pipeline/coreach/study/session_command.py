"""`coreach study session NAME CODE`: serve one participant's session of a frozen study plan on a local page."""

from __future__ import annotations

import argparse
import json
import signal
import threading
import time
from pathlib import Path

from coreach.errors import ConfigError
from coreach.runtime.cautions import caution_lines, cautions
from coreach.study.files import private_folder
from coreach.study.plan import DEFAULT_ROOT, PLAN_FILE, SESSIONS, latest_folder, read_plan
from coreach.study.rig import Rig, resolve_bundles
from coreach.study.server import StudyServer
from coreach.study.session import SessionLock, StudySession

USAGE = ("coreach [--json] study session NAME CODE [--version N] [--root DIR] [--host 127.0.0.1] [--port 8766] "
         "[--uri URI]")  # fmt: skip
NOTICE = ("SIMULATION ONLY. Research software, not a medical device. Nothing this server or its page does can "
          "command a real robot: the arm is a kinematic simulation.")


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # argparse would print its usage and exit; coreach reports one line
        raise ConfigError(self.prog, f"{message} (usage: {self.usage})")


def parse(args: list[str]) -> argparse.Namespace:
    p = _Parser(prog="coreach study session", usage=USAGE, add_help=False)
    p.add_argument("name")
    p.add_argument("code")
    p.add_argument("--version", type=int, default=None)
    p.add_argument("--root", type=Path, default=DEFAULT_ROOT)
    p.add_argument("--host", default="127.0.0.1")
    p.add_argument("--port", type=int, default=8766)
    p.add_argument("--uri", default=None)
    ns = p.parse_args(args)
    if not 0 <= ns.port <= 65535:
        p.error(f"--port {ns.port}: expected 0..65535 (0: any free port)")
    return ns


def _known_code(folder: Path, ns: argparse.Namespace, document: dict) -> None:
    """An unknown or withdrawn code is refused before anything is written: StudySession.open gives the one
    line. (A known code is opened only under the session lock: opening marks a trial left in progress
    incomplete, which must not happen to a session another server is running.)"""
    codes = {p["code"] for p in document["plan"]["participants"]}
    withdrawn = folder / "withdrawn.json"
    if ns.code not in codes or withdrawn.is_file():
        StudySession.open(ns.root, ns.name, ns.code, document["version"])  # raises for an unknown or withdrawn code


def session_command(args: list[str], as_json: bool) -> int:
    ns = parse(args)
    folder = latest_folder(ns.root, ns.name, ns.version)
    document = read_plan(folder / PLAN_FILE)
    _known_code(folder, ns, document)
    plan = document["plan"]
    # the bundles are checked (verified, vetted unless a pilot) before a session folder exists
    bundles = resolve_bundles(plan, f"study {plan['name']}", ns.uri)
    private_folder(folder / SESSIONS)  # the lock creates the code's folder, but not its parent, owner-only
    with SessionLock(folder / SESSIONS / ns.code):
        session = StudySession.open(ns.root, ns.name, ns.code, document["version"])
        rig = Rig(session, bundles, float(plan["config"]["session_rate_hz"]), time.monotonic)
        for letter in session.letters:  # every condition's Drive now, so no trial waits for one to load
            rig.drive(letter)
        try:
            server = StudyServer(session, rig, ns.host, ns.port)
        except OSError as exc:
            raise ConfigError(f"coreach study session {ns.host}:{ns.port}", f"cannot listen: {exc.strerror}") from None
        # the handler is in place before the ready line, so a SIGTERM sent on reading it stops cleanly
        stop = threading.Event()
        signal.signal(signal.SIGTERM, lambda *_: stop.set())
        server.start()
        if as_json:
            print(json.dumps({"url": server.url, "participant": session.code, "version": session.version,
                              "cautions": cautions(recording=True, study=True)}), flush=True)  # fmt: skip
        else:
            # before the page opens: a person is about to drive and be recorded
            print(NOTICE)
            print("\n".join(caution_lines(recording=True, study=True)))
            done, total = session.progress()
            print(f"study {plan['name']} v{session.version}, participant {session.code}: {done} of {total} steps "
                  f"done; records to {session.folder}")  # fmt: skip
            if session.resumed_incomplete:
                print(f"trial {session.resumed_incomplete} was interrupted last time: marked incomplete, the "
                      "session goes on with the next step")  # fmt: skip
            print(f"open {server.url} (reloading the page ends a running trial as incomplete; Ctrl-C stops)",
                  flush=True)  # fmt: skip
        try:
            stop.wait()
        except KeyboardInterrupt:
            pass
        finally:
            server.close()
    if not as_json:
        done, total = session.progress()
        print(f"session stopped: {done} of {total} steps done")
    return 0
