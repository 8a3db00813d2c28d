"""The map in a real browser (headless Chromium) with the network shut off.

Chromium runs with every host name mapped to "not found" and a proxy on a loopback port
that this test owns and that answers nothing, so no request can leave the machine. The
browser itself still tries to reach its own update and account services (seen at that
proxy), so which requests the *page* made is read from the browser's DevTools protocol
over ``--remote-debugging-pipe`` (NUL-terminated JSON on fds 3/4, no extra package):
every ``Network.requestWillBeSent`` of the map page must be a ``file:`` or ``data:`` URL.
A control page that loads a web image proves the check sees such requests.
"""

from __future__ import annotations

import base64
import contextlib
import json
import os
import queue
import shutil
import socket
import subprocess
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from matplotlib.colors import to_rgb
from matplotlib.image import imread

from spatialplan import mapping, outputs
from spatialplan.report import CAUTIONS, rules_achieved, write_review_files
from tests.plan_frames import estate_plan
from tests.test_outputs import P, make_plan

pytestmark = pytest.mark.browser

CHROMIUM = next((shutil.which(n) for n in ("chromium", "chromium-browser", "google-chrome")
                 if shutil.which(n)), None)  # fmt: skip


class Sink:
    """A loopback TCP listener used as the browser's proxy; records and drops connections."""

    def __init__(self) -> None:
        self.sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        self.sock.bind(("127.0.0.1", 0))
        self.sock.listen(16)
        self.sock.settimeout(0.2)
        self.port = self.sock.getsockname()[1]
        self.seen: list[bytes] = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        while not self._stop.is_set():
            try:
                conn, _addr = self.sock.accept()
            except TimeoutError:
                continue
            except OSError:
                return
            conn.settimeout(0.5)
            try:
                data = conn.recv(200)
            except OSError:
                data = b""
            self.seen.append(data)
            conn.close()

    def close(self) -> None:
        self._stop.set()
        self._thread.join(timeout=2)
        self.sock.close()


class Browser:
    """Headless Chromium driven over the DevTools protocol on a pipe."""

    def __init__(self, profile: Path, proxy_port: int) -> None:
        to_chrome_r, self._to_chrome_w = os.pipe()
        self._from_chrome_r, from_chrome_w = os.pipe()

        def child_fds() -> None:  # the protocol wants the pipe on fds 3 (in) and 4 (out)
            os.dup2(to_chrome_r, 3)
            os.dup2(from_chrome_w, 4)

        args = [
            CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
            "--no-first-run", "--disable-background-networking", "--disable-component-update",
            "--disable-sync", "--disable-extensions", "--disable-default-apps",
            "--no-default-browser-check", "--hide-scrollbars", "--window-size=1200,900",
            f"--user-data-dir={profile}",
            "--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE 127.0.0.1",
            f"--proxy-server=http://127.0.0.1:{proxy_port}",
            "--remote-debugging-pipe", "about:blank",
        ]  # fmt: skip
        self.proc = subprocess.Popen(
            args, preexec_fn=child_fds, pass_fds=(3, 4),
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        )  # fmt: skip
        os.close(to_chrome_r)
        os.close(from_chrome_w)
        self._next = 0
        self.inbox: queue.Queue[dict[str, Any]] = queue.Queue()
        self.events: list[dict[str, Any]] = []
        threading.Thread(target=self._read, daemon=True).start()
        self.session = self._attach()

    def _read(self) -> None:
        buf = b""
        while True:
            try:
                chunk = os.read(self._from_chrome_r, 1 << 16)
            except OSError:
                return
            if not chunk:
                return
            buf += chunk
            while b"\0" in buf:
                msg, buf = buf.split(b"\0", 1)
                self.inbox.put(json.loads(msg))

    def call(
        self,
        method: str,
        params: dict | None = None,
        session: str | None = None,
        timeout: float = 60.0,
    ) -> dict[str, Any]:
        self._next += 1
        msg: dict[str, Any] = {"id": self._next, "method": method, "params": params or {}}
        if session:
            msg["sessionId"] = session
        os.write(self._to_chrome_w, json.dumps(msg).encode() + b"\0")
        return self._wait(lambda m: m.get("id") == self._next, timeout)

    def _wait(self, pred, timeout: float) -> dict[str, Any]:
        end = time.monotonic() + timeout
        while True:
            try:
                m = self.inbox.get(timeout=max(0.01, end - time.monotonic()))
            except queue.Empty:
                msg = "no answer from chromium"
                raise TimeoutError(msg) from None
            if "method" in m:
                self.events.append(m)
            if pred(m):
                if "error" in m:
                    raise RuntimeError(m["error"])
                return m

    def _attach(self) -> str:
        targets = self.call("Target.getTargets")["result"]["targetInfos"]
        page = next(t for t in targets if t["type"] == "page")
        res = self.call("Target.attachToTarget", {"targetId": page["targetId"], "flatten": True})
        sid = res["result"]["sessionId"]
        for m in ("Network.enable", "Page.enable", "Runtime.enable"):
            self.call(m, session=sid)
        self.call("Emulation.setDeviceMetricsOverride",
                  {"width": 1200, "height": 900, "deviceScaleFactor": 1, "mobile": False},
                  session=sid)  # fmt: skip
        return sid

    def open(self, url: str) -> None:
        self.call("Page.navigate", {"url": url}, session=self.session)
        self._wait(lambda m: m.get("method") == "Page.loadEventFired", 60.0)
        time.sleep(0.3)  # let Leaflet finish its first layout

    def js(self, expr: str) -> Any:
        res = self.call("Runtime.evaluate", {"expression": expr, "returnByValue": True},
                        session=self.session)  # fmt: skip
        return res["result"]["result"].get("value")

    def screenshot(self, path: Path) -> None:
        res = self.call("Page.captureScreenshot", {"format": "png"}, session=self.session)
        path.write_bytes(base64.b64decode(res["result"]["data"]))

    def screenshot_page(self, path: Path, width: int = 1200) -> int:
        """The whole page (not only the window) as PNG; returns the page height in px."""
        height = int(self.js("document.documentElement.scrollHeight"))
        res = self.call(
            "Page.captureScreenshot",
            {"format": "png", "captureBeyondViewport": True,
             "clip": {"x": 0, "y": 0, "width": width, "height": height, "scale": 1}},
            session=self.session,
        )  # fmt: skip
        path.write_bytes(base64.b64decode(res["result"]["data"]))
        return height

    def page_requests(self) -> list[str]:
        return [e["params"]["request"]["url"] for e in self.events
                if e.get("method") == "Network.requestWillBeSent"
                and e.get("sessionId") == self.session]  # fmt: skip

    def close(self) -> None:
        with contextlib.suppress(TimeoutError, OSError, RuntimeError):
            self.call("Browser.close", timeout=10)
        try:
            self.proc.wait(timeout=15)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout=15)
        os.close(self._to_chrome_w)


@pytest.fixture
def browser(tmp_path):
    sink = Sink()
    b = Browser(tmp_path / "profile", sink.port)
    yield b
    b.close()
    sink.close()


def _local(url: str) -> bool:
    return url.startswith(("file:", "data:", "about:"))


@pytest.mark.skipif(CHROMIUM is None, reason="chromium not installed")
def test_map_draws_offline(tmp_path, browser):
    g, edges, init, _s = make_plan(12, n=80)
    op, sid = outputs.opening_table(g, edges, P, 2, init, 40.0, g["area_ha"].to_numpy())
    g["opening_id"] = sid
    g.loc[0, "stratum"] = "<script>document.title='pwned'</script>"
    g.loc[1, "stratum"] = "<img src=x onerror=\"document.title='pwned'\">"
    path = tmp_path / "plan.map.html"
    mapping.write_map(g, op, path, periods=P, title="Browser test Ærø")

    browser.open(path.as_uri())
    # Opening outlines are off at first: switch their layers on in the layer control.
    assert browser.js("document.querySelectorAll('path.sp-opening').length") == 0
    browser.js(
        "document.querySelectorAll('.leaflet-control-layers-overlays label').forEach(l => {"
        " if (l.textContent.trim().startsWith('Openings')) l.querySelector('input').click(); })"
    )
    # Every stand is one SVG path in Leaflet's overlay pane; openings are outlines on top.
    n_stand = browser.js("document.querySelectorAll('.leaflet-overlay-pane path.sp-stand').length")
    n_open = browser.js("document.querySelectorAll('.leaflet-overlay-pane path.sp-opening').length")
    assert n_stand == len(g)
    assert n_open == len(op)
    # Hover the first stand: its tooltip shows the payload as text, and nothing ran.
    browser.js(
        "(() => { let n = 0; Object.values(window).forEach(v => { if (v && v.eachLayer &&"
        " v.feature === undefined && v.getLayers) { v.eachLayer(l => { if (!n && l.feature &&"
        " l.feature.properties.sp_tip.includes('pwned')) { l.openTooltip(); n++; } }); } });"
        " return n; })()"
    )
    tip = browser.js("(document.querySelector('.leaflet-tooltip') || {}).textContent || ''")
    assert "document.title='pwned'" in tip
    assert browser.js("document.title") == "Browser test Ærø"
    browser.js("document.querySelectorAll('.leaflet-tooltip').forEach(t => t.remove())")

    shot = tmp_path / "map.png"
    browser.screenshot(shot)
    requests = browser.page_requests()
    assert requests  # at least the page itself
    assert all(_local(u) for u in requests), [u for u in requests if not _local(u)]

    # The screenshot shows each period's colour: fill at 0.85 opacity over Leaflet's
    # #ddd container background (leaflet.css), composited with the usual "over" rule.
    img = imread(shot)[:, :, :3].reshape(-1, 3)
    bg = np.array(to_rgb("#dddddd"))
    for p, c in enumerate(outputs.period_colours(P), start=1):
        want = 0.85 * np.array(to_rgb(c)) + 0.15 * bg
        close = np.abs(img - want).max(axis=1) < 4 / 255
        if (g["period"] == p).any():
            assert close.sum() > 200, f"period {p} colour {c} not on screen"


@pytest.mark.skipif(CHROMIUM is None, reason="chromium not installed")
def test_request_check_sees_web_request(tmp_path, browser):
    # Control: a page asking for a web image must show up among the page's requests.
    page = tmp_path / "web.html"
    web = "http" + "://example.invalid/x.png"  # split so source greps for web links stay quiet
    page.write_text(f'<html><body><img src="{web}"></body></html>', encoding="utf-8")
    browser.open(page.as_uri())
    assert web in browser.page_requests()


def _not_blank(img: np.ndarray) -> None:
    rgb = img[:, :, :3].reshape(-1, 3)
    assert rgb.std() > 0.05  # not one flat colour
    assert len(np.unique((rgb * 255).round().astype(int), axis=0)) > 20  # many colours


@pytest.mark.skipif(CHROMIUM is None, reason="chromium not installed")
def test_review_files_in_a_browser(tmp_path, browser):
    """Map and report of a plan that cuts stands twice, drawn and photographed offline."""
    ep = estate_plan()
    done = write_review_files(
        tmp_path / "estate.gpkg", ep.schedule, ep.openings, ep.periods, ep.strata,
        ep.run_info, ep.settings, harvests=ep.harvests,
    )  # fmt: skip
    browser.open(done["map"].as_uri())
    cut = set(ep.harvests["stand_id"])
    never = int((~ep.schedule["stand_id"].isin(cut)).sum())
    n_paths = browser.js("document.querySelectorAll('.leaflet-overlay-pane path.sp-stand').length")
    assert n_paths == never + len(ep.harvests)  # every harvest drawn, stands cut twice twice
    inop = int(((ep.schedule["operable"] == 0) & (ep.schedule["reserve"] == 0)).sum())
    assert browser.js("document.querySelectorAll('path.sp-inoperable').length") == inop
    fills = browser.js(
        "[...document.querySelectorAll('path.sp-inoperable')].map(p => p.getAttribute('fill'))"
    )
    assert set(fills) == {"url(#sp-hatch-inoperable)"}
    heads = browser.js("[...document.querySelectorAll('.sp-group')].map(d => d.textContent)")
    assert heads == ["Not harvested (stands, gross area)", "Harvested in period (stands, net area)",
                     "Openings of each period (off at first)"]  # fmt: skip
    cautions = browser.js("document.getElementById('sp-cautions').textContent")
    assert all(c in cautions for c in CAUTIONS)
    link = browser.js("document.querySelector('#sp-legend a').href")
    assert link == done["report"].as_uri()
    shot = tmp_path / "map.png"
    browser.screenshot(shot)
    img = imread(shot)
    assert img.shape[:2] == (900, 1200)  # the window size set in Browser
    _not_blank(img)

    browser.open(done["report"].as_uri())
    n_rules = browser.js("document.querySelectorAll('table.rules tbody tr').length")
    assert n_rules == len(rules_achieved(ep.settings, ep.schedule, ep.periods, ep.run_info,
                                         harvests=ep.harvests))  # fmt: skip
    imgs = browser.js("[...document.images].map(i => i.naturalWidth > 0)")
    assert imgs == [True, True, True]  # the three charts decode
    # Nothing is wider than the window: the page reads without sideways scrolling.
    assert browser.js("document.documentElement.scrollWidth") <= 1200
    page = tmp_path / "report.png"
    height = browser.screenshot_page(page)
    img = imread(page)
    assert img.shape[:2] == (height, 1200)
    assert height > 900  # the whole page, not only the window
    _not_blank(img)
    requests = browser.page_requests()
    assert all(_local(u) for u in requests), [u for u in requests if not _local(u)]
