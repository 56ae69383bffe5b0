"""The local web server of one participant's session: the study page, its JSON API, and the trial's control loop.

Built on the test-drive server's handler (the same host and origin checks, no request log) and its drawing
code. What differs: the arm moves only while a trial runs (the control thread ticks the trial's Drive at the
plan's session rate and ends the trial on arrival or at the time limit), every step goes through the
StudySession (written after every step), and the page is blinded: it sees the conditions only as letters, so
nothing it receives names a condition, its kind or its bundle.

Privacy: nothing here stores or prints a client's address, user agent or other browser detail; the session's
files hold only what StudySession writes and the trials' recorded drives.
"""

from __future__ import annotations

import sys
import threading
from http import HTTPStatus
from http.server import ThreadingHTTPServer
from importlib import resources

from coreach.errors import ConfigError, CoreachError
from coreach.runtime.cautions import cautions
from coreach.study.rig import Rig
from coreach.study.session import StudySession
from coreach.study.tlx import SUBSCALES
from coreach.study.trial import TrialRun
from coreach.testdrive.server import _finite, _Handler, fill_page

# what the Drive's views carry that could name a condition (the bundle's folder, its manifest's hash) or
# a file (saved drives); the action map is the first bundle's decoder even in a baseline block: all left out
HIDDEN_SCENE = ("bundle", "manifest_sha256", "session_id")
HIDDEN_STATE = ("saved", "action_map")
RELOADED = "the page was reloaded"
STOPPED = "the session server was stopped"
IDLE_WAIT_S = 0.1  # between trials the control thread sleeps; a started trial wakes it at once


def study_page() -> bytes:
    """The study page with the cautions (a study with people: ethics approval and consent) and the shared
    drawing code filled in."""
    page = resources.files("coreach.study").joinpath("study.html").read_text(encoding="utf-8")
    return fill_page(page, cautions(recording=True, study=True))


def display_name(goal: str) -> str:
    """A goal as the participant reads it: "lamp_switch" -> "lamp switch"."""
    return goal.replace("_", " ")


class _QuietServer(ThreadingHTTPServer):
    daemon_threads = True

    def handle_error(self, request, client_address) -> None:
        # the default prints the client's address with a traceback; a study server names no client
        print(f"coreach study session: a request failed: {sys.exc_info()[1]!r}", file=sys.stderr)


class StudyServer:
    """The HTTP server and the control loop of one participant's session; `close` stops both (a trial still
    running is marked incomplete). Every StudySession call and the trial in progress sit under `lock`."""

    def __init__(self, session: StudySession, rig: Rig, host: str = "127.0.0.1", port: int = 0):
        self.session, self.rig = session, rig
        self.lock = threading.RLock()
        self.run: TrialRun | None = None
        self.last: dict | None = None  # the latest ended trial, briefly, for the page
        if session.resumed_incomplete:  # opening the session ended a trial a killed server left running
            self.last = {"step": session.resumed_incomplete, "complete": False,
                         "why": "the session stopped during it"}  # fmt: skip
        self.error: str | None = None
        self._stop, self._wake = threading.Event(), threading.Event()
        allowed = None if host in ("0.0.0.0", "::", "") else {host, "127.0.0.1", "localhost", "::1"}
        handler = type("Handler", (_StudyHandler,), {"study": self, "page": study_page(), "allowed_hosts": allowed})
        self.httpd = _QuietServer((host, port), handler)
        self._threads = [threading.Thread(target=self._control, name="control", daemon=True),
                         threading.Thread(target=self.httpd.serve_forever, name="http", daemon=True)]  # fmt: skip
        with self.lock:
            self._prepare()

    @property
    def url(self) -> str:
        host, port = self.httpd.server_address[:2]
        return f"http://{host}:{port}/"

    def start(self) -> StudyServer:
        for t in self._threads:
            t.start()
        return self

    def close(self) -> None:
        with self.lock:
            self._abort(STOPPED)
        self._stop.set()
        self._wake.set()
        self.httpd.shutdown()
        self.httpd.server_close()

    # ------------------------------------------------------------------------------------------ control
    def _control(self) -> None:
        """Tick the running trial's Drive at the session rate (paced as Drive.run: a late tick restarts the
        schedule rather than catching up, so the arm never jumps); idle between trials."""
        dt, clock = 1.0 / self.rig.rate_hz, self.rig.clock
        due = None
        while not self._stop.is_set():
            with self.lock:
                run = self.run
                if run is not None:
                    try:
                        run.drive.tick()
                        run.update()
                        if run.finished:
                            self._finish(run)
                    except Exception as exc:  # a bug: the arm stops, the trial does not count, the page says so
                        self.error = f"control loop stopped: {type(exc).__name__}: {exc}"
                        self._abort(self.error)
            if run is None:
                due = None
                self._wake.wait(IDLE_WAIT_S)
                self._wake.clear()
                continue
            due = clock() if due is None else due
            due += dt
            wait = due - clock()
            if wait < -dt:
                due = clock()
            elif wait > 0:
                self._stop.wait(wait)

    def _finish(self, run: TrialRun) -> None:
        run.stop()
        result = run.result()
        self.session.end_trial(run.spec.step_id, result, self.rig.save(run))
        self.run = None
        self.last = {"step": run.spec.step_id, "complete": True, "success": bool(result["success"]),
                     "time_s": result["time_s"], "goal": self._goal_name(run, run.wanted)}  # fmt: skip
        self._prepare()

    def _abort(self, why: str) -> None:
        """End the running trial as incomplete (its partial drive is not kept: the trial does not count)."""
        run, self.run = self.run, None
        if run is None:
            return
        run.stop()
        step_id = self.session.abort_trial(why)
        self.last = {"step": step_id, "complete": False, "why": why}
        self._prepare()

    def _prepare(self) -> None:
        """The next trial's arm at home with its goal marked, so the page shows where the trial starts."""
        step = self.session.current()
        if step is None or step.kind != "trial":
            return
        d = self.rig.drive(step.letter)
        d.reset()
        d.pick_target(list(d.manifest.goal_names).index(self.session.task_of(step)["goal"]))

    @staticmethod
    def _goal_name(run: TrialRun, index: int) -> str:
        return display_name(run.drive.manifest.goal_names[index])

    # ------------------------------------------------------------------------------------------ views
    def view(self) -> dict:
        """The current step as the page shows it: letters only, never a condition's name, kind or bundle."""
        with self.lock:
            s = self.session
            step = s.current()
            done, total = s.progress()
            out = {"kind": step.kind if step else "done", "id": step.id if step else None,
                   "letter": step.letter if step else None, "practice": bool(step and step.practice),
                   "index": step.index if step else 0, "of": step.total if step else 0,
                   "progress": {"done": done, "total": total}, "consent_done": s.state["consent_at"] is not None,
                   "participant": s.code, "running": self.run is not None, "last": self.last, "error": self.error,
                   "interrupted": s.resumed_incomplete, "cautions": cautions(recording=True, study=True),
                   "instruction": None, "trial": None, "letters": None}  # fmt: skip
            if step is not None and step.kind == "trial":
                task = s.task_of(step)
                text = f"Move the hand to the {display_name(task['goal'])}."
                if task.get("switch_to"):
                    text += f" Part-way through you will be asked to go to the {display_name(task['switch_to'])}."
                out["instruction"] = text
            if step is not None and step.kind == "ranking":
                out["letters"] = list(s.letters)
            run = self.run
            if run is not None:
                sess = run.drive.session
                out["trial"] = {"elapsed": run.elapsed, "time_limit_s": run.spec.time_limit_s,
                                "wanted": self._goal_name(run, run.wanted), "switched": run.switched,
                                "mode": int(getattr(sess, "mode", 0)) + 1,
                                "modes": int(getattr(sess, "n_modes", 1))}  # fmt: skip
        return _finite(out)

    def _view_drive(self):
        with self.lock:
            if self.run is not None:
                return self.run.drive
            step = self.session.current()
            if step is not None and step.kind == "trial":
                return self.rig.drive(step.letter)
        return None

    def scene(self) -> dict | None:
        d = self._view_drive()
        if d is None:
            return None
        return {k: v for k, v in d.scene().items() if k not in HIDDEN_SCENE}

    def state(self) -> dict | None:
        d = self._view_drive()
        if d is None:
            return None
        return {k: v for k, v in d.state().items() if k not in HIDDEN_STATE}

    # ------------------------------------------------------------------------------------------ actions
    def on_hello(self, body: dict) -> dict:
        """The page (re)loaded: a trial still running was left by the previous page and cannot be resumed."""
        with self.lock:
            self._abort(RELOADED)
        return self.view()

    def on_consent(self, body: dict) -> dict:
        if body.get("confirmed") is not True:
            raise ConfigError("consent", "expected {\"confirmed\": true}: the experimenter confirms that the "
                                         "participant's informed consent was recorded")  # fmt: skip
        with self.lock:
            self.session.consent()
            self._prepare()
        return self.view()

    def on_start(self, body: dict) -> dict:
        step_id = str(body.get("step"))
        with self.lock:
            if self.run is not None:
                raise ConfigError("start", f"trial {self.run.spec.step_id} is already running")
            step = self.session.current()
            if step is None or step.kind != "trial" or step.id != step_id:
                self.session.begin_trial(step_id)  # not the next trial: raises, naming the next step
            run = self.rig.trial(step)
            self.session.begin_trial(step.id)  # written before the arm moves
            run.start()
            self.run, self.last, self.error = run, None, None
        self._wake.set()
        return self.view()

    def on_stick(self, body: dict) -> dict:
        """A stick sample; it reaches the arm only while a trial runs (between trials nothing moves)."""
        run = self.run
        if run is not None:
            source = body.get("source")  # which device drove, recorded with the drive; nothing else of it
            run.drive.set_stick(body.get("stick", []), source if source in ("gamepad", "keyboard") else "page")
        return {"study": self.view(), "state": self.state()}

    def on_mode(self, body: dict) -> dict:
        with self.lock:
            if self.run is not None:
                self.run.switch_mode()
        return self.view()

    def on_tlx(self, body: dict) -> dict:
        with self.lock:
            self.session.answer_tlx(str(body.get("step")), {s: body.get(s) for s in SUBSCALES})
            self._prepare()
        return self.view()

    def on_liking(self, body: dict) -> dict:
        comment = body.get("comment") or ""
        if not isinstance(comment, str):
            raise ConfigError("liking comment", "expected text")
        with self.lock:
            self.session.answer_liking(str(body.get("step")), body.get("rating"), comment)
            self._prepare()
        return self.view()

    def on_ranking(self, body: dict) -> dict:
        order, comment = body.get("order"), body.get("comment") or ""
        if not isinstance(order, list) or not isinstance(comment, str):
            raise ConfigError("ranking", "expected {\"order\": [letters], \"comment\": text}")
        with self.lock:
            self.session.answer_ranking(order, comment)
        return self.view()


class _StudyHandler(_Handler):
    study: StudyServer  # set on the subclass made by StudyServer
    server_version = "coreach-study"
    POSTS = {"/api/study/hello": "on_hello", "/api/study/consent": "on_consent", "/api/study/start": "on_start",
             "/api/input": "on_stick", "/api/study/mode": "on_mode", "/api/study/tlx": "on_tlx",
             "/api/study/liking": "on_liking", "/api/study/ranking": "on_ranking"}  # fmt: skip

    def do_GET(self) -> None:
        if not self._host_ok():
            return
        path = self.path.split("?", 1)[0]
        if path in ("/", "/index.html"):
            self._send(HTTPStatus.OK, self.page, "text/html; charset=utf-8")
        elif path == "/api/study":
            self._json(self.study.view())
        elif path == "/api/scene":
            self._json(self.study.scene())
        elif path == "/api/state":
            self._json(self.study.state())
        else:
            self._json({"error": "not found"}, HTTPStatus.NOT_FOUND)

    def do_POST(self) -> None:
        body = self._post_body()
        if body is None:
            return
        name = self.POSTS.get(self.path.split("?", 1)[0])
        if name is None:
            return self._json({"error": "not found"}, HTTPStatus.NOT_FOUND)
        try:
            answer = getattr(self.study, name)(body)
        except CoreachError as exc:  # a refused answer (out of range, not the next step): one line, nothing stored
            return self._json({"error": str(exc)}, HTTPStatus.BAD_REQUEST)
        except (TypeError, ValueError) as exc:
            return self._json({"error": f"bad request: {exc}"}, HTTPStatus.BAD_REQUEST)
        self._json(answer)
