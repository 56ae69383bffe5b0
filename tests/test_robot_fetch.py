"""The robot fetch without a tracking server: bad input in one line (exit 2), a silent or wrong server, storage
the robot cannot read, the `current` pointer and `status`. Fetches against the real server are in
tests/lab/test_robot_fetch_server.py."""

from __future__ import annotations

import http.server
import json
import os
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from coreach.runtime import fetch as F
from coreach.runtime.robot_cli import main
from coreach.runtime.store_client import FetchError, StoreClient

ROOT = Path(__file__).resolve().parents[1]
SOURCES = os.pathsep.join(str(ROOT / d) for d in ("pipeline", "plugins", "conf"))


@pytest.fixture
def cache(tmp_path) -> Path:
    """A cache whose model `arm` has a current version 1 (contents do not matter to these tests)."""
    folder = tmp_path / "cache" / "arm"
    (folder / "v1").mkdir(parents=True)
    (folder / "v1" / "marker").write_text("the previous bundle")
    F.switch_current(folder, "v1")
    return tmp_path / "cache"


def _snapshot(cache: Path) -> dict[str, str]:
    return {str(p.relative_to(cache)): (os.readlink(p) if p.is_symlink() else p.read_text() if p.is_file() else "/")
            for p in sorted(cache.rglob("*"))}  # fmt: skip


def run_robot(capsys, *args: str) -> tuple[int, str, str]:
    code = main(list(args))
    out = capsys.readouterr()
    return code, out.out, out.err


def one_line(err: str, *words: str) -> str:
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("coreach-robot: error: "), err
    for w in words:
        assert w in lines[0], lines[0]
    return lines[0]


@pytest.mark.parametrize(("args", "words"), [
    (["fetch"], ["required", "NAME[@ALIAS]"]),
    (["fetch", "../etc"], ["expected NAME or NAME@ALIAS"]),
    (["fetch", "arm@"], ["alias ''"]),
    (["fetch", "arm@a/b"], ["alias 'a/b'"]),
    (["fetch", "arm", "--server", "sqlite:///mlflow.db"], ["http(s) address", "mlflow server"]),
    (["fetch", "arm", "--server", "ftp://host"], ["http(s) address"]),
    (["fetch", "arm", "--server", "http://127.0.0.1:9", "--timeout", "0"], ["--timeout"]),
    (["fetch", "arm", "--timeout", "soon"], ["invalid float value"]),
    (["status", "nothing-here"], ["nothing fetched for nothing-here"]),
    (["launch"], ["invalid choice"]),
], ids=["no name", "path name", "empty alias", "alias with slash", "sqlite store", "ftp", "zero timeout",
        "word timeout", "status unknown", "unknown command"])  # fmt: skip
def test_bad_input_is_one_line_exit_2_and_changes_nothing(capsys, cache, args, words, monkeypatch):
    monkeypatch.delenv("COREACH_TRACKING_URI", raising=False)
    monkeypatch.delenv("MLFLOW_TRACKING_URI", raising=False)
    before = _snapshot(cache)
    code, out, err = run_robot(capsys, *args, "--cache", str(cache))
    assert code == 2
    one_line(err, *words)
    assert "Traceback" not in err and _snapshot(cache) == before


def test_no_server_given_says_how_to_give_one(capsys, cache, monkeypatch):
    monkeypatch.delenv("COREACH_TRACKING_URI", raising=False)
    monkeypatch.delenv("MLFLOW_TRACKING_URI", raising=False)
    code, _, err = run_robot(capsys, "fetch", "arm", "--cache", str(cache))
    assert code == 2
    one_line(err, "--server", "COREACH_TRACKING_URI")


def test_server_from_the_environment(monkeypatch):
    monkeypatch.setenv("COREACH_TRACKING_URI", "http://tracking.lab.example:5000/")
    assert StoreClient(None).server == "http://tracking.lab.example:5000"
    monkeypatch.delenv("COREACH_TRACKING_URI")
    monkeypatch.setenv("MLFLOW_TRACKING_URI", "https://other.example")
    assert StoreClient(None).server == "https://other.example"


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_nobody_listening_is_one_line(capsys, cache):
    before = _snapshot(cache)
    code, _, err = run_robot(capsys, "fetch", "arm", "--server", f"http://127.0.0.1:{_free_port()}", "--cache", str(cache))
    assert code == 2
    one_line(err, "does not answer", "check the address")
    assert _snapshot(cache) == before


def test_a_server_that_never_answers_times_out(capsys, cache):
    """A socket that accepts connections but never replies (a hung server): the short timeout ends the wait."""
    listener = socket.socket()
    listener.bind(("127.0.0.1", 0))
    listener.listen(8)
    try:
        before = _snapshot(cache)
        t0 = time.monotonic()
        code, _, err = run_robot(capsys, "fetch", "arm", "--server", f"http://127.0.0.1:{listener.getsockname()[1]}",
                                 "--timeout", "0.5", "--cache", str(cache))  # fmt: skip
        assert time.monotonic() - t0 < 10
        assert code == 2
        one_line(err, "does not answer", "0.5 s")
        assert _snapshot(cache) == before
    finally:
        listener.close()


class _Html(http.server.BaseHTTPRequestHandler):
    def do_GET(self):  # noqa: N802 - http.server's name
        body = b"<html>a web page, not a tracking server</html>"
        self.send_response(200)
        self.send_header("Content-Type", "text/html")
        self.send_header("Content-Length", str(len(body)))
        self.end_headers()
        self.wfile.write(body)

    def log_message(self, *args):
        pass


def test_a_web_server_that_is_not_a_tracking_server(capsys, cache):
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), _Html)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    try:
        before = _snapshot(cache)
        code, _, err = run_robot(capsys, "fetch", "arm", "--server", f"http://127.0.0.1:{server.server_port}",
                                 "--cache", str(cache))  # fmt: skip
        assert code == 2
        one_line(err, "something other than JSON", "MLflow tracking server")
        assert _snapshot(cache) == before
    finally:
        server.shutdown()


@pytest.mark.parametrize("uri", ["s3://lab-bucket/1/abc/artifacts/bundle", "gs://b/x/bundle",
                                 "wasbs://c@acct.blob.core.windows.net/x/bundle"])  # fmt: skip
def test_storage_behind_credentials_names_proxied_access(uri):
    with pytest.raises(FetchError) as exc:
        F.bundle_source(uri, StoreClient("http://127.0.0.1:9"))
    assert "storage credentials" in str(exc.value) and "--serve-artifacts" in str(exc.value)


def test_a_folder_on_another_computer_names_proxied_access(tmp_path):
    with pytest.raises(FetchError) as exc:
        F.bundle_source(f"file://{tmp_path}/not/here/bundle", StoreClient("http://127.0.0.1:9"))
    assert "another computer's disk" in str(exc.value) and "--serve-artifacts" in str(exc.value)


def test_bundle_sources_by_uri(tmp_path):
    client = StoreClient("http://127.0.0.1:9")
    proxied = F.bundle_source("mlflow-artifacts:/3/abc/artifacts/bundle", client)
    assert proxied.path == "3/abc/artifacts/bundle"
    assert client.artifact_url(f"{proxied.path}/decoder.onnx") == \
        "http://127.0.0.1:9/api/2.0/mlflow-artifacts/artifacts/3/abc/artifacts/bundle/decoder.onnx"
    assert F.bundle_source("mlflow-artifacts://tracking:5000/3/abc/artifacts/bundle", client).path == \
        "3/abc/artifacts/bundle"
    local = F.bundle_source(str(tmp_path), client)
    assert local.folder == tmp_path
    assert F.bundle_source(tmp_path.as_uri(), client).folder == tmp_path


def test_parse_ref_defaults_to_the_fielded_alias():
    assert F.parse_ref("bedside-shelf-decoder") == ("bedside-shelf-decoder", "fielded")
    assert F.parse_ref("bedside-shelf-decoder@gate-passed") == ("bedside-shelf-decoder", "gate-passed")


def test_current_pointer_switches_by_rename(tmp_path):
    folder = tmp_path / "arm"
    for v in ("v1", "v2"):
        (folder / v).mkdir(parents=True)
    F.switch_current(folder, "v1")
    assert os.readlink(folder / "current") == "v1" and F.current_version(folder) == "v1"
    F.switch_current(folder, "v2")
    assert os.readlink(folder / "current") == "v2"
    assert F.current_bundle(tmp_path, "arm") == folder / "v2"
    assert sorted(p.name for p in folder.iterdir()) == ["current", "v1", "v2"]  # nothing left beside it


def test_current_bundle_without_a_fetch(tmp_path):
    with pytest.raises(FetchError, match="no fetched bundle of arm; run coreach-robot fetch arm"):
        F.current_bundle(tmp_path, "arm")


def test_status_refuses_a_current_bundle_that_no_longer_verifies(capsys, cache):
    code, out, err = run_robot(capsys, "status", "--cache", str(cache))
    assert code == 3
    assert "arm: version 1 is current (FAILS verification" in out and "manifest.json" in out


def test_status_of_an_empty_cache(capsys, tmp_path):
    code, out, _ = run_robot(capsys, "status", "--cache", str(tmp_path / "none"))
    assert code == 0 and "no bundles fetched" in out


def test_the_full_cli_runs_the_same_fetch(tmp_path):
    env = {**os.environ, "PYTHONPATH": SOURCES}
    env.pop("COREACH_TRACKING_URI", None)
    res = subprocess.run([sys.executable, "-m", "coreach.cli", "fetch", "arm", "--server", f"http://127.0.0.1:{_free_port()}",
                          "--cache", str(tmp_path)], env=env, capture_output=True, text=True, timeout=120)  # fmt: skip
    assert res.returncode == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("coreach: error: tracking server") and "does not answer" in lines[0]


def test_json_record_of_a_fetch_is_written_beside_the_bundle(tmp_path):
    path = tmp_path / "v3.json"
    F._write_json(path, {"version": "3"})
    F._write_json(path, {"version": "3", "alias": "fielded"})
    assert json.loads(path.read_text()) == {"alias": "fielded", "version": "3"}
    assert [p.name for p in tmp_path.iterdir()] == ["v3.json"]


def test_a_fetch_refused_by_the_lock_leaves_the_other_fetchs_folder(tmp_path, monkeypatch):
    """Two first fetches of one model: the one that loses the lock must not remove the folder the winner is
    filling. (The registry answer is a stand-in here; the race is between the two fetches, not the server.)"""
    import fcntl

    from coreach.runtime.registry_tags import TAG_BUNDLE_URI, TAG_GATE_PASSED, TAG_MANIFEST
    from coreach.runtime.store_client import ModelVersion

    folder = tmp_path / "cache" / "arm"
    held = []
    monkeypatch.setattr(StoreClient, "version_by_alias", lambda self, name, alias: ModelVersion(
        name, "2", "", "r", {TAG_GATE_PASSED: "true", TAG_BUNDLE_URI: str(tmp_path), TAG_MANIFEST: "0" * 64}))
    real_fetch_into = F._fetch_into

    def winner_takes_the_lock_first(*args):
        # the other fetch, which also found no folder, takes the lock just before this one and starts writing
        (folder / "v2-being-written").mkdir()
        fh = open(folder / F.LOCK, "a+")
        fcntl.flock(fh, fcntl.LOCK_EX)
        held.append(fh)
        return real_fetch_into(*args)

    monkeypatch.setattr(F, "_fetch_into", winner_takes_the_lock_first)
    with pytest.raises(FetchError, match="another fetch of this model is running"):
        F.fetch("arm", server="http://127.0.0.1:9", cache=tmp_path / "cache")
    assert (folder / "v2-being-written").is_dir()
    held[0].close()


def test_status_refuses_a_bundle_replaced_after_the_fetch(capsys, tmp_path):
    """A bundle swapped whole (files and a manifest that agree) still verifies on its own; status compares its
    manifest with the hash the registry gave at fetch time (the fetch record) and refuses it."""
    import shutil

    from test_release_units import _meta, _policy

    from coreach.release.bundle_writer import write_bundle
    from coreach.runtime.verify import sha256_file
    from coreach.world.urdf_arm import shipped_urdf

    released = write_bundle(tmp_path / "a", _policy(0), shipped_urdf(), _meta("run-a"), {}, {"ok": True})
    other = write_bundle(tmp_path / "b", _policy(1), shipped_urdf(), _meta("run-b"), {}, {"ok": True})
    folder = tmp_path / "cache" / "arm"
    shutil.copytree(released, folder / "v1")
    F.switch_current(folder, "v1")
    (folder / "v1.json").write_text(json.dumps({"manifest_sha256": sha256_file(released / "manifest.json")}))
    code, out, _ = run_robot(capsys, "status", "--cache", str(tmp_path / "cache"))
    assert code == 0 and "version 1 is current (verified)" in out, out
    shutil.rmtree(folder / "v1")
    shutil.copytree(other, folder / "v1")  # consistent in itself, but not what was released
    code, out, _ = run_robot(capsys, "status", "--cache", str(tmp_path / "cache"))
    assert code == 3, out
    assert "FAILS verification" in out and "differs from the fetch record's manifest_sha256" in out, out


def test_a_full_disk_is_not_reported_as_a_cut_download():
    """A write error on this computer (ENOSPC) says so; only a read error is "cut off"."""
    import errno
    import io

    from coreach.runtime.store_client import copy_stream

    def full_disk(chunk):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    with pytest.raises(FetchError, match="could not be written to this computer's disk \\(No space left on device\\)"):
        copy_stream(io.BytesIO(b"x" * 10), full_disk, None, "bundle/decoder.onnx")

    class Dropped(io.RawIOBase):
        def read(self, n=-1):
            raise ConnectionResetError(errno.ECONNRESET, "Connection reset by peer")

    with pytest.raises(FetchError, match="download was cut off"):
        copy_stream(Dropped(), lambda b: None, None, "bundle/decoder.onnx")


def test_a_cache_that_cannot_be_written_is_one_line_exit_2(capsys, tmp_path, monkeypatch):
    """An OSError from this computer's disk during a fetch (here: the lock file cannot be created because a
    folder stands in its way) is one line and exit 2, not an internal error."""
    from coreach.runtime.registry_tags import TAG_BUNDLE_URI, TAG_GATE_PASSED, TAG_MANIFEST
    from coreach.runtime.store_client import ModelVersion

    monkeypatch.setattr(StoreClient, "version_by_alias", lambda self, name, alias: ModelVersion(
        name, "2", "", "r", {TAG_GATE_PASSED: "true", TAG_BUNDLE_URI: str(tmp_path), TAG_MANIFEST: "0" * 64}))
    (tmp_path / "cache" / "arm" / F.LOCK).mkdir(parents=True)  # open(".lock", "a+") fails: IsADirectoryError
    code, _, err = run_robot(capsys, "fetch", "arm", "--server", "http://127.0.0.1:9", "--cache", str(tmp_path / "cache"))
    assert code == 2, err
    (line,) = err.strip().splitlines()
    assert line.startswith("coreach-robot: error: ") and "Is a directory" in line and "unchanged" in line, line
