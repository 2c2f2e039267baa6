"""The PI's pages in a real headless Chromium over `vigil serve`: an overview of 32 boxes on
one laptop screen, the session pages of a reversal and an autoshaping session, an animal
with three sessions and a cohort; checked by what the browser computes (element positions,
computed styles) and kept as screenshots for a person to look at."""

from __future__ import annotations

import json
import shutil
import signal

import pytest
from chromium_pipe import Chromium, chromium_path
from processes import Vigil
from test_browser import shots  # noqa: F401  (the screenshot folder fixture)
from web_samples import REVERSAL, record_session

from server.store.writer import Store

pytestmark = pytest.mark.skipif(
    chromium_path() is None, reason="chromium is not installed (Debian package 'chromium'; .ci/run installs it)"
)

LAPTOP = (1440, 900)  # a common laptop screen, in CSS pixels
LONG_SEED = 9167260125935700254  # 19 digits, as a drawn 63-bit seed usually has


@pytest.fixture(scope="module")
def big_lab(lab_db, tmp_path_factory):
    """The web tests' lab with 29 more boxes (32 in all), short sessions, a few still running."""
    path = tmp_path_factory.mktemp("pages") / "lab32.sqlite"
    shutil.copy(lab_db["path"], path)
    with Store.open(path) as store:
        ids = [
            record_session(store, box=f"bay-{i:02d}", animal=f"RN-06{i:02d}", protocol_path=REVERSAL, agent="random",
                           seed=LONG_SEED if i == 4 else 100 + i, minutes=1, end=i % 5 != 0)
            for i in range(4, 33)
        ]  # fmt: skip
    return {**lab_db, "path": path, "long_seed": ids[0]}


@pytest.fixture(scope="module")
def site(big_lab, tmp_path_factory):
    folder = tmp_path_factory.mktemp("serve")
    serve = Vigil(["serve", "--db", str(big_lab["path"]), "--port", "0"], folder)
    browser = None
    try:
        url = serve.wait_for("status page (read-only): ").rstrip("/")
        browser = Chromium(folder / "profile", width=LAPTOP[0], height=LAPTOP[1])
        yield url, browser
    finally:
        if browser is not None:
            browser.close()
        serve.finish(signal.SIGTERM)
        serve.kill()


def _png(path):
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and path.stat().st_size > 10_000
    return path


def test_overview_fits_32_boxes_on_a_laptop_screen(site, shots):  # noqa: F811
    url, browser = site
    browser.navigate(url + "/")
    browser.wait_for("document.querySelectorAll('.tile').length === 32")
    _png(browser.screenshot(shots / "overview-32.png", full_page=False))  # taken first: a failure has a picture
    fit = browser.evaluate(
        "(() => { const tiles = [...document.querySelectorAll('.tile')];"
        " return {bottom: Math.max(...tiles.map(t => t.getBoundingClientRect().bottom)),"
        " right: Math.max(...tiles.map(t => t.getBoundingClientRect().right)),"
        " height: innerHeight, width: innerWidth,"
        " size: document.getElementById('board').dataset.size}; })()"
    )
    assert fit["size"] == "dense"
    assert fit["bottom"] <= fit["height"] and fit["right"] <= fit["width"], fit
    # the freshness line comes first, above the alarm strip and the tiles
    order = browser.evaluate(
        "['.asof', '#strip', '#board'].map(s => document.querySelector(s).getBoundingClientRect().top)"
    )
    assert order == sorted(order)
    rewards = browser.evaluate("[...document.querySelectorAll('[data-f=rewards]')].map(e => e.textContent)")
    assert all("/" in text for text in rewards), rewards  # "16/200": rewards against the cap
    assert browser.evaluate("document.querySelectorAll('[data-f=reversals]').length") == 32


def _trial_axes_x(browser, value: int) -> list[float]:
    """Screen x of the tick at trial `value` in every trial-indexed panel."""
    return browser.evaluate(
        "[...document.querySelectorAll('svg[data-axis=trial]')].map(svg => {"
        f" const tick = svg.querySelector('line.tk[data-v=\"{value}\"]');"
        " return tick ? tick.getBoundingClientRect().x : null; })"
    )


def test_reversal_session_page(site, big_lab, shots):  # noqa: F811
    url, browser = site
    browser.navigate(f"{url}/sessions/{big_lab['second']}")
    panels = browser.evaluate("document.querySelectorAll('svg[data-axis=trial]').length")
    assert panels == 4  # choices, alpha, beta, exploration
    ticks = browser.evaluate(
        "[...document.querySelector('svg[data-axis=trial]').querySelectorAll('line.tk')].map(t => t.dataset.v)"
    )
    for value in (int(ticks[1]), int(ticks[-1])):
        xs = _trial_axes_x(browser, value)
        assert None not in xs and max(xs) - min(xs) < 1.0, (value, xs)  # a trial lines up vertically
    firings = browser.evaluate("[...document.querySelectorAll('.firings tbody td:last-child')].map(e => e.textContent)")
    assert firings and all("because" in f and "{" not in f for f in firings)
    _png(browser.screenshot(shots / "session-reversal.png"))


def test_a_long_seed_stays_on_one_line(site, big_lab):
    url, browser = site
    browser.navigate(f"{url}/sessions/{big_lab['long_seed']}")
    seed = browser.evaluate(
        "(() => { const dd = [...document.querySelectorAll('.facts dt')].find(d => d.textContent === 'seed')"
        ".nextElementSibling; const r = document.createRange();"
        " r.selectNodeContents(dd); return [dd.textContent, r.getClientRects().length]; })()"
    )
    assert seed == [str(LONG_SEED), 1]  # its text makes a single line box


def test_autoshaping_session_page(site, big_lab, shots):  # noqa: F811
    url, browser = site
    browser.navigate(f"{url}/sessions/{big_lab['pav']}")
    title = browser.evaluate("document.querySelector('svg[data-axis=trial]').getAttribute('aria-label')")
    assert title == "Pavlovian conditioned approach (PCA index)"
    verdict = browser.evaluate("document.querySelector('.pca-verdict').textContent")
    assert "sign-tracking" in verdict
    _png(browser.screenshot(shots / "session-autoshaping.png"))


def test_animal_page_reads_as_a_table_not_a_tile(site, shots):  # noqa: F811
    url, browser = site
    browser.navigate(url + "/animals/RN-0501")
    style = json.loads(
        browser.evaluate(
            "(() => { const s = e => getComputedStyle(e);"
            " const td = document.querySelector('main table td');"
            " const tick = document.querySelector('svg.plot text.tl');"
            " const root = parseFloat(s(document.documentElement).fontSize);"
            " return JSON.stringify({td: [s(td).fontWeight, parseFloat(s(td).fontSize) / root],"
            " tick: [s(tick).fontWeight, parseFloat(s(tick).fontSize)]}); })()"
        )
    )
    assert style["td"] == ["400", pytest.approx(0.9)]  # the table's own 0.9 rem, not bold
    assert style["tick"] == ["400", 13.0]  # the plots' 13 px ticks, not bold
    rows = browser.evaluate("document.querySelectorAll('.sessions-of-animal tbody tr').length")
    assert rows == 3
    _png(browser.screenshot(shots / "animal.png"))


def test_cohort_page(site, shots):  # noqa: F811
    url, browser = site
    browser.navigate(url + "/cohorts/two-lever%20reversal")
    assert browser.evaluate("document.querySelectorAll('.cohort tbody tr').length") >= 30
    assert browser.evaluate("document.querySelectorAll('svg.plot').length") >= 2
    _png(browser.screenshot(shots / "cohort.png"))
