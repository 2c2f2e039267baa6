"""The status page in a real headless Chromium, against a running `vigil demo`: the trial
counters move without a reload, a session page shows its plots, screenshots are kept."""

from __future__ import annotations

import os
import signal
import tempfile
from pathlib import Path

import pytest
from chromium_pipe import Chromium, chromium_path
from processes import Vigil

pytestmark = pytest.mark.skipif(
    chromium_path() is None, reason="chromium is not installed (Debian package 'chromium'; .ci/run installs it)"
)

TRIALS_SHOWN = (
    "[...document.querySelectorAll('[data-f=trial]')].reduce((sum, cell) => sum + Number(cell.textContent), 0)"
)


@pytest.fixture
def shots() -> Path:
    """Screenshots go to a folder that outlives the test, for a person to look at."""
    folder = Path(os.environ.get("VIGIL_SCREENSHOTS") or tempfile.mkdtemp(prefix="vigil-shots-"))
    folder.mkdir(parents=True, exist_ok=True)
    return folder


def test_overview_updates_live_and_session_page_has_plots(tmp_path, shots):
    demo = Vigil(
        ["demo", "--boxes", "4", "--port", "0", "--db", str(tmp_path / "demo.sqlite"), "--minutes", "3"], tmp_path
    )
    browser = None
    try:
        url = demo.wait_for("status page: ")
        token = demo.wait_for("operator token for this run (pause, stop, notes): ")
        browser = Chromium(tmp_path / "profile")
        browser.navigate(url)
        browser.wait_for("document.querySelectorAll('.tile').length === 4", timeout=60)
        # a marker that a reload would wipe out
        browser.evaluate("window.vigilMark = 'same page'; true")
        before = browser.evaluate(TRIALS_SHOWN)
        after = browser.wait_for(f"({TRIALS_SHOWN}) > {before} && ({TRIALS_SHOWN})", timeout=60)
        assert after > before
        assert browser.evaluate("window.vigilMark") == "same page"
        assert browser.evaluate("document.getElementById('feed').textContent").strip() == (
            "· live updates"
        )  # server-sent events, not the polling fallback
        # the operator pauses a box from its tile: token typed once, then the button
        box = browser.evaluate(
            "(() => { document.getElementById('optoken').value = " + repr(token) + ";"
            " const tile = document.querySelector('.tile[data-state=\"running\"]');"
            " tile.querySelector('button[data-act=\"pause\"]').click();"
            " return tile.dataset.box; })()"
        )
        paused_tile = f"document.querySelector('.tile[data-box=\"{box}\"]')"
        browser.wait_for(f"{paused_tile}.dataset.state === 'paused'", timeout=15)
        assert browser.evaluate("document.getElementById('opsay').textContent") == (f"{box}: pause requested")
        assert browser.evaluate(f"{paused_tile}.querySelector('button[data-act=\"resume\"]').hidden") is False
        # time left counts down from the run's --minutes 3, not from the lab's caps
        left = browser.evaluate("[...document.querySelectorAll('[data-f=remaining]')].map(e => e.textContent)")
        assert left and all(int(t.split(":")[0]) * 60 + int(t.split(":")[1]) <= 180 for t in left), left
        overview_png = browser.screenshot(shots / "overview.png")

        busiest = browser.evaluate(
            "[...document.querySelectorAll('.tile')].map(t => [Number("
            "t.querySelector('[data-f=trial]').textContent), t.querySelector('footer a')"
            ".getAttribute('href')]).sort((a, b) => b[0] - a[0])[0][1]"
        )
        assert busiest.startswith("/sessions/")
        browser.navigate(url.rstrip("/") + busiest)
        # cumulative record and timeline at least (choices and estimates where the protocol has them)
        plots = browser.evaluate("document.querySelectorAll('svg.plot').length")
        assert plots >= 2
        # the cumulative record draws a staircase per response input, inside the page
        assert browser.evaluate("document.querySelector('svg.plot polyline.ln') !== null")
        width = browser.evaluate("document.querySelector('svg.plot').getBoundingClientRect().width")
        assert width > 600
        session_png = browser.screenshot(shots / "session.png")
        for png in (overview_png, session_png):
            assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and png.stat().st_size > 10_000
        print(f"screenshots: {overview_png} {session_png}")
    finally:
        if browser is not None:
            browser.close()
        demo.finish(signal.SIGINT)
        demo.kill()
