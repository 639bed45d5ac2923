"""The live page in a real headless browser (Debian's chromium, driven through the
Chrome DevTools Protocol), with the logger and the server sharing one board."""

from __future__ import annotations

import asyncio
import base64
import io
import json
import shutil
import signal
import subprocess
import time
import urllib.request
from pathlib import Path

import pytest
from feedmatch.sim.demo import _wait
from feedmatch.sim.station import load_station
from feedmatch.sim.virtual import VirtualBoard

from ..conftest import BIN, free_port, run_cli

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


def _get(url: str, token: str | None = None, method: str = "GET") -> tuple[int, dict]:
    req = urllib.request.Request(url, method=method, data=b"{}" if method == "POST" else None,
                                 headers={"X-Feedmatch-Token": token} if token else {})
    try:
        with urllib.request.urlopen(req, timeout=10) as r:
            return r.status, json.loads(r.read())
    except urllib.error.HTTPError as e:
        return e.code, json.loads(e.read())


class _Page:
    """One page of a headless chromium, through the DevTools Protocol websocket."""

    def __init__(self, ws):
        self.ws, self.n = ws, 0

    async def call(self, method: str, **params):
        self.n += 1
        await self.ws.send_json({"id": self.n, "method": method, "params": params})
        while True:
            msg = await self.ws.receive_json(timeout=30)
            if msg.get("id") == self.n:
                if "error" in msg:
                    raise RuntimeError(msg["error"])
                return msg["result"]

    async def js(self, expr: str):
        r = await self.call("Runtime.evaluate", expression=expr, returnByValue=True)
        return r["result"].get("value")

    async def until(self, expr: str, timeout: float = 20.0):
        t = time.monotonic() + timeout
        while time.monotonic() < t:
            v = await self.js(expr)
            if v:
                return v
            await asyncio.sleep(0.2)
        raise AssertionError(f"the page never showed: {expr}")


def _text(id_: str) -> str:
    return f"document.getElementById('{id_}').textContent"


@pytest.fixture
def served(tmp_path):
    """A virtual board, `log` owning its port, and `serve` attached to it."""
    vs = VirtualBoard(load_station(), tmp_path / "flash")
    pty = vs.start()
    time.sleep(1.0)
    db = tmp_path / "station.sqlite"
    procs = [subprocess.Popen([str(BIN / "feedmatch"), "log", "--port", pty, "--db", str(db)],
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)]
    assert _wait(lambda: db.exists(), 15)
    http = free_port()
    procs.append(subprocess.Popen([str(BIN / "feedmatch"), "serve", "--port", pty, "--db", str(db), "--http-port",
                                   str(http), "--allow-control", "s3cret-token"],
                                  stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True))
    line = procs[1].stdout.readline()
    assert "serving the board" in line, procs[1].stderr.read() if procs[1].poll() is not None else line
    yield vs, f"http://127.0.0.1:{http}/"
    for p in procs:
        p.send_signal(signal.SIGTERM)
    for p in procs:
        try:
            p.wait(15)
        except subprocess.TimeoutExpired:
            p.kill()
    vs.stop()


def test_control_needs_the_token_and_reads_work(served):
    vs, url = served
    assert _get(url + "api/config")[1] == {"board": True, "logbook": True, "control": True}
    assert _get(url + "api/tune", method="POST")[0] == 403
    assert _get(url + "api/tune", token="wrong-token", method="POST")[0] == 403
    code, ans = _get(url + "api/tune", token="s3cret-token", method="POST")
    assert code == 200 and ans["accepted"] is True
    assert _wait(lambda: (_get(url + "api/status")[1]["status"] or {}).get("state") == "wait-rf", 10)


def test_read_only_by_default_and_logbook_alone(tmp_path):
    from feedmatch.logbook.store import Logbook

    db = tmp_path / "station.sqlite"
    b = Logbook(db)
    b.start_session("hollow-oak-1", "-")
    b.add({"board_id": "hollow-oak-1", "seq": 1, "freq_hz": 7.1e6, "swr_before": 3.0, "swr_after": 1.2,
           "outcome": "locked", "n": 5, "ms": 400, "after": [101, 94, 0, 0]})
    b.close()
    http = free_port()
    p = subprocess.Popen([str(BIN / "feedmatch"), "serve", "--db", str(db), "--http-port", str(http)],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        assert "read-only" in p.stdout.readline()
        url = f"http://127.0.0.1:{http}/"
        assert _get(url + "api/config")[1] == {"board": False, "logbook": True, "control": False}
        assert _get(url + "api/tune", token="anything", method="POST")[0] == 403
        v = _get(url + "api/view")[1]
        assert v["tunes"] == 1 and v["bands"][0]["band"] == "40m" and len(v["smith"]["40m"]) == 1
        # The matched state as a load on the Smith chart: inside the unit circle.
        g = v["smith"]["40m"][0]
        assert g[0] ** 2 + g[1] ** 2 < 1.0
    finally:
        p.send_signal(signal.SIGTERM)
        p.wait(15)
    assert run_cli("serve", "--http-port", "8").returncode == 2  # neither a board nor a logbook


@pytest.mark.slow  # a real browser: make test-slow (CI runs it after make test)
@pytest.mark.skipif(CHROMIUM is None, reason="Debian's chromium is not installed (`make test` installs it "
                    "where it may run apt-get)")
def test_the_page_in_a_real_browser_shows_the_box_and_follows_a_tune(served, tmp_path):
    vs, url = served
    prof = tmp_path / "chromium-profile"
    br = subprocess.Popen([CHROMIUM, "--headless=new", "--no-sandbox", "--disable-gpu", "--no-first-run",
                           "--remote-debugging-port=0", f"--user-data-dir={prof}", "--window-size=1200,1000",
                           "about:blank"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        port_file = prof / "DevToolsActivePort"
        assert _wait(lambda: port_file.exists() and port_file.read_text().strip(), 30), "chromium did not start"
        dport = int(port_file.read_text().split()[0])
        shot = asyncio.run(_drive(dport, url, vs))
    finally:
        br.kill()
        br.wait(10)
    # The screenshot is a real rendering: many distinct colours, not a blank page.
    import matplotlib.image as mpimg
    import numpy as np

    im = mpimg.imread(io.BytesIO(shot), format="png")
    assert im.shape[0] > 500 and im.shape[1] > 800
    rgb = (im[..., :3] * 255).astype(int)
    assert len(np.unique(rgb.reshape(-1, 3), axis=0)) > 50 and rgb.std() > 20
    Path(tmp_path / "page.png").write_bytes(shot)


async def _drive(dport: int, url: str, vs) -> bytes:
    import aiohttp

    async with aiohttp.ClientSession() as s:
        async with s.get(f"http://127.0.0.1:{dport}/json/list") as r:
            targets = await r.json()
        ws_url = [t for t in targets if t["type"] == "page"][0]["webSocketDebuggerUrl"]
        async with s.ws_connect(ws_url, max_msg_size=0) as ws:
            page = _Page(ws)
            await page.call("Page.enable")
            await page.call("Page.navigate", url=url)
            # The board's values arrive by server-sent events.
            await page.until(f"{_text('state')} === 'wait-rf' || {_text('state')} === 'through'")
            assert await page.js(_text("relays")) != "-"
            assert "board" in await page.js(_text("link"))
            before = int(await page.js(_text("seq")))
            # A tune on the virtual board: the page follows without a reload.
            vs.key(10.0, 14.2e6)
            await page.until(f"{_text('state')} === 'locked'", timeout=30)
            await page.until(f"Number({_text('seq')}) > {before}")
            swr = float(await page.js(_text("swr")))
            # The true SWR the reading allows (the coupler's bounds) beside it.
            lo, hi = (float(x) for x in (await page.js(_text("swr_bound"))).split("-"))
            assert lo <= swr <= hi
            assert 1.0 <= swr <= 1.5
            assert (await page.js(_text("freq"))).startswith("14.2")
            assert " uH, " in await page.js(_text("relays"))  # the board's own values beside the codes
            # The logbook table (written by `log`) shows the tune's band.
            await page.until("[...document.querySelectorAll('#bands tbody td:first-child')]"
                             ".some(td => td.textContent === '20m')", timeout=30)
            # When the page last heard from the board and read the logbook, in UTC.
            upd = await page.js(_text("updated"))
            assert "board: updated " in upd and "logbook: read " in upd and upd.endswith(" UTC"), upd
            vs.key(0.0)
            shot = await page.call("Page.captureScreenshot", format="png")
            return base64.b64decode(shot["data"])


# Records what the page writes on its canvases (text, where, in which colour), the
# last drawing of each canvas only: the test reads the charts as drawn.
_RECORD_DRAWN = """
window.__drawn = [];
const _fill = CanvasRenderingContext2D.prototype.fillText;
CanvasRenderingContext2D.prototype.fillText = function (t, x, y, ...rest) {
  const m = this.getTransform();
  window.__drawn.push({c: this.canvas.id, t: String(t), x: m.a * x + m.c * y + m.e, y: m.b * x + m.d * y + m.f,
                       fill: this.fillStyle, rot: Math.abs(m.b) > 0.5});
  return _fill.call(this, t, x, y, ...rest);
};
const _clear = CanvasRenderingContext2D.prototype.clearRect;
CanvasRenderingContext2D.prototype.clearRect = function (...a) {
  const id = this.canvas.id;
  window.__drawn = window.__drawn.filter((d) => d.c !== id);
  return _clear.apply(this, a);
};
"""

# The page's band colours (app.js COLORS, matplotlib's tab10), in band order.
_TAB10 = [(31, 119, 180), (255, 127, 14), (44, 160, 44)]


@pytest.mark.slow  # a real browser: make test-slow (CI runs it after make test)
@pytest.mark.skipif(CHROMIUM is None, reason="Debian's chromium is not installed (`make test` installs it "
                    "where it may run apt-get)")
def test_the_page_charts_read_at_a_glance(tmp_path):
    """The SWR-over-time chart names its axes with units and zone, draws and says the
    target, keys the bands in band order (logged out of order here); the Smith chart
    labels its circles, keys the bands and tells the capacitor's side apart."""
    from feedmatch.logbook.store import Logbook

    db = tmp_path / "station.sqlite"
    b = Logbook(db)
    b.start_session("hollow-oak-1", "-")
    rows = [  # 20m first, then 12m, then 40m: the logbook's order is not the bands'
        (1, 14.2e6, 1.2, [11, 22, 0], "2026-11-01T10:00:00+00:00"),
        (2, 24.93e6, 1.3, [5, 12, 0], "2026-11-01T11:00:00+00:00"),
        (3, 7.1e6, 1.1, [101, 94, 1], "2026-11-02T09:30:00+00:00"),
        (4, 14.2e6, 1.4, [11, 22, 0], "2026-11-02T12:00:00+00:00")]
    for seq, f, swr, after, when in rows:
        b.add({"board_id": "hollow-oak-1", "seq": seq, "freq_hz": f, "swr_before": 3.0, "swr_after": swr,
               "outcome": "locked", "n": 5, "ms": 400, "after": after + [0]}, when)
    b.close()
    http = free_port()
    p = subprocess.Popen([str(BIN / "feedmatch"), "serve", "--db", str(db), "--http-port", str(http)],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    prof = tmp_path / "chromium-profile"
    br = None
    try:
        assert "read-only" in p.stdout.readline()
        view = _get(f"http://127.0.0.1:{http}/api/view")[1]
        assert view["band_order"] == ["40m", "20m", "12m"]
        br = subprocess.Popen([CHROMIUM, "--headless=new", "--no-sandbox", "--disable-gpu", "--no-first-run",
                               "--remote-debugging-port=0", f"--user-data-dir={prof}", "--window-size=1200,1000",
                               "about:blank"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        port_file = prof / "DevToolsActivePort"
        assert _wait(lambda: port_file.exists() and port_file.read_text().strip(), 30), "chromium did not start"
        drawn, pix = asyncio.run(_read_charts(int(port_file.read_text().split()[0]), f"http://127.0.0.1:{http}/",
                                              view))
    finally:
        if br is not None:
            br.kill()
            br.wait(10)
        p.send_signal(signal.SIGTERM)
        p.wait(15)
    (tmp_path / "charts.png").write_bytes(pix.pop("shot"))
    swr = [d for d in drawn if d["c"] == "swrtime"]
    texts = [d["t"] for d in swr]
    assert "SWR after tune" in texts and [d for d in swr if d["t"] == "SWR after tune"][0]["rot"]
    assert "time (UTC)" in texts and "target 1.5" in texts
    # The time axis: the first and last tune's times, in UTC.
    assert "11-01 10:00" in texts and "11-02 12:00" in texts
    key = sorted((d for d in swr if d["t"] in ("40m", "20m", "12m")), key=lambda d: d["y"])
    assert [d["t"] for d in key] == ["40m", "20m", "12m"]
    # As pictures: the key's swatches in the bands' colours, in band order; the dashed
    # target line red across the plot at SWR 1.5.
    for k, rgb in enumerate(pix["swatches"]):
        assert all(abs(a - b) <= 12 for a, b in zip(rgb, _TAB10[k])), (k, rgb)
    assert pix["target_red_share"] > 0.4, pix
    sm = [d["t"] for d in drawn if d["c"] == "smith"]
    assert {"0.2", "0.5", "1", "2", "5"} <= set(sm)
    assert {f"{s}j{x}" for x in ("0.2", "0.5", "1", "2", "5") for s in "+-"} <= set(sm)
    assert [t for t in sm if t in ("40m", "20m", "12m")] == ["40m", "20m", "12m"]
    assert "C on tx side" in sm and "C on ant side" in sm and "- - SWR 1.5" in sm
    # The 40m state (capacitor on the antenna side) is drawn as a triangle, 20m's
    # (transmitter side) as a dot: read from the pixels, the triangle is the wider below.
    assert pix["ant_width"] >= 6 and pix["tx_width"] <= 4, pix
    # The antenna's Smith chart is labelled the same way.
    assert {"0.2", "+j1", "-j1"} <= {d["t"] for d in drawn if d["c"] == "antsmith"}


async def _read_charts(dport: int, url: str, view: dict):
    import aiohttp

    async with aiohttp.ClientSession() as s:
        async with s.get(f"http://127.0.0.1:{dport}/json/list") as r:
            targets = await r.json()
        ws_url = [t for t in targets if t["type"] == "page"][0]["webSocketDebuggerUrl"]
        async with s.ws_connect(ws_url, max_msg_size=0) as ws:
            page = _Page(ws)
            await page.call("Page.enable")
            await page.call("Page.addScriptToEvaluateOnNewDocument", source=_RECORD_DRAWN)
            await page.call("Page.navigate", url=url)
            await page.until("window.__drawn && window.__drawn.some(d => d.c === 'smith' && d.t === '12m')")
            await page.until("window.__drawn.some(d => d.c === 'antsmith')")
            drawn = await page.js("window.__drawn")
            # Pixels read back from the canvases.
            g40 = [p for p in view["smith"]["40m"]][0]
            g20 = [p for p in view["smith"]["20m"]][0]
            pix = await page.js(f"""(() => {{
              const px = (id, x, y) => Array.from(document.getElementById(id).getContext('2d')
                .getImageData(Math.round(x), Math.round(y), 1, 1).data.slice(0, 3));
              const d = window.__drawn.filter(d => d.c === 'swrtime');
              const key = ['40m', '20m', '12m'].map(b => d.find(e => e.t === b));
              const swatches = key.map(e => px('swrtime', e.x - 10, e.y - 4));
              const lab = d.find(e => e.t === 'target 1.5');
              const c = document.getElementById('swrtime'), g = c.getContext('2d');
              const row = g.getImageData(52, Math.round(lab.y + 4), c.width - 110 - 52, 1).data;
              let red = 0;
              // red: the line is antialiased over two rows, so reddish rather than pure
              for (let i = 0; i < row.length; i += 4) if (row[i] > row[i + 1] + 50 && row[i] > row[i + 2] + 50) red++;
              const sc = document.getElementById('smith'), sg = sc.getContext('2d');
              const rad = sc.width / 2 - 24, cx = sc.width / 2, cy = rad + 20;
              // How many pixels of a marker's colour lie across a row 2.5 px below its
              // centre: a triangle is widest there (about 7), a dot of radius 3 narrow (about 3).
              const width = (g, rgb) => {{
                const x = cx + g[0] * rad, y = cy - g[1] * rad + 2.5;
                const d = sg.getImageData(Math.floor(x) - 6, Math.floor(y), 13, 1).data;
                let n = 0;
                for (let i = 0; i < d.length; i += 4)
                  if (Math.abs(d[i] - rgb[0]) + Math.abs(d[i + 1] - rgb[1]) + Math.abs(d[i + 2] - rgb[2]) < 90) n++;
                return n;
              }};
              return {{swatches, target_red_share: red / (row.length / 4),
                       ant_width: width({json.dumps(g40)}, {json.dumps(list(_TAB10[0]))}),
                       tx_width: width({json.dumps(g20)}, {json.dumps(list(_TAB10[1]))})}};
            }})()""")
            shot = await page.call("Page.captureScreenshot", format="png")
            return drawn, {**pix, "shot": base64.b64decode(shot["data"])}
