"""`coreach test-drive` in a real browser: headless Chromium (Debian's) driven by Playwright's Python API.

The server runs as the real command in a subprocess (it prints its address with --json); the page is the
shipped one. The gamepad path is tested with a scripted Gamepad API stub: an init script replaces
navigator.getGamepads before the page loads, since headless Chromium has no gamepad.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

import numpy as np
import pytest
import torch

from coreach.context import ContextSpec
from coreach.episodes import load_parquet
from coreach.decoder.policy import DecoderPolicy
from coreach.release.bundle_writer import write_bundle
from coreach.runtime.kinematics import Chain
from coreach.world.urdf_arm import SEVEN_JOINT_ARM_HOME, shipped_urdf

pytestmark = pytest.mark.slow

ROOT = Path(__file__).resolve().parents[1]
SCREENSHOT = ROOT / "reports" / "testdrive.png"
GOALS = ["cup", "switch", "drawer", "bottle", "door", "book"]
ARM_RGB = (0x4A, 0x5A, 0x70)  # the page's link colour
FURNITURE_RGB = (0x8C, 0x84, 0x78)  # the page's furniture and person outline colours
PERSON_RGB = (0x7A, 0x3F, 0xB0)


@pytest.fixture(scope="module")
def bundle(tmp_path_factory) -> Path:
    """A small untrained decoder released with write_bundle (no training: the page, not the decoder, is tested).

    Six goals 0.15 m from the home tool position, one along each base axis: whichever way the untrained
    decoder moves the tool, some stick heads within 55 degrees of a goal (max cosine >= 1/sqrt(3)), and
    the action map shows which. The shipped bedside-shelf scene's bodies go into safety.world through the
    release's own helper, so the page draws the furniture and person a released bundle carries; the home
    pose is clear of them (person 0.29 m, beyond the 0.23 m reduced-speed zone).
    """
    from coreach.release.metadata import _world_section
    from coreach.world.scenario import load_scenario
    from coreach.world.urdf_arm import UrdfArm

    torch.manual_seed(0)
    spec = ContextSpec(dof=7, n_goals=len(GOALS))
    policy = DecoderPolicy.build({"_target_": "coreach_plugins.model.cvae.BeliefCVAE", "latent_dim": 2,
                                  "hidden": [32, 32]}, spec, 7)  # fmt: skip
    policy.set_normalisation(torch.randn(400, spec.width) * 0.5, torch.randn(400, 7) * 0.3)
    home, _ = Chain.from_urdf(shipped_urdf()).fk(np.array(SEVEN_JOINT_ARM_HOME))
    offsets = np.concatenate([np.eye(3), -np.eye(3)]) * 0.15
    meta = {
        "goal_names": GOALS,
        "nominal_layout": {
            "goal_pos": (home + offsets).tolist(),
            "goal_quat": [[0.7071068, 0.0, 0.7071068, 0.0]] * len(GOALS),
            "goal_fine": (offsets / 5).tolist(),
        },
        "dataset_fingerprint": "sha256:feed", "training_run_id": "run-testdrive", "git_commit": "0" * 40,
        "q_home": list(SEVEN_JOINT_ARM_HOME),
        "safety": {"workspace_min": [0.0, -0.6, 0.0], "workspace_max": [0.9, 0.6, 0.9]},
        "parity_n": 200,
        "world": _world_section(UrdfArm(), load_scenario("bedside_shelf")),
    }
    return write_bundle(tmp_path_factory.mktemp("td") / "bundle", policy, shipped_urdf(), meta, {}, {"passed": True})


def _command(*args: str) -> list[str]:
    return [sys.executable, "-m", "coreach.cli", *args]


def _env() -> dict:
    env = dict(os.environ, CI=os.environ.get("CI", ""))
    # the subprocess resolves coreach from the same source folders as this test run
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "pipeline"), str(ROOT / "plugins"), str(ROOT / "conf"),
                                         env.get("PYTHONPATH", "")])  # fmt: skip
    return env


@pytest.fixture(scope="module")
def server(bundle, tmp_path_factory):
    drives = tmp_path_factory.mktemp("drives")
    proc = subprocess.Popen(_command("--json", "test-drive", str(bundle), "--port", "0", "--record-dir", str(drives)),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=_env())  # fmt: skip
    line = proc.stdout.readline()
    if not line:
        proc.kill()
        pytest.fail(f"test-drive did not start: {proc.stderr.read()}")
    info = json.loads(line)
    yield info["url"], info, drives
    proc.terminate()
    proc.wait(timeout=20)


def _get(url: str, path: str) -> dict:
    with urllib.request.urlopen(url + path, timeout=5) as r:
        return json.load(r)


def _post(url: str, path: str, body: dict) -> dict:
    req = urllib.request.Request(url + path, data=json.dumps(body).encode(),
                                 headers={"Content-Type": "application/json"})
    with urllib.request.urlopen(req, timeout=5) as r:
        return json.load(r)


def _open(browser, url: str, init_script: str | None = None, query: str = ""):
    page = browser.new_page(viewport={"width": 1280, "height": 800})
    if init_script:
        page.add_init_script(init_script)
    _post(url, "api/command", {"action": "reset"})
    page.goto(url + query)
    page.wait_for_function("window.testdrive && window.testdrive.state() !== null")
    return page


KEYS = {(1, 0): ["ArrowRight"], (-1, 0): ["ArrowLeft"], (0, 1): ["ArrowUp"], (0, -1): ["ArrowDown"],
        (1, 1): ["ArrowRight", "ArrowUp"], (1, -1): ["ArrowRight", "ArrowDown"],
        (-1, 1): ["ArrowLeft", "ArrowUp"], (-1, -1): ["ArrowLeft", "ArrowDown"]}  # fmt: skip


def _best_keys(state: dict, scene: dict) -> tuple[list[str], int]:
    """From the page's action map at the home state: the arrow keys whose stick heads most directly for a goal
    (what a person reads off the map), and that goal."""
    pos = np.array(state["links"][-1][0])
    best = (-2.0, None, None)
    for stick, vel in zip(state["action_map"]["stick"], state["action_map"]["tool_velocity"]):
        key = (round(stick[0]), round(stick[1]))
        if key not in KEYS or not np.allclose(stick, key):  # sticks the arrow keys can give
            continue
        v = np.array(vel)
        for g, t in enumerate(scene["goal_targets"]):
            to_goal = np.array(t[0]) - pos
            cos = float(v @ to_goal) / (np.linalg.norm(v) * np.linalg.norm(to_goal) + 1e-12)
            if cos > best[0]:
                best = (cos, KEYS[key], g)
    assert best[0] > 0.5, f"no stick direction heads for a goal (best cosine {best[0]:.2f})"
    return best[1], best[2]


def _hold(page, keys: list[str], seconds: float) -> None:
    page.locator("#view").click()  # focus the page, as a person would
    for k in keys:
        page.keyboard.down(k)
    time.sleep(seconds)
    for k in keys:
        page.keyboard.up(k)


def test_holding_a_key_moves_the_tool_toward_a_goal_and_its_belief_rises(server, browser):
    url, _, _ = server
    page = _open(browser, url)
    scene, start = _get(url, "api/scene"), _get(url, "api/state")
    keys, goal = _best_keys(start, scene)
    uniform = 1.0 / len(GOALS)
    assert start["belief"] == pytest.approx([uniform] * len(GOALS))
    _hold(page, keys, 1.2)
    end = _get(url, "api/state")
    target = np.array(scene["goal_targets"][goal][0])
    d0 = np.linalg.norm(target - start["links"][-1][0])
    d1 = np.linalg.norm(target - end["links"][-1][0])
    assert d1 < d0 - 0.01, f"tool did not approach {GOALS[goal]}: {d0:.3f} m -> {d1:.3f} m"
    assert end["belief"][goal] > uniform + 0.05, end["belief"]
    assert end["input_source"] == "keyboard"
    # the page shows the same belief the server holds (bar order = goal order)
    shown = page.evaluate("window.testdrive.state().belief")
    assert shown[goal] > uniform + 0.05
    page.close()


def test_a_page_that_stops_sending_stops_the_arm_within_the_watchdog_timeout(server, browser):
    url, _, _ = server
    page = _open(browser, url)
    scene = _get(url, "api/scene")
    timeout, dt = scene["watchdog_timeout_s"], 1.0 / scene["rate_hz"]
    page.locator("#view").click()
    page.keyboard.down("ArrowRight")
    deadline = time.monotonic() + 3.0
    while not any(_get(url, "api/state")["qd"]) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert any(_get(url, "api/state")["qd"]), "the arm never moved"
    page.route("**/api/input", lambda route: route.abort())  # the page's input stops reaching the server
    t_cut = time.monotonic()
    while True:
        st = _get(url, "api/state")
        if not any(st["qd"]):
            break
        assert time.monotonic() - t_cut < timeout + 1.0, "the arm kept moving without input"
        time.sleep(0.01)
    # stopped by the watchdog (not by a released key) at the first control step after the timeout: no later
    # than one timeout plus one control period after the last sample the server received (plus 50 ms for a
    # tick that a loaded machine runs late; the loop is not real-time)
    assert st["filters"]["stale"] and st["stopped_by_watchdog"]
    assert timeout < st["watchdog_stop_age_s"] <= timeout + dt + 0.05
    # the page may first show the server's stall report (from a state poll), then its own lost connection
    page.wait_for_function("document.querySelector('#lost.on')?.textContent.includes('DISCONNECTED')", timeout=3000)
    assert "watchdog" in page.inner_text("#lost")
    # input flows again: the page reports when the watchdog stopped the arm, and the arm moves again
    page.unroute("**/api/input")
    page.wait_for_function("window.testdrive.connected() && window.testdrive.state().qd.some(v => v !== 0)")
    assert "Input stalled at" in page.inner_text("#lost")
    page.keyboard.up("ArrowRight")
    page.close()


def test_screenshot_shows_the_arm(server, browser):
    url, _, _ = server
    page = _open(browser, url)
    keys, _ = _best_keys(_get(url, "api/state"), _get(url, "api/scene"))
    _hold(page, keys, 1.5)  # leaves a tool path on the picture
    page.wait_for_timeout(200)
    SCREENSHOT.parent.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SCREENSHOT))
    box = page.locator("#view").bounding_box()
    # where the page's own projection puts the person's sphere and capsule ends: [x, y, radius] in canvas pixels
    circles = page.evaluate("""() => { const cam = camera();
      return window.testdrive.bodies().person.flatMap(g =>
        g.round.centres.map(c => screenBall(cam, c, g.round.r))); }""")
    page.close()
    from PIL import Image

    img = np.asarray(Image.open(SCREENSHOT).convert("RGB")).astype(int)  # [H, W, 3]
    x0, y0 = int(box["x"]), int(box["y"])
    view = img[y0 : y0 + int(box["height"]), x0 : x0 + int(box["width"])]
    background = np.all(view == 255, axis=-1)
    assert background.mean() < 0.98, "the 3D view is blank"
    arm = np.all(np.abs(view - np.array(ARM_RGB)) <= 6, axis=-1)
    assert arm.sum() > 500, f"only {arm.sum()} arm-coloured pixels"
    furniture = np.all(np.abs(view - np.array(FURNITURE_RGB)) <= 10, axis=-1)
    assert furniture.sum() > 300, f"only {furniture.sum()} furniture-coloured pixels"
    # a person body's end wholly inside the view: its outline (at least the far half of the circle, for a
    # capsule) is drawn in the person's colour
    person = np.all(np.abs(view - np.array(PERSON_RGB)) <= 10, axis=-1)
    h, w = person.shape
    yy, xx = np.mgrid[0:h, 0:w]
    inside = [(x, y, r) for x, y, r in circles if r < x < w - r and r < y < h - r]
    assert inside, f"no person body wholly in the view: {circles}"
    x, y, r = inside[0]
    ring = np.abs(np.hypot(xx - x, yy - y) - r) <= 3
    assert person[ring].sum() > r, f"person body outline missing at ({x:.0f}, {y:.0f}) r {r:.0f}"


def test_page_draws_every_scene_body_where_the_session_has_it(server, browser, bundle):
    """One outline per body of the manifest's safety.world and two zone outlines per person body; the page's
    own roll-pitch-yaw math puts box corners and capsule/cylinder ends where the runtime's distance code has
    them (the shipped scene has rotated capsules), and the zones grow the person's radii by the keep-out and
    reduced-speed distances."""
    from coreach.control.bodies import pack
    from coreach.world.scene_bodies import world_from_json

    url, _, _ = server
    manifest = json.loads((bundle / "manifest.json").read_text())
    obstacles, person, settings, _ = world_from_json(manifest["safety"]["world"], "safety.world")
    assert obstacles and person
    page = _open(browser, url)
    page.wait_for_function("document.querySelector('#view').dataset.bodies !== undefined")
    assert int(page.get_attribute("#view", "data-bodies")) == len(obstacles) + len(person)
    assert int(page.get_attribute("#view", "data-zones")) == 2 * len(person)
    world = _get(url, "api/scene")["world"]
    assert world["keep_out"] == pytest.approx(settings.keep_out)
    assert world["reduced_zone"] == pytest.approx(settings.reduced_zone(manifest["safety"]["tcp_speed_max"]))
    drawn = page.evaluate("window.testdrive.bodies()")
    page.close()
    bodies, packed = obstacles + person, pack(obstacles + person)
    for k, (g, b) in enumerate(zip(drawn["furniture"] + drawn["person"], bodies, strict=True)):
        R, c = packed.rot[k], packed.centre[k]
        assert g["name"] == b.name
        if b.shape == "box":
            signs = np.array([[1 if i & 1 else -1, 1 if i & 2 else -1, 1 if i & 4 else -1] for i in range(8)])
            np.testing.assert_allclose(g["corners"], c + (signs * np.array(b.size) / 2) @ R.T, atol=1e-9)
        elif b.shape == "sphere":
            np.testing.assert_allclose(g["round"]["centres"], [c], atol=1e-12)
        else:
            half = R[:, 2] * b.size[1] / 2
            np.testing.assert_allclose(g["ends"], [c - half, c + half], atol=1e-9)
    for key, grow in (("keepOut", world["keep_out"]), ("zone", world["reduced_zone"])):
        for g, b in zip(drawn[key], person, strict=True):
            assert g["round"]["r"] == pytest.approx(b.size[0] + grow)


def _number(text: str) -> float:
    return float(re.search(r"(-?[0-9]+\.[0-9]+) m", text).group(1))


def test_separation_readout_shows_the_servers_numbers_and_warns_in_the_zones(server, browser, bundle):
    url, _, _ = server
    page = _open(browser, url)  # arm at home, no key held: the state stands still
    page.wait_for_selector("#sep-person")
    state = _get(url, "api/state")
    sep = state["separation"]
    # the server's numbers are the Session's own geometry at the state's q
    from coreach.runtime.session import Session

    arm = Session.open(bundle).arm
    body_d = np.asarray(arm.geometry(np.array(state["q"]), grad=False).body_d)
    n_f = len(arm.world.furniture)
    assert sep["furniture"]["distance"] == pytest.approx(body_d[:, :n_f].min())
    assert sep["person"]["distance"] == pytest.approx(body_d[:, n_f:].min())
    for key in ("furniture", "person"):
        text = page.inner_text(f"#sep-{key}")
        assert _number(text) == pytest.approx(sep[key]["distance"], abs=5e-4 + 1e-9), text  # shown in mm
        assert float(page.get_attribute(f"#sep-{key}", "data-distance")) == pytest.approx(sep[key]["distance"])
        assert sep[key]["link"] in text and sep[key]["body"] in text
    assert sep["person_zone"] == "clear" and page.get_attribute("#sep-person", "class") == ""
    assert page.get_attribute("#sep-held", "data-held") == str(sep["held"]).lower()

    def zone(route, name, distance):  # the server's answer with the person moved into a zone
        response = route.fetch()
        body = response.json()
        body["separation"].update(person_zone=name, person={**body["separation"]["person"], "distance": distance})
        route.fulfill(response=response, json=body)

    page.route("**/api/input", lambda route: zone(route, "reduced", 0.2))
    page.wait_for_selector("#sep-person.warn")
    assert "reduced-speed zone" in page.inner_text("#sep-person") and _number(page.inner_text("#sep-person")) == 0.2
    page.unroute_all(behavior="wait")  # a rewritten answer still in flight lands before the next rule
    page.route("**/api/input", lambda route: zone(route, "keep_out", 0.1))
    page.wait_for_selector("#sep-person.danger")
    assert "KEEP-OUT" in page.inner_text("#sep-person")
    page.unroute_all(behavior="ignoreErrors")  # a poll in flight at close must not fail a later test
    page.close()


def test_a_bundle_without_bodies_says_so(server, browser):
    """The page as it is for a bundle whose manifest has no safety.world: the server sends null for both."""
    url, _, _ = server

    def without(route, key):
        response = route.fetch()
        route.fulfill(response=response, json={**response.json(), key: None})

    page = browser.new_page(viewport={"width": 1280, "height": 800})
    page.route("**/api/scene", lambda route: without(route, "world"))
    page.route("**/api/input", lambda route: without(route, "separation"))
    page.goto(url)
    page.wait_for_function("window.testdrive && window.testdrive.state() !== null")
    page.wait_for_function("document.querySelector('#view').dataset.bodies === '0'")
    assert page.inner_text("#separation") == "no scene bodies in this bundle"
    assert page.get_attribute("#view", "data-zones") == "0"
    page.unroute_all(behavior="ignoreErrors")  # a poll in flight at close must not fail a later test
    page.close()


def test_drive_separation_follows_the_sessions_world(bundle, tmp_path):
    """In process: the person's head moved in front of the tool (Session.set_obstacles) passes through the
    reduced-speed zone into the keep-out zone; the zone label always matches the reported distance, and the
    scene the page fetches carries the moved pose. Without bodies both views are null."""
    from coreach.runtime.session import Session
    from coreach.testdrive.sim import Drive

    drive = Drive(Session.open(bundle), record_dir=tmp_path, clock=lambda: 0.0)
    s, cap = drive.session.arm.world.settings, drive.manifest.tcp_speed_max
    keep_out, zone = s.keep_out, s.reduced_zone(cap)
    tool = drive.session.chain.fk(drive.q)[0]
    seen = set()
    for gap in np.linspace(0.45, 0.0, 19):
        head = tool + np.array([0.11 + gap, 0.0, 0.0])  # head radius 0.11 m: its surface `gap` beyond the tool
        drive.session.set_obstacles({"head": (head, np.zeros(3))})
        sep = drive.state()["separation"]
        d = sep["person"]["distance"]
        want = "keep_out" if d < keep_out else "reduced" if d < zone else "clear"
        assert sep["person_zone"] == want, (gap, d)
        seen.add(want)
    assert seen == {"clear", "reduced", "keep_out"}
    assert sep["person"]["body"] == "head"
    moved = next(b for b in drive.scene()["world"]["person"] if b["name"] == "head")
    np.testing.assert_allclose(moved["xyz"], head)
    drive.session.arm = None
    assert drive.state()["separation"] is None and drive.scene()["world"] is None


def test_a_recording_made_on_the_page_loads_as_episodes(server, browser, bundle):
    url, info, drives = server
    page = _open(browser, url)
    before = set(_get(url, "api/state")["saved"])
    page.locator("#view").click()
    page.keyboard.press("Digit2")  # name the target goal
    page.keyboard.press("Space")  # start recording
    page.wait_for_selector("text=● recording")
    _hold(page, ["ArrowRight"], 0.8)
    page.keyboard.press("Space")  # stop: the drive is saved
    page.wait_for_function(f"window.testdrive.state().saved.length > {len(before)}")
    saved = [p for p in _get(url, "api/state")["saved"] if p not in before]
    page.close()
    assert len(saved) == 1 and Path(saved[0]).parent == drives
    episodes = load_parquet(saved[0])
    assert len(episodes) == 1 and episodes.goal_names == GOALS
    ep = episodes[0]
    assert GOALS[ep.goal] == "switch" and len(ep) > 20
    assert episodes.dt == pytest.approx(1.0 / 50.0)
    # kinematic simulation: q advances by qd dt
    np.testing.assert_allclose(ep.q[1:], ep.q[:-1] + ep.qd[:-1] * episodes.dt, atol=1e-12)
    import pyarrow.parquet as pq

    table = pq.read_table(saved[0])
    meta = table.schema.metadata
    manifest_hash = hashlib.sha256((bundle / "manifest.json").read_bytes()).hexdigest()
    assert meta[b"coreach.bundle_manifest_sha256"].decode() == manifest_hash == info["manifest_sha256"]
    assert meta[b"coreach.testdrive_session"].decode() == info["session_id"]
    sticks = np.array(table.column("stick_input").to_pylist())
    assert (sticks[:, 0] == 1.0).sum() > 10  # the held key, as the server received it
    assert set(table.column("target").to_pylist()) == {"switch"}
    for col in ("stale", "deadband", "speed_capped", "position_limited", "workspace_scale", "belief", "qd_decoder"):
        assert col in table.column_names
    assert not list(drives.glob(".*.tmp"))

    from coreach.vetting.recorded_drives import drive_summary
    from coreach.vetting.report import write_report

    summary = drive_summary(saved)
    assert summary["n_episodes"] == 1 and summary["success"]["n"] == 1
    assert summary["bundle_manifest_sha256"] == [manifest_hash]
    report = write_report({"person": summary}, [], drives / "report", "drives", {"bundle": str(bundle)})
    assert "person" in report.read_text()


def test_gamepad_stub_drives_the_arm_and_its_buttons_record(server, browser):
    """Scripted Gamepad API stub (no real gamepad in headless Chromium): axes 2 and 3 deflected, configured
    through the page's query string, button 0 pressed for a moment to start recording."""
    url, _, _ = server
    stub = """
      const pad = {id: "scripted stub", index: 0, connected: true, mapping: "standard", timestamp: 0,
                   axes: [0.05, -0.02, 0.6, -0.55],
                   buttons: Array.from({length: 16}, () => ({pressed: false, value: 0}))};
      window.__pad = pad;
      navigator.getGamepads = () => [pad, null, null, null];
    """
    page = _open(browser, url, stub, "?ax=2&ay=3&deadband=0.2&invert_y=1")
    deadline = time.monotonic() + 3.0
    while (st := _get(url, "api/state"))["input_source"] != "gamepad" and time.monotonic() < deadline:
        time.sleep(0.05)
    assert st["input_source"] == "gamepad"
    # the page's deadband rescale (0.6 - 0.2) / 0.8 = 0.5, axis 2 inverted: -(-0.55 - (-0.2)) / 0.8 = 0.4375
    assert st["stick_received"] == pytest.approx([0.5, 0.4375])
    # the server steps the session on its own clock: the sample may have arrived between two steps
    deadline = time.monotonic() + 2.0
    while not any((st := _get(url, "api/state"))["qd"]) and time.monotonic() < deadline:
        time.sleep(0.02)
    assert any(st["qd"]), st
    page.evaluate("window.__pad.buttons[0] = {pressed: true, value: 1}")
    page.wait_for_function("window.testdrive.state().recording === true")
    page.evaluate("window.__pad.buttons[0] = {pressed: false, value: 0}")
    page.evaluate("window.__pad.axes = [0.1, 0.1, 0.1, 0.1]")  # inside the deadband: the page sends zeros
    page.wait_for_function("window.testdrive.state().stick_received.every(v => v === 0)")
    # the zeros may have arrived after the latest control step: the next one (20 ms on) stops the arm
    deadline = time.monotonic() + 0.5
    while any((st := _get(url, "api/state"))["qd"]) and time.monotonic() < deadline:
        time.sleep(0.01)
    assert not any(st["qd"])
    _post(url, "api/command", {"action": "record", "on": False})
    page.close()


def test_requests_for_another_host_name_are_refused(server):
    """DNS rebinding guard: a page served under another name that resolves here cannot drive or read."""
    url, _, _ = server
    req = urllib.request.Request(url + "api/state", headers={"Host": "elsewhere.example"})
    with pytest.raises(urllib.error.HTTPError) as err:
        urllib.request.urlopen(req, timeout=5)
    assert err.value.code == 403
    req = urllib.request.Request(url + "api/input", data=b'{"stick": [1, 0]}', headers={
        "Content-Type": "application/json", "Origin": "http://elsewhere.example"})
    with pytest.raises(urllib.error.HTTPError) as err:
        urllib.request.urlopen(req, timeout=5)
    assert err.value.code == 403


def test_tampered_bundle_is_refused_with_one_line(bundle, tmp_path):
    bad = tmp_path / "tampered"
    shutil.copytree(bundle, bad)
    data = bytearray((bad / "decoder.onnx").read_bytes())
    data[-1] ^= 0xFF
    (bad / "decoder.onnx").write_bytes(bytes(data))
    res = subprocess.run(_command("test-drive", str(bad), "--port", "0"), capture_output=True, text=True, env=_env(),
                         timeout=60)  # fmt: skip
    assert res.returncode != 0
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("coreach: error:") and "decoder.onnx" in lines[0], res.stderr
    assert "http://" not in res.stdout


def test_server_modules_import_without_torch():
    """The server runs on the robot-side install: importing it in a fresh interpreter brings no torch."""
    code = ("import sys, coreach.testdrive.command, coreach.testdrive.server, coreach.testdrive.sim, "
            "coreach.testdrive.recording; print(sorted(m for m in sys.modules if m.split('.')[0] in "
            "('torch', 'lightning', 'mlflow', 'hydra')))")  # fmt: skip
    out = subprocess.run([sys.executable, "-c", code], env=_env(), capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"


def test_drive_summary_values_on_a_hand_made_drive(bundle, tmp_path):
    """Known geometry: the tool goes start -> a corner -> the end of goal 0's fine motion in 20 steps,
    arriving at step 15; speed caps act on 3 steps, the workspace box on 1."""
    from types import SimpleNamespace

    from coreach.runtime.bundle import verify_bundle
    from coreach.vetting.recorded_drives import drive_summary
    from coreach.testdrive.recording import save_drive

    m = verify_bundle(bundle)
    g = len(GOALS)
    end = m.goal_pos[0] + m.goal_fine[0]
    start, corner = end + np.array([-0.2, 0.0, 0.0]), end + np.array([-0.1, 0.1, 0.0])
    pos = np.concatenate([np.linspace(start, corner, 8, endpoint=False), np.linspace(corner, end, 8),
                          np.repeat(end[None], 4, axis=0)])  # [20, 3]; reaches `end` at step 15
    rows = []
    for t in range(20):
        rows.append({
            "t": t * 0.02, "q": np.zeros(7), "qd": np.zeros(7), "pos": pos[t], "rot": np.eye(3),
            "stick_in": [1.0, 0.0], "stick": np.array([0.5, 0.0]), "age": 0.01, "qd_decoder": np.full(7, 0.1),
            "flags": {"stale": False, "deadband": False, "stick_clipped": False, "position_limited": False,
                      "speed_capped": t in (2, 3, 4)},
            "workspace_scale": 0.5 if t == 9 else 1.0, "fault": None, "belief": np.full(g, 1 / g), "target": 0,
            "phase": [2 if t >= 15 else 0] + [0] * (g - 1),
        })  # fmt: skip
    drive = SimpleNamespace(manifest=m, dt=0.02, manifest_sha256="ab" * 32, session_id="s1", position_tol=0.02,
                            orientation_tol=0.26)  # fmt: skip
    path = save_drive(drive, rows, 0, 1, tmp_path / "d.parquet")
    s = drive_summary([path])
    assert s["success"]["value"] == 1.0 and s["success"]["n"] == 1
    # Wilson interval at 1 success of 1 (Wilson 1927; closed form n / (n + z^2) for the lower end)
    assert s["success"]["lo"] == pytest.approx(1 / (1 + 1.959964**2), abs=1e-6)
    assert s["time_to_success"]["median"] == pytest.approx(15 * 0.02)
    straight = np.linalg.norm(end - start)
    travelled = np.linalg.norm(corner - start) + np.linalg.norm(end - corner)
    assert s["path_efficiency"]["mean"] == pytest.approx(straight / travelled)
    assert s["limit_scalings"]["speed_capped"] == pytest.approx(3 / 20)
    assert s["limit_scalings"]["workspace_limited"] == pytest.approx(1 / 20)
    assert s["limit_scaled"]["step_share"] == pytest.approx(4 / 20)
    assert s["stick_gain"]["median"] == pytest.approx(np.linalg.norm(np.full(7, 0.1)) / 0.5)


def test_recorded_drives_relabelled_for_aggregation(bundle, tmp_path):
    """A drive stepped without a browser (scripted stick, fake clock), saved, then relabelled with the scripted
    demonstrator: the labels' tool velocity J(q) qd heads for the drive's goal (approach point)."""
    from coreach.runtime.session import Session
    from coreach.testdrive.finetune import relabel_drives
    from coreach.testdrive.sim import Drive
    from coreach_plugins.labeller.scripted import ScriptedLabeller
    from coreach.world.urdf_arm import UrdfArm

    now = [0.0]
    drive = Drive(Session.open(bundle), rate_hz=50.0, record_dir=tmp_path, clock=lambda: now[0])
    drive.pick_target(3)
    drive.start_recording()
    for _ in range(60):
        drive.set_stick([1.0, -1.0], "script")
        drive.tick()
        now[0] += drive.dt
    path = drive.stop_recording()
    relabelled = relabel_drives([path], UrdfArm(), ScriptedLabeller())
    out = tmp_path / "relabelled.parquet"
    from coreach.episodes import save_parquet

    save_parquet(relabelled, out)
    again = load_parquet(out)
    assert len(again) == 1 and again.goal_names == GOALS and GOALS[again[0].goal] == "bottle"
    ep, recorded = again[0], load_parquet(path)[0]
    np.testing.assert_array_equal(ep.q, recorded.q)  # same states, new labels
    assert not np.allclose(ep.qd, recorded.qd)
    chain = Chain.from_urdf(shipped_urdf())
    approach = ep.goal_pos[ep.goal]
    for q, qd, pos in zip(ep.q, ep.qd, ep.ee_pos):
        v = chain.jacobian(q)[:3] @ qd  # tool velocity of the label (runtime kinematics)
        to_goal = approach - pos
        assert v @ to_goal / (np.linalg.norm(v) * np.linalg.norm(to_goal)) > 0.9
