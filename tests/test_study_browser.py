"""`coreach study session` end to end: the real command in a subprocess, its page in headless Chromium (Debian's,
driven by Playwright's Python API) with the keyboard, and with a scripted gamepad; a reload and a killed server mid-trial; what is stored.

The plan is tiny (two conditions, the lamp task, one practice and one measured trial per block, trials ending
at 3 s), so every trial ends by the time limit while the test waits.
"""

from __future__ import annotations

import csv
import json
import re
import stat
import time
import urllib.request
from pathlib import Path

import pytest

from study_fixtures import study_bundle
from test_study_session import BUNDLE_CONDITION, STUDY, make_plan, start_session

pytestmark = pytest.mark.slow

TLX_KEYS = ("mental", "physical", "temporal", "performance", "effort", "frustration")
BROWSER_DETAILS = (b"Mozilla", b"HeadlessChrome", b"127.0.0.1")  # what a request carries; a session stores none


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    base = tmp_path_factory.mktemp("study")
    bundle = study_bundle(base / "bundle")
    plan = make_plan(base / "studies", bundle)
    return base / "studies", bundle, plan


def _call(url: str, path: str, body: dict | None = None) -> dict:
    data = None if body is None else json.dumps(body).encode()
    req = urllib.request.Request(url.rstrip("/") + path, data=data, headers={"Content-Type": "application/json"})
    with urllib.request.urlopen(req, timeout=10) as r:
        return json.load(r)


def _state(folder: Path) -> dict:
    return json.loads((folder / "state.json").read_text())


def _wait(page, expression: str, timeout_s: float = 15.0) -> None:
    page.wait_for_function(expression, timeout=timeout_s * 1000)


def test_a_participant_session_in_the_browser(study, browser):
    root, bundle, plan = study
    person = plan["participants"][0]
    code, blocks = person["code"], person["order"]
    direct = next(c["letter"] for c in plan["conditions"] if c["kind"] == "direct")
    folder = root / STUDY / "v1" / "sessions" / code
    proc, info = start_session(root, code)
    seen: list[str] = []  # every text the page showed, and the API's answers at a trial step
    try:
        url = info["url"]
        page = browser.new_page()
        page.goto(url)
        page.wait_for_selector("#consent.on")
        seen.append(page.inner_text("body"))
        assert "SIMULATION ONLY" in seen[-1] and "informed consent" in seen[-1]
        page.check("#consent-check")
        page.click("#consent-button")
        page.wait_for_selector("#trial.on")
        first = blocks[0]
        assert page.inner_text("#trial-title") == f"Interface {first} · Practice"
        assert "lamp switch" in page.inner_text("#instruction")
        seen += [json.dumps(_call(url, p)) for p in ("/api/study", "/api/scene", "/api/state")]

        # the practice trial: Start, the countdown, then the arrow key held as the stick
        page.click("#start")
        assert page.inner_text("#countdown") == "3"
        _wait(page, "window.study.view().running")
        page.keyboard.down("ArrowRight")
        _wait(page, "window.study.state() && window.study.state().stick_received[0] === 1")
        seen.append(page.inner_text("body"))
        assert "time" in page.inner_text("#clock")
        _wait(page, f"window.study.view().id === '{first}-lamp-1'", 10)  # ended at the 3 s limit
        page.keyboard.up("ArrowRight")
        assert "Time is up" in page.inner_text("#outcome") or "Reached" in page.inner_text("#outcome")
        assert page.inner_text("#trial-title") == f"Interface {first} · Trial 2 of 2"

        # the measured trial, then a reload while it runs: incomplete, and the page goes on with the next step
        page.click("#start")
        _wait(page, "window.study.view().running")
        assert _state(folder)["in_progress"] == f"{first}-lamp-1"  # written before the arm moved
        page.reload()
        page.wait_for_selector("#tlx.on")
        assert "interrupted" in page.inner_text("#outcome")
        rec = _state(folder)["done"][f"{first}-lamp-1"]
        assert rec["status"] == "incomplete" and rec["why"] == "the page was reloaded"

        # TLX: a value out of range is refused with its one line shown, and nothing is stored
        for i, key in enumerate(TLX_KEYS):
            page.fill(f"#tlx-{key}", str(10 * (i + 1)))
        page.fill("#tlx-mental", "150")
        page.click("#tlx-submit")
        page.wait_for_selector("#error.on")
        assert "outside 0-100" in page.inner_text("#error")
        assert f"tlx-{first}" not in _state(folder)["done"]
        page.fill("#tlx-mental", "40")
        page.click("#tlx-submit")
        page.wait_for_selector("#liking.on")
        assert f"tlx-{first}" in _state(folder)["done"] and not page.is_visible("#error")
        page.check("#liking-6")
        page.click("#liking-submit")

        # the second block quickly: both trials end by the time limit; M switches direct control's mode
        second = blocks[1]
        page.wait_for_selector("#trial.on")
        for title in ("Practice", "Trial 2 of 2"):
            assert page.inner_text("#trial-title") == f"Interface {second} · {title}"
            page.click("#start")
            _wait(page, "window.study.view().running")
            if second == direct:
                page.keyboard.press("m")
                _wait(page, "window.study.view().trial && window.study.view().trial.mode === 2")
                # the page draws the mode on its next frame, after the state has it: wait for the text itself
                _wait(page, "document.getElementById('mode').textContent === 'mode 2 of 3 (M switches)'")
                assert page.inner_text("#mode") == "mode 2 of 3 (M switches)"
            _wait(page, "!window.study.view().running", 10)
        page.wait_for_selector("#tlx.on")
        for key in TLX_KEYS:
            page.fill(f"#tlx-{key}", "25")
        page.click("#tlx-submit")
        page.wait_for_selector("#liking.on")
        page.check("#liking-3")
        page.click("#liking-submit")
        page.wait_for_selector("#ranking.on")
        seen.append(page.inner_text("body"))
        page.click("#rank-list button.down")  # the first letter down: the second block's comes first
        page.click("#ranking-submit")
        page.wait_for_selector("#done.on")
        seen += [page.inner_text("body"), page.content()]
        page.close()
    finally:
        proc.terminate()
        proc.wait(timeout=20)

    # blinded: the page never showed a condition's name, kind or bundle
    for text in seen:
        assert not re.search(r"\bdirect\b", text, re.IGNORECASE), text  # the word, not CSS's flex-direction
        assert BUNDLE_CONDITION not in text and str(bundle) not in text

    state = _state(folder)
    assert state["done"]["ranking"]["order"] == [blocks[1], blocks[0]]
    assert state["in_progress"] is None
    rows = list(csv.DictReader((folder / "trials.csv").open()))
    got = [(r["condition"], r["practice"], r["complete"]) for r in rows]
    assert got == [(first, "1", "1"), (first, "0", "0"), (second, "1", "1"), (second, "0", "1")]
    assert float(rows[0]["path_m"]) > 0.0  # the held arrow key moved the arm in the practice trial
    # the block's TLX sits on its last complete measured trial: block 2's only (block 1's was interrupted)
    assert [r["tlx_mental"] for r in rows] == ["", "", "", "25.0"] and rows[3]["liking"] == "3"
    assert rows[3]["preference"] == "1"
    assert json.loads((folder / "responses.json").read_text())["tlx"][first]["ratings"]["mental"] == 40.0

    # owner-only files and folders, and no address or browser detail anywhere under the session
    assert stat.S_IMODE((folder.parent).stat().st_mode) == 0o700
    for path in [folder, *folder.rglob("*")]:
        mode = stat.S_IMODE(path.stat().st_mode)
        assert mode == (0o700 if path.is_dir() else 0o600), (path, oct(mode))
        if path.is_file():
            data = path.read_bytes()
            assert not any(d in data for d in BROWSER_DETAILS), path
    assert sorted(p.name for p in (folder / "drives").iterdir()) == sorted(
        [f"{first}-practice-1.parquet", f"{second}-practice-1.parquet", f"{second}-lamp-1.parquet"])


# One scripted pad replaces navigator.getGamepads (Playwright cannot plug in a gamepad): the browser's Gamepad API
# is the input, the page's own code reads it unchanged. Buttons follow the W3C Gamepad standard mapping.
PAD_SCRIPT = """
window.pad = {id: "scripted pad", index: 0, connected: true, mapping: "standard", timestamp: 0, axes: [0, 0, 0, 0],
              buttons: Array.from({length: 16}, () => ({pressed: false, touched: false, value: 0}))};
window.pad.press = i => {
  window.pad.buttons[i] = {pressed: true, touched: true, value: 1};
  setTimeout(() => { window.pad.buttons[i] = {pressed: false, touched: false, value: 0}; }, 300);
};
Object.defineProperty(Navigator.prototype, "getGamepads", {configurable: true, value: () => [window.pad]});
"""


def test_a_gamepad_drives_the_study_page(study, browser, tmp_path):
    """With a gamepad: the bottom face button (buttons[0]) starts the trial, the left stick moves the arm (a stick
    pushed forward reads negative on the pad, positive at the arm), the left face button (buttons[2]) switches
    direct control's mode, and the page says which input drives."""
    _, bundle, _ = study
    plan = make_plan(tmp_path, bundle)
    direct = next(c["letter"] for c in plan["conditions"] if c["kind"] == "direct")
    code = next(p["code"] for p in plan["participants"] if p["order"][0] == direct)
    proc, info = start_session(tmp_path, code)
    try:
        page = browser.new_page()
        page.add_init_script(PAD_SCRIPT)
        page.goto(info["url"])
        page.wait_for_selector("#consent.on")
        page.check("#consent-check")
        page.click("#consent-button")
        page.wait_for_selector("#trial.on")
        _wait(page, "document.getElementById('input').textContent === 'gamepad connected: gamepad'")
        page.evaluate("window.pad.press(0)")
        _wait(page, "window.study.view().running")
        page.evaluate("window.pad.axes[0] = 1; window.pad.axes[1] = -1")
        _wait(page, "window.study.state() && window.study.state().input_source === 'gamepad' && "
                    "window.study.state().stick_received[0] === 1 && window.study.state().stick_received[1] === 1")
        page.evaluate("window.pad.press(2)")
        _wait(page, "window.study.view().trial && window.study.view().trial.mode === 2")
        # the stick at rest and a key held: the keyboard drives
        page.evaluate("window.pad.axes[0] = 0; window.pad.axes[1] = 0")
        page.keyboard.down("ArrowLeft")
        _wait(page, "window.study.state().input_source === 'keyboard' && window.study.state().stick_received[0] === -1")
        page.keyboard.up("ArrowLeft")
        page.close()
    finally:
        proc.terminate()
        proc.wait(timeout=20)


def test_a_killed_server_resumes_at_the_next_step(study):
    root, _, plan = study
    code = plan["participants"][1]["code"]
    folder = root / STUDY / "v1" / "sessions" / code
    proc, info = start_session(root, code)
    try:
        _call(info["url"], "/api/study/hello", {})
        step = _call(info["url"], "/api/study/consent", {"confirmed": True})["id"]
        assert _call(info["url"], "/api/study/start", {"step": step})["running"]
        time.sleep(0.5)
    finally:
        proc.kill()  # SIGKILL: no chance to mark anything
        proc.wait(timeout=20)
    assert _state(folder)["in_progress"] == step
    proc, info = start_session(root, code)  # the dead server's lock is taken over
    try:
        view = _call(info["url"], "/api/study")
        assert view["interrupted"] == step and view["id"] != step and view["kind"] == "trial"
        rec = _state(folder)["done"][step]
        assert rec["status"] == "incomplete" and rec["why"] == "the session stopped during this trial"
    finally:
        proc.terminate()
        proc.wait(timeout=20)
