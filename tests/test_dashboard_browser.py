"""Real-browser test of the dashboard: ``elmon dashboard`` on a free local port, driven by
Debian's chromium through Python Playwright (never a browser download step).

The test installs chromium with ``apt-get install -y chromium`` when ``/usr/bin/chromium`` is
missing (``make test`` runs ``make browser-deps`` first); if that fails the test FAILS and says
so. Screenshots go to ``test-artifacts/`` and, for the README, ``docs/screenshots/``
(only with ELMON_UPDATE_SCREENSHOTS=1, so a test run
leaves the checkout clean).
"""

from __future__ import annotations

import contextlib
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.parse
import urllib.request
from pathlib import Path

import pytest

from monitor import store as mstore
from tests import dashboard_fixtures as fx


ROOT = Path(__file__).resolve().parents[1]
CHROMIUM = Path("/usr/bin/chromium")
ARTIFACTS = ROOT / "test-artifacts"
SCREENSHOTS = ROOT / "docs" / "screenshots"
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                 "--no-first-run", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync"]

#: A drawn Vega-Lite chart (streamlit renders SVG; canvas is the other Vega renderer).
CHART = '[data-testid="stVegaLiteChart"] svg.marks, [data-testid="stVegaLiteChart"] canvas'

pytestmark = [pytest.mark.browser, pytest.mark.slow]


def _ensure_chromium() -> None:
    if CHROMIUM.exists():
        return
    log = ""
    if shutil.which("apt-get"):
        env = dict(os.environ, DEBIAN_FRONTEND="noninteractive")
        try:
            for cmd in (["apt-get", "update", "-qq"], ["apt-get", "install", "-y", "-qq", "chromium"]):
                r = subprocess.run(cmd, capture_output=True, text=True, timeout=600, env=env)
                log += r.stdout[-2000:] + r.stderr[-2000:]
        except (OSError, subprocess.TimeoutExpired) as exc:
            log += str(exc)
    if not CHROMIUM.exists():
        pytest.fail("chromium could not be installed (apt-get install -y chromium failed), so "
                    f"the real-browser dashboard test cannot run: {log.strip()[-1500:]}")


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _wait_healthy(base: str, proc: subprocess.Popen, log: Path, timeout: float = 30.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            pytest.fail(f"elmon dashboard exited with {proc.returncode}:\n{log.read_text()[-3000:]}")
        try:
            with urllib.request.urlopen(base + "/_stcore/health", timeout=2) as r:
                if r.read().decode().strip() == "ok":
                    return
        except OSError:
            pass
        time.sleep(0.2)
    pytest.fail(f"dashboard not healthy after {timeout} s:\n{log.read_text()[-3000:]}")


@contextlib.contextmanager
def _dashboard(cwd: Path, args: list[str], timeout: float = 30.0):
    """``elmon dashboard ARGS`` on a free port in its own process group, healthy; yields
    ``(base URL, server log)`` and stops the group (elmon and its streamlit child) after."""
    port = _free_port()
    elmon = Path(sys.executable).with_name("elmon")
    cmd = [str(elmon)] if elmon.exists() else [sys.executable, "-m", "monitor"]
    cmd += ["dashboard", *args, "--port", str(port)]
    log = cwd / "server.log"
    with open(log, "w") as out:
        proc = subprocess.Popen(cmd, stdout=out, stderr=subprocess.STDOUT, cwd=str(cwd),
                                start_new_session=True)
    base = f"http://127.0.0.1:{port}"
    try:
        _wait_healthy(base, proc, log, timeout=timeout)
        yield base, log
    finally:
        try:
            os.killpg(proc.pid, signal.SIGTERM)
            proc.wait(timeout=15)
        except (ProcessLookupError, subprocess.TimeoutExpired):
            try:
                os.killpg(proc.pid, signal.SIGKILL)
            except ProcessLookupError:
                pass


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    _ensure_chromium()
    d = tmp_path_factory.mktemp("browser")
    facts = fx.seed_store(d / "store.sqlite", long_obs=3000)
    truth = fx.write_truth(d / "truth.csv", facts)
    fx.write_replay_folder(d / "replay-out", facts)
    with _dashboard(d, ["--db", facts["path"], "--truth", str(truth)]) as (base, log):
        yield {"base": base, "facts": facts, "log": log}


@pytest.fixture(scope="module")
def browser(server):
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
        try:
            yield b
        finally:
            b.close()


def _open(browser, url: str, title: str, ready: str):
    page = browser.new_page(viewport={"width": 1440, "height": 1300})
    page.goto(url, wait_until="domcontentloaded", timeout=30_000)
    page.wait_for_selector(f'h1:has-text("{title}")', timeout=30_000)
    # the drawn element, or an error box (reported at once instead of after a timeout)
    page.wait_for_selector(f'{ready}, [data-testid="stException"]', state="visible",
                           timeout=30_000)
    errors = page.locator('[data-testid="stException"]')
    assert errors.count() == 0, f"error box on {url}: {errors.first.inner_text()[:2000]}"
    page.wait_for_timeout(800)   # let vega finish drawing before the screenshot
    assert page.locator('[data-testid="stAlertContentError"]').count() == 0
    assert page.get_by_text("statistical evidence to inform decisions").count() >= 1
    return page


def _shot(page, name: str, readme: bool = False) -> None:
    ARTIFACTS.mkdir(exist_ok=True)
    page.screenshot(path=str(ARTIFACTS / f"{name}.png"))
    if readme and os.environ.get("ELMON_UPDATE_SCREENSHOTS") == "1":   # refresh README images
        SCREENSHOTS.mkdir(parents=True, exist_ok=True)
        page.screenshot(path=str(SCREENSHOTS / f"{name}.png"))


def test_overview_renders_and_refreshes_live(server, browser):
    page = _open(browser, server["base"] + "/", "Overview",
                 '[data-testid="stDataFrame"] canvas')
    metric = page.locator('[data-testid="stMetric"]', has_text="Open alerts")
    assert metric.locator('[data-testid="stMetricValue"]').inner_text().strip() == "5"
    _shot(page, "overview", readme=True)
    # a new alert written by another process appears without a reload: the fragment re-reads
    # the store every 10 s (default) and the query cache lives 5 s
    facts = server["facts"]
    w = mstore.open_store(facts["path"])
    try:
        mstore.open_alert(w, facts["series"][7], "level_shift", "2024-03-10T00:00:00Z",
                          -1.0, -1.2, -0.8, "seeded during the browser test")
    finally:
        w.close()
    from playwright.sync_api import expect

    expect(metric.locator('[data-testid="stMetricValue"]')).to_have_text("6", timeout=25_000)
    page.close()


def test_series_detail_renders_charts(server, browser):
    s = server["facts"]["series"][1]
    url = server["base"] + "/series?" + urllib.parse.urlencode({"series": s})
    page = _open(browser, url, "Series detail", CHART)
    assert page.locator('[data-testid="stVegaLiteChart"]').count() >= 2
    assert page.get_by_text("known change points: 1").count() == 1
    _shot(page, "series", readme=True)
    page.close()


def test_alerts_page_renders(server, browser):
    page = _open(browser, server["base"] + "/alerts", "Alerts",
                 '[data-testid="stDataFrame"] canvas')
    assert page.get_by_text("Event history").count() == 1
    _shot(page, "alerts")
    page.close()


def test_replay_page_renders(server, browser):
    page = _open(browser, server["base"] + "/replay", "Replay",
                 CHART)
    assert page.get_by_text("Detection against known change points").count() == 1
    _shot(page, "replay")
    page.close()


def test_hostile_ids_render_as_plain_text(tmp_path, browser):
    """Issue 14: series ids and messages with markdown, HTML, emoji and colour codes show as
    the characters they are: no image fetched, no link made, no TeX, no coloured text."""
    from tests.test_dashboard_security import HOSTILE, _seed

    facts = _seed(tmp_path / "store.sqlite")
    with _dashboard(tmp_path, ["--db", facts["path"]], timeout=120) as (base, _log):
        pages = [(base + "/series?" + urllib.parse.urlencode({"series": h}), "Series detail",
                  CHART, h) for h in HOSTILE[:4]]
        pages.append((base + "/alerts", "Alerts", '[data-testid="stDataFrame"] canvas',
                      None))
        for url, title, ready, hostile in pages:
            page = _open(browser, url, title, ready)
            md = page.locator('[data-testid="stMarkdownContainer"]')
            for i in range(md.count()):
                el = md.nth(i)
                hrefs = [a.get_attribute("href") or "" for a in el.locator("a").all()]
                assert not [h for h in hrefs if "evil.example" in h or "127.0.0.1:9" in h
                            or h.startswith("mailto:")], (url, hrefs)
                srcs = [im.get_attribute("src") or "" for im in el.locator("img").all()]
                assert not [s for s in srcs if s.startswith("http")], (url, srcs)
                assert el.locator(".katex, span[style*='color']").count() == 0, url
            # the visible text plus the values of inputs (the select box shows its choice in
            # an input), word joiners removed (invisible; dashboard.safe_text)
            body = page.evaluate(
                "() => document.body.innerText + '\\n' + Array.from("
                "document.querySelectorAll('input')).map(i => i.value).join('\\n')"
            ).replace("\u2060", "")
            if hostile is not None:          # the id itself is on the page, as typed
                assert hostile.replace("\n", "\u240a") in body, (hostile, body[:1500])
            else:
                assert "![x](http://evil.example/x.png)" in body
            _shot(page, f"hostile-{title.split()[0].lower()}-{len(url) % 97}")
            page.close()
