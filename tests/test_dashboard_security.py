"""The dashboard's security model (issue 14, item 5), through AppTest and a real server:

- read-only unless started with ``--allow-actions``; with it, acting needs a name;
- the Replay page reads and writes only under the replay root (no ``/etc/passwd``, no ``..``);
- ids, messages and paths are shown as text: no markdown image, link, emoji or colour code of a
  series id reaches a markdown element unescaped;
- requests with a foreign ``Host`` or ``Origin`` header are refused (DNS rebinding).

Streamlit renders the markdown in the browser, so AppTest sees the markdown *source*; the tests
check that source is :func:`dashboard.safe_text.plain` of the data (what the browser shows of
that form is checked in ``tests/test_dashboard_browser.py``'s hostile-id test, and the escape
rule is CommonMark 0.31 section 2.4, backslash escapes).
"""

from __future__ import annotations

import hashlib
import os
import socket
import string
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from streamlit.testing.v1 import AppTest

from dashboard import files
from dashboard.safe_text import WORD_JOINER, plain, shown
from dashboard.serve import allowed_hosts, request_allowed
from monitor import store as mstore
from monitor.errors import SourceError
from tests import dashboard_fixtures as fx

ROOT = Path(__file__).resolve().parents[1]
APP = ROOT / "dashboard" / "app.py"

#: Invented series ids carrying markup of every kind the issue lists.
HOSTILE = [
    "![px](http://127.0.0.1:9/px.png)",             # remote image, fetched by the viewer
    "[click me](http://evil.example/)",             # live link
    ":red[alarm] :smile: :material/home:",          # colour, emoji and icon codes
    "<img src=x onerror=alert(1)>",                 # raw HTML
    "**bold** $x^2$ `code`",                        # emphasis, TeX, code
    "www.evil.example mail@evil.example",           # bare addresses (GFM autolinks)
    "two\nlines # heading",                         # a new markdown block
]
#: Raw markup that must never appear in a markdown element's source.
RAW_MARKUP = ["![", "](http", ":red[", ":smile:", ":material/home", "<img", "**bold**",
              "$x^2$", "`code`", "www.evil", "mail@evil", "\n# heading", "two\n"]


def _seed(path: Path) -> dict:
    rng = np.random.default_rng(3)
    store = mstore.open_store(path, create=True)
    obs, est, settings = [], [], []
    for name in HOSTILE:
        o, e = fx._series_frames(name, 60, rng, -1.3, -2.0, change_at=40)
        obs.append(o)
        est.append(e)
        settings.append({"series": name, "low": -3.0, "high": -0.2, "forgetting": 0.98})
    mstore.write_batch(store, observations=pd.concat(obs, ignore_index=True),
                       estimates=pd.concat(est, ignore_index=True),
                       series=pd.DataFrame(settings))
    ids = []
    for name, e in zip(HOSTILE, est):
        row = e.iloc[50]
        ids.append(mstore.open_alert(store, name, "elasticity_change", row["ts"], row["beta"],
                                     row["beta_lo"], row["beta_hi"],
                                     f"b moved on {name} — see ![x](http://evil.example/x.png)",
                                     severity="warning", details={"statistic": 9.0,
                                                                  "threshold": 5.0}))
    store.close()
    return {"path": str(path), "alert_ids": ids}


@pytest.fixture()
def hostile(tmp_path, monkeypatch):
    facts = _seed(tmp_path / "store.sqlite")
    monkeypatch.setenv("ELMON_DB", facts["path"])
    monkeypatch.delenv("ELMON_TRUTH", raising=False)
    monkeypatch.delenv("ELMON_DASHBOARD_ACTIONS", raising=False)
    monkeypatch.delenv("ELMON_REPLAY_ROOT", raising=False)
    facts["dir"] = tmp_path
    return facts


def _app() -> AppTest:
    at = AppTest.from_file(str(APP), default_timeout=60)
    at.run()
    assert not at.exception, [e.value for e in at.exception]
    return at


def _markdown_sources(at) -> list[str]:
    """Every text of the page that Streamlit renders as markdown."""
    out = []
    for group in (at.markdown, at.caption, at.subheader, at.title, at.header, at.info,
                  at.warning, at.error, at.success):
        out += [str(e.value) for e in group]
    for m in at.metric:
        out += [str(m.label), str(m.value), str(m.proto.help)]
    out += [str(p.proto.label) for p in at.get("page_link")]
    return out


def _has_raw(raw: str, src: str) -> bool:
    """``raw`` occurs in ``src`` other than backslash-escaped (a markup character right after
    a backslash is literal text, CommonMark 0.31 section 2.4)."""
    i = src.find(raw)
    while i >= 0:
        if not (raw[0] in string.punctuation and i > 0 and src[i - 1] == "\\"):
            return True
        i = src.find(raw, i + 1)
    return False


def _no_raw_markup(at) -> None:
    for src in _markdown_sources(at):
        for raw in RAW_MARKUP:
            assert not _has_raw(raw, src), f"raw markup {raw!r} reaches markdown: {src[:200]!r}"


def _store_digest(path: str) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


# ------------------------------------------------------------------ text, never markup
def test_plain_escapes_every_markup_kind_and_shows_the_text():
    for h in HOSTILE:
        md = plain(h)
        for raw in RAW_MARKUP:
            assert not _has_raw(raw, md), (raw, md)
        assert any(_has_raw(raw, h) for raw in RAW_MARKUP), h    # the check can fail
        # what the reader sees is the id itself, line breaks as the visible control picture
        assert shown(md) == h.replace("\n", "\u240a")
    assert WORD_JOINER in plain("a:b") and plain("a:b").replace(WORD_JOINER, "") == "a\\:b"


def test_hostile_series_ids_render_as_text_on_every_page(hostile):
    at = _app()
    _no_raw_markup(at)                                  # overview
    at.switch_page("views/series.py").run()
    for h in HOSTILE:
        at.selectbox(key="sd_series").set_value(h).run()
        assert not at.exception, [e.value for e in at.exception]
        _no_raw_markup(at)
    at.switch_page("views/alerts.py").run()
    for aid, h in zip(hostile["alert_ids"], HOSTILE):
        at.selectbox(key="al_pick").set_value(aid).run()
        assert not at.exception, [e.value for e in at.exception]
        _no_raw_markup(at)
        head = [s.value for s in at.subheader if s.value.startswith(f"Alert {aid}:")]
        assert head == [f"Alert {aid}: {plain(h)} · elasticity change"]
        assert shown(head[0]).endswith(h.replace("\n", "\u240a") + " · elasticity change")
        # the message (with its own image markup) is shown as text
        assert plain(f"b moved on {h} — see ![x](http://evil.example/x.png)") in \
            [m.value for m in at.markdown]
    for page in ("views/replay.py", "views/groups.py"):
        at.switch_page(page).run()
        assert not at.exception, [e.value for e in at.exception]
        _no_raw_markup(at)


# ------------------------------------------------------------------ read-only by default
def test_dashboard_without_actions_option_changes_nothing(hostile):
    before = _store_digest(hostile["path"])
    at = _app()
    at.switch_page("views/alerts.py").run()
    aid = hostile["alert_ids"][0]
    at.selectbox(key="al_pick").set_value(aid).run()
    keys = {b.key for b in at.button}
    assert "al_ack" not in keys and "al_resolve" not in keys
    assert any("read-only" in c.value and "--allow-actions" in c.value for c in at.caption)
    assert any("Read-only" in c.value for c in at.sidebar.caption)
    for page in ("views/overview.py", "views/series.py", "views/replay.py", "views/groups.py",
                 "views/experiments.py"):
        at.switch_page(page).run()
        assert not at.exception, [e.value for e in at.exception]
    # the write path itself refuses too, whatever calls it
    from dashboard import data
    with pytest.raises(PermissionError, match="read-only"):
        data.change_alert(hostile["path"], aid, "resolve", "note", "someone")
    assert mstore.get_alert(hostile["path"], aid)["state"] == "open"
    assert _store_digest(hostile["path"]) == before


def test_actions_option_asks_who_acts(hostile, monkeypatch):
    monkeypatch.setenv("ELMON_DASHBOARD_ACTIONS", "1")
    at = _app()
    at.switch_page("views/alerts.py").run()
    aid = hostile["alert_ids"][1]
    at.selectbox(key="al_pick").set_value(aid).run()
    at.text_area(key="al_note").input("checked with the kiosk")
    at.button(key="al_ack").click().run()              # no name given
    assert any("give your name" in e.value for e in at.error)
    assert mstore.get_alert(hostile["path"], aid)["state"] == "open"
    at.text_input(key="al_who").input("analyst on duty")
    at.button(key="al_ack").click().run()
    assert mstore.get_alert(hostile["path"], aid)["state"] == "acknowledged"
    ev = mstore.alert_events(hostile["path"], aid)
    assert ev["who"].iloc[-1] == "analyst on duty"


# ------------------------------------------------------------------ replay root
def test_under_root_refuses_paths_outside(tmp_path):
    root = tmp_path / "root"
    (root / "runs").mkdir(parents=True)
    (tmp_path / "outside").mkdir()
    os.symlink(tmp_path / "outside", root / "link-out")
    assert files.under_root("runs", root) == (root / "runs").resolve()
    assert files.under_root(str(root / "runs"), root) == (root / "runs").resolve()
    for bad in ("/etc/passwd", "../outside", "runs/../../outside", "link-out",
                str(tmp_path / "outside")):
        with pytest.raises(SourceError, match="outside the replay root"):
            files.under_root(bad, root)
    with pytest.raises(SourceError, match="no replay root"):
        files.under_root("runs", None)


def test_replay_page_reads_only_under_the_root(hostile):
    at = _app()
    at.switch_page("views/replay.py").run()
    assert any("Replay root" in c.value for c in at.caption)
    for typed in ("/etc", "/etc/passwd", "../../../../etc", "~/"):
        at.text_input(key="rp_folder_text").input(typed).run()
        assert not at.exception
        errs = [e.value for e in at.error]
        assert errs and "outside the replay root" in shown(errs[0]), (typed, errs)
        assert "root:" not in " ".join(errs)             # no line of /etc/passwd shown
    at.text_input(key="rp_folder_text").input("").run()
    # the run form: a log outside the root is refused before anything is read or written
    out = hostile["dir"] / "should-not-exist"
    at.text_input(key="rp_log").input("/etc/passwd")
    at.text_input(key="rp_out").input(str(out)).run()
    at.button(key="rp_run").click().run()
    errs = [shown(e.value) for e in at.error]
    assert any("observation log '/etc/passwd' is outside the replay root" in e for e in errs)
    assert not out.exists()
    at.text_input(key="rp_log").input("feed.csv")
    at.text_input(key="rp_out").input("../../escaped").run()
    at.button(key="rp_run").click().run()
    assert any("output folder '../../escaped' is outside the replay root" in shown(e.value)
               for e in at.error)
    assert not (hostile["dir"].parent.parent / "escaped").exists()


# ------------------------------------------------------------------ host check
def test_host_and_origin_rules():
    ok = allowed_hosts("127.0.0.1")
    assert request_allowed("127.0.0.1:8501", None, ok)
    assert request_allowed("localhost:8501", "http://localhost:8501", ok)
    assert request_allowed("[::1]:8501", None, ok)
    assert not request_allowed("rebind.evil.example:8501", "http://rebind.evil.example:8501", ok)
    assert not request_allowed("127.0.0.1:8501", "http://evil.example", ok)
    assert not request_allowed(None, None, ok) and not request_allowed("", None, ok)
    wide = allowed_hosts("0.0.0.0", ["prices.example.org"])
    assert "0.0.0.0" not in wide and request_allowed("prices.example.org", None, wide)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _get(port: int, path: str, headers: dict) -> int:
    req = urllib.request.Request(f"http://127.0.0.1:{port}{path}", headers=headers)
    try:
        with urllib.request.urlopen(req, timeout=10) as r:
            return r.status
    except urllib.error.HTTPError as exc:
        return exc.code


@pytest.mark.slow
def test_real_server_refuses_a_foreign_host(hostile):
    port = _free_port()
    proc = subprocess.Popen([sys.executable, "-m", "monitor", "dashboard", "--db",
                             hostile["path"], "--port", str(port)],
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    try:
        deadline = time.monotonic() + 120          # hang guard; it answers in a few seconds
        status = None
        while time.monotonic() < deadline and proc.poll() is None:
            try:
                status = _get(port, "/_stcore/health", {"Host": f"127.0.0.1:{port}"})
                break
            except OSError:
                time.sleep(0.2)
        assert status == 200, proc.stdout.read() if proc.poll() is not None else status
        assert _get(port, "/", {"Host": f"localhost:{port}"}) == 200
        assert _get(port, "/", {"Host": f"rebind.evil.example:{port}"}) == 403
        assert _get(port, "/_stcore/health", {"Host": f"rebind.evil.example:{port}"}) == 403
        # the WebSocket handshake with a foreign Origin (same Host) is refused as well
        ws = {"Host": f"127.0.0.1:{port}", "Origin": "http://evil.example",
              "Upgrade": "websocket", "Connection": "Upgrade", "Sec-WebSocket-Version": "13",
              "Sec-WebSocket-Key": "dGhlIHNhbXBsZSBub25jZQ=="}
        assert _get(port, "/_stcore/stream", ws) == 403
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
