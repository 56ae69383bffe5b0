"""A tracking server's model registry and proxied artifact store over its REST API, with the standard library only.

The robot computer has neither torch nor mlflow installed: the few calls a fetch needs (one model version by
alias, artifact downloads through the server) are plain HTTP GETs answered with JSON or the file's bytes, so
`urllib` is enough and the runtime install stays numpy + onnxruntime. Endpoints (MLflow REST API 2.0):

    GET {server}/api/2.0/mlflow/registered-models/alias?name=NAME&alias=ALIAS   -> {"model_version": {...}}
    GET {server}/api/2.0/mlflow-artifacts/artifacts/<path>                      -> the file (proxied access)

Every failure is a `FetchError` (one line: what, where, what to do) or, when what the server holds contradicts
the release record, a `RefusedBundle`.
"""

from __future__ import annotations

import base64
import hashlib
import http.client
import json
import os
import socket
import urllib.error
import urllib.parse
import urllib.request
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, BinaryIO

from coreach.errors import CoreachError

API = "/api/2.0/mlflow"
ARTIFACTS_API = "/api/2.0/mlflow-artifacts/artifacts"
PROXIED_SCHEME = "mlflow-artifacts:"
CHUNK = 1 << 20


class FetchError(CoreachError):
    """The fetch could not run (bad reference, unknown model or alias, server silent, bundle not reachable);
    nothing on the robot computer changed."""


class RefusedBundle(CoreachError):
    """What the store holds does not match what was released (hashes, missing files): refused, nothing changed."""


@dataclass
class ModelVersion:
    """The registry's answer for NAME@ALIAS: its number, source, run and tags (key -> value)."""

    name: str
    version: str
    source: str
    run_id: str
    tags: dict[str, str] = field(default_factory=dict)


def resolve_server(server: str | None) -> str:
    """The tracking server's base URL: `server`, else COREACH_TRACKING_URI, else MLFLOW_TRACKING_URI."""
    where = "option --server"
    if not server:
        for var in ("COREACH_TRACKING_URI", "MLFLOW_TRACKING_URI"):
            if os.environ.get(var):
                server, where = os.environ[var], f"environment variable {var}"
                break
    if not server:
        raise FetchError("tracking server", "not given; pass --server http://HOST:PORT or set COREACH_TRACKING_URI")
    parts = urllib.parse.urlsplit(server)
    if parts.scheme not in ("http", "https") or not parts.netloc:
        raise FetchError(f"{where} {server!r}", "expected the http(s) address of a tracking server (the robot "
                                                 "reads the registry over HTTP; a local store such as sqlite:///... "
                                                 "needs `mlflow server` in front of it)")
    return server.rstrip("/")


def _auth_header() -> dict[str, str]:
    """MLflow's own client variables, for servers behind basic auth or a token."""
    token = os.environ.get("MLFLOW_TRACKING_TOKEN")
    if token:
        return {"Authorization": f"Bearer {token}"}
    user, password = os.environ.get("MLFLOW_TRACKING_USERNAME"), os.environ.get("MLFLOW_TRACKING_PASSWORD")
    if user and password:
        return {"Authorization": "Basic " + base64.b64encode(f"{user}:{password}".encode()).decode()}
    return {}


def _error_body(exc: urllib.error.HTTPError) -> tuple[str, str]:
    """(error_code, message) of an MLflow error answer, or ("", first line of the body)."""
    try:
        raw = exc.read(4096).decode("utf-8", "replace")
    except OSError:
        raw = ""
    try:
        data = json.loads(raw)
        return str(data.get("error_code", "")), str(data.get("message", "")).splitlines()[0][:200]
    except (ValueError, AttributeError, IndexError):
        return "", (raw.strip().splitlines() or [""])[0][:200]


class StoreClient:
    """Registry look-ups and artifact downloads against one tracking server, each bounded by `timeout` seconds
    (per connection attempt and per read)."""

    def __init__(self, server: str | None, timeout: float = 10.0):
        self.server = resolve_server(server)
        if not (isinstance(timeout, (int, float)) and 0 < timeout <= 3600):
            raise FetchError("option --timeout", f"expected seconds in (0, 3600], got {timeout!r}")
        self.timeout = float(timeout)
        self._headers = {"Accept": "application/json", **_auth_header()}

    # ------------------------------------------------------------------------------------------ transport
    def _open(self, url: str, what: str):
        req = urllib.request.Request(url, headers=self._headers)
        try:
            return urllib.request.urlopen(req, timeout=self.timeout)  # noqa: S310 - http(s) only (resolve_server)
        except urllib.error.HTTPError:
            raise
        except (urllib.error.URLError, TimeoutError, socket.timeout, ConnectionError, http.client.HTTPException,
                OSError) as exc:  # fmt: skip
            reason = getattr(exc, "reason", exc)
            raise FetchError(f"tracking server {self.server}", f"does not answer ({reason}; waited up to {self.timeout:g} s) "
                                                               f"while asking for {what}; check the address and that "
                                                               "the server runs") from None  # fmt: skip

    def _json(self, path: str, query: dict[str, str], what: str) -> dict[str, Any]:
        url = f"{self.server}{path}?{urllib.parse.urlencode(query)}"
        with self._open(url, what) as resp:
            try:
                raw = resp.read()
            except (TimeoutError, socket.timeout, OSError, http.client.HTTPException) as exc:
                raise FetchError(f"tracking server {self.server}", f"answer for {what} was cut off ({exc})") from None
        try:
            data = json.loads(raw)
        except ValueError:
            raise FetchError(f"tracking server {self.server}", f"answered {what} with something other than JSON; is "
                                                               "this the address of an MLflow tracking server?") from None
        if not isinstance(data, dict):
            raise FetchError(f"tracking server {self.server}", f"answered {what} with {type(data).__name__}, expected "
                                                               "a JSON object")  # fmt: skip
        return data

    def _http_error(self, exc: urllib.error.HTTPError, what: str) -> FetchError:
        code, message = _error_body(exc)
        if exc.code in (401, 403):
            return FetchError(f"tracking server {self.server}", f"refused access to {what} (HTTP {exc.code}); set "
                                                                "MLFLOW_TRACKING_USERNAME and MLFLOW_TRACKING_PASSWORD "
                                                                "(or MLFLOW_TRACKING_TOKEN)")  # fmt: skip
        return FetchError(f"tracking server {self.server}", f"answered HTTP {exc.code} {code or ''} for {what}: "
                                                            f"{message or exc.reason}".replace("  ", " "))  # fmt: skip

    # ------------------------------------------------------------------------------------------ registry
    def version_by_alias(self, name: str, alias: str) -> ModelVersion:
        what = f"{name}@{alias}"
        try:
            data = self._json(f"{API}/registered-models/alias", {"name": name, "alias": alias}, what)
        except urllib.error.HTTPError as exc:
            code, message = _error_body(exc)
            if code == "RESOURCE_DOES_NOT_EXIST":
                raise FetchError(f"model {name}", f"no such registered model on {self.server}") from None
            if code == "INVALID_PARAMETER_VALUE" and "alias" in message.lower():
                raise FetchError(f"model {name}", f"has no alias @{alias} on {self.server} (field a version with "
                                                  f"coreach promote {name} VERSION)") from None  # fmt: skip
            raise self._http_error(exc, what) from None
        mv = data.get("model_version")
        if not isinstance(mv, dict) or "version" not in mv:
            raise FetchError(f"tracking server {self.server}", f"answer for {what} has no model_version")
        tags = {str(t.get("key")): str(t.get("value", "")) for t in mv.get("tags") or [] if isinstance(t, dict)}
        return ModelVersion(name=name, version=str(mv["version"]), source=str(mv.get("source") or ""),
                            run_id=str(mv.get("run_id") or ""), tags=tags)  # fmt: skip

    # ------------------------------------------------------------------------------------------ artifacts
    def artifact_url(self, path: str) -> str:
        return f"{self.server}{ARTIFACTS_API}/{urllib.parse.quote(path.strip('/'))}"

    def read_artifact(self, path: str, limit: int = 64 << 20) -> bytes:
        """A small artifact's bytes (the manifest), through the server's proxied artifact access."""
        chunks: list[bytes] = []
        self._stream(path, lambda b: chunks.append(b), limit)
        return b"".join(chunks)

    def download_artifact(self, path: str, dest: Path) -> str:
        """Stream an artifact to `dest` (fsynced); returns its sha256."""
        h = hashlib.sha256()
        with open(dest, "wb") as out:
            self._stream(path, lambda b: (h.update(b), out.write(b)), None)
            out.flush()
            os.fsync(out.fileno())
        return h.hexdigest()

    def _stream(self, path: str, sink, limit: int | None) -> None:
        what = f"artifact {path}"
        try:
            resp = self._open(self.artifact_url(path), what)
        except urllib.error.HTTPError as exc:
            code, message = _error_body(exc)
            if exc.code == 404 or code == "RESOURCE_DOES_NOT_EXIST":
                raise RefusedBundle(f"{PROXIED_SCHEME}{path}", "missing from the tracking server's artifact store; "
                                                               "the bundle there is incomplete") from None  # fmt: skip
            raise self._http_error(exc, what) from None
        with resp:
            got = copy_stream(resp, sink, limit, f"{PROXIED_SCHEME}{path}")
            declared = resp.headers.get("Content-Length")
        # http.client ends a chunked read quietly when the connection drops: compare with what was announced
        if declared is not None and declared.isdigit() and got != int(declared):
            raise FetchError(f"{PROXIED_SCHEME}{path}", f"download was cut off ({got} of {declared} bytes arrived)")


def copy_stream(src: BinaryIO, sink, limit: int | None, where: str) -> int:
    """Read `src` in chunks into `sink`; FetchError if it is cut off or exceeds `limit` bytes."""
    total = 0
    try:
        while True:
            chunk = src.read(CHUNK)
            if not chunk:
                break
            total += len(chunk)
            if limit is not None and total > limit:
                raise FetchError(where, f"larger than {limit} bytes; not a bundle manifest")
            try:
                sink(chunk)
            except OSError as exc:  # this computer's disk (full, read-only, failing), not the download
                raise FetchError(where, f"could not be written to this computer's disk ({exc.strerror or exc}); "
                                        "free space or fix the cache folder, then fetch again") from None  # fmt: skip
    except (TimeoutError, socket.timeout, ConnectionError, http.client.HTTPException, OSError) as exc:
        raise FetchError(where, f"download was cut off ({type(exc).__name__}: {exc})") from None
    return total
