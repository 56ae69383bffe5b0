"""The local web server of a test drive: the page, a JSON polling endpoint, and the control-loop thread.

Standard library only (http.server): the page polls about 30 times a second over localhost, which plain
HTTP handles easily, and the robot-side install then needs nothing beyond numpy, onnxruntime and pyarrow.
The server keeps time itself; the page's samples only refresh the stick and its receive time, so a page
that stops sending leaves the Session's watchdog to zero the command.
"""

from __future__ import annotations

import html
import json
import math
import threading
from http import HTTPStatus
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from importlib import resources

from coreach.runtime.cautions import cautions
from coreach.testdrive.sim import Drive

MAX_BODY = 4096  # an input or command message is a few dozen bytes


def fill_page(page: str, items: list[str]) -> bytes:
    """A page with the cautions filled in from their one copy and the shared drawing code (draw.js) inlined, so
    the test-drive and study pages draw the arm with one code and each stays one self-contained file."""
    shared = resources.files("coreach.testdrive").joinpath("draw.js").read_text(encoding="utf-8")
    listed = "".join(f"<li>{html.escape(c)}</li>" for c in items)
    return page.replace("<!--CAUTIONS-->", listed).replace("/*SHARED*/", shared).encode("utf-8")


def page_html() -> bytes:
    """The page, with the cautions filled in (a person drives here and may be recorded)."""
    page = resources.files("coreach.testdrive").joinpath("page.html").read_text(encoding="utf-8")
    return fill_page(page, cautions(recording=True))


class _Handler(BaseHTTPRequestHandler):
    drive: Drive  # set on the subclass made by TestDriveServer
    page: bytes
    allowed_hosts: set[str] | None
    server_version = "coreach-testdrive"

    def log_message(self, fmt, *args) -> None:  # 30 requests a second would flood the terminal
        pass

    def _host_ok(self) -> bool:
        """Refuse requests addressed to another host name (DNS rebinding: a web page elsewhere whose name
        resolves to this machine would otherwise pass as same-origin)."""
        host = (self.headers.get("Host") or "").rsplit(":", 1)[0].strip("[]")
        if self.allowed_hosts is None or host in self.allowed_hosts:
            return True
        self._json({"error": f"host {host!r} refused; open the address the command printed"}, HTTPStatus.FORBIDDEN)
        return False

    def do_GET(self) -> None:
        if not self._host_ok():
            return
        path = self.path.split("?", 1)[0]
        if path in ("/", "/index.html"):
            self._send(HTTPStatus.OK, self.page, "text/html; charset=utf-8")
        elif path == "/api/scene":
            self._json(self.drive.scene())
        elif path == "/api/state":
            self._json(self.drive.state())
        else:
            self._json({"error": "not found"}, HTTPStatus.NOT_FOUND)

    def _post_body(self) -> dict | None:
        """The JSON object of a POST from this page (None: refused, and the answer already sent)."""
        if not self._host_ok():
            return None
        # Only this page may drive: a request from another origin (a web page elsewhere in the same
        # browser) is refused, and JSON bodies force browsers to ask before sending cross-origin.
        origin = self.headers.get("Origin")
        if origin is not None and origin != f"http://{self.headers.get('Host')}":
            self._json({"error": "cross-origin request refused"}, HTTPStatus.FORBIDDEN)
            return None
        try:
            length = int(self.headers.get("Content-Length", "0"))
            if not 0 < length <= MAX_BODY:
                raise ValueError("body size")
            body = json.loads(self.rfile.read(length))
            if not isinstance(body, dict):
                raise ValueError("not an object")
        except (ValueError, json.JSONDecodeError):
            self._json({"error": "expected a small JSON object"}, HTTPStatus.BAD_REQUEST)
            return None
        return body

    def do_POST(self) -> None:
        body = self._post_body()
        if body is None:
            return
        path = self.path.split("?", 1)[0]
        try:
            if path == "/api/input":
                self.drive.set_stick(body.get("stick", []), body.get("source", "page"))
                return self._json(self.drive.state())
            if path == "/api/command":
                return self._json({"result": self._command(body), "state": self.drive.state()})
        except (TypeError, ValueError) as exc:
            return self._json({"error": f"bad request: {exc}"}, HTTPStatus.BAD_REQUEST)
        self._json({"error": "not found"}, HTTPStatus.NOT_FOUND)

    def _command(self, body: dict):
        d, action = self.drive, body.get("action")
        if action == "reset":
            return {"saved": d.reset()}
        if action == "target":
            d.pick_target(int(body.get("goal", 0)))
            return {}
        if action == "record":
            if body.get("on", True):
                d.start_recording()
                return {}
            return {"saved": d.stop_recording()}
        if action == "reset_fault":
            d.reset_fault()
            return {}
        raise ValueError(f"unknown action {action!r}")

    def _json(self, obj, status=HTTPStatus.OK) -> None:
        self._send(status, json.dumps(_finite(obj), allow_nan=False).encode(), "application/json")

    def _send(self, status, data: bytes, kind: str) -> None:
        self.send_response(status)
        self.send_header("Content-Type", kind)
        self.send_header("Content-Length", str(len(data)))
        self.send_header("Cache-Control", "no-store")
        self.end_headers()
        self.wfile.write(data)


def _finite(obj):
    """nan and inf (JSON has neither) -> null, so one odd number cannot break the page's JSON.parse."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: _finite(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_finite(v) for v in obj]
    return obj


class TestDriveServer:
    """The HTTP server and the control loop, both in daemon threads; `close` stops both."""

    def __init__(self, drive: Drive, host: str = "127.0.0.1", port: int = 0):
        # bound to every interface on purpose (--host 0.0.0.0): any name may reach it; else only local names
        allowed = None if host in ("0.0.0.0", "::", "") else {host, "127.0.0.1", "localhost", "::1"}
        handler = type("Handler", (_Handler,), {"drive": drive, "page": page_html(), "allowed_hosts": allowed})
        self.drive = drive
        self.httpd = ThreadingHTTPServer((host, port), handler)
        self.httpd.daemon_threads = True
        self._stop = threading.Event()
        self._threads = [threading.Thread(target=drive.run, args=(self._stop,), name="control", daemon=True),
                         threading.Thread(target=self.httpd.serve_forever, name="http", daemon=True)]

    @property
    def url(self) -> str:
        host, port = self.httpd.server_address[:2]
        return f"http://{host}:{port}/"

    def start(self) -> TestDriveServer:
        for t in self._threads:
            t.start()
        return self

    def close(self) -> None:
        self._stop.set()
        self.httpd.shutdown()
        self.httpd.server_close()
        if self.drive._recording is not None:
            self.drive.stop_recording()  # a drive still being recorded is kept
