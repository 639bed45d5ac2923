"""`feedmatch serve`: a local web page of the station, live.

aiohttp serves one page and its assets (all shipped in the package: it works
offline), a JSON view of the logbook, and a server-sent event stream of the
board's status, updated as it changes.  A thread talks to the board: it owns
the port through the hub when nothing else does, or attaches to the owner
(`log`, `follow`).  Read-only unless a control token was given: then POST
/api/tune and /api/bypass work for requests that carry it.
"""

from __future__ import annotations

import asyncio
import hmac
import json
import threading
from pathlib import Path
from typing import Any

from aiohttp import web

from feedmatch.board.hub import ensure_hub
from feedmatch.board.link import BoardLink
from feedmatch.errors import BoardRefused, InputError, LinkError
from feedmatch.seam.bank import state_values

STATIC = Path(__file__).parent / "static"
TOKEN_HEADER = "X-Feedmatch-Token"
# A connection must send its request line and headers within this long, and an
# idle keep-alive connection is closed after it: held connections cannot pile up.
HEADER_TIMEOUT_S = 10.0
BODY_TIMEOUT_S = 10.0
MAX_BODY = 64 * 1024
MAX_STREAMS = 64  # open event streams (pages) at once
LOCAL_NAMES = ("127.0.0.1", "localhost", "::1")


def _host_name(header: str) -> str:
    """The name in a Host header, without its port ("[::1]:8765" -> "::1")."""
    h = header.strip().lower()
    if h.startswith("["):
        return h[1:h.find("]")] if "]" in h else h
    return h.rsplit(":", 1)[0] if h.count(":") == 1 else h


def _is_ip(name: str) -> bool:
    import ipaddress

    try:
        ipaddress.ip_address(name)
        return True
    except ValueError:
        return False


def host_guard(listen: str, extra: tuple[str, ...] = ()):
    """aiohttp middleware: answer only requests whose Host header names this server
    (127.0.0.1, localhost, the --listen address, names added with --allow-host).
    A page from another site that rebinds its own name to this address carries its
    name in Host and is refused (DNS rebinding).  Listening on every address
    (0.0.0.0, ::), any IP address literal is also accepted: a rebinding attack
    needs a name."""
    names = {n.lower() for n in (*LOCAL_NAMES, listen, *extra)}
    any_ip = listen in ("0.0.0.0", "::", "")

    @web.middleware
    async def guard(req: web.Request, handler):
        name = _host_name(req.headers.get("Host", ""))
        if name not in names and not (any_ip and _is_ip(name)):
            return web.json_response({"error": f"this server does not answer for the host name '{name}'; "
                                      "start serve with --allow-host NAME to add it"}, status=421)
        return await handler(req)
    return guard


class BoardWatch:
    """Polls the board's status in a thread and hands each change to publish(kind, data)."""

    def __init__(self, port: str, baud: int, publish, period_s: float = 0.5):
        self.port, self.baud, self.publish, self.period_s = port, baud, publish, period_s
        self.stop = threading.Event()
        self.status: dict[str, Any] | None = None
        self.error = ""
        self.hub = None
        self.link: BoardLink | None = None
        self.lock = threading.Lock()  # one request at a time on the link
        self.bank = None  # the board's element values, for uH and pF beside the codes
        self._th = threading.Thread(target=self._loop, daemon=True)

    def start(self) -> BoardWatch:
        self._th.start()
        return self

    def close(self) -> None:
        self.stop.set()
        self._th.join(3.0)
        if self.link is not None:
            self.link.close()
        if self.hub is not None:
            self.hub.close()

    def _connect(self) -> BoardLink:
        if self.link is None:
            self.hub = self.hub or ensure_hub(self.port, self.baud)
            self.link = BoardLink(self.port, self.baud, stop_event=self.stop).open()
            self.bank = self.link.bank()
        return self.link

    def request(self, word: str, args: dict[str, Any] | None = None) -> dict[str, Any]:
        with self.lock:
            return self._connect().request(word, args)

    def _loop(self) -> None:
        last = None
        while not self.stop.is_set():
            try:
                with self.lock:
                    ln = self._connect()
                    st = ln.request("status")
                    ln.pump()
                    recs = [o for w, o in list(ln.events) if w == "record"]
                    ln.events.clear()
                r = st.get("relays") or []
                v = state_values(self.bank, r[0], r[1]) if len(r) == 4 else None
                if v:
                    st["l_uh"], st["c_pf"] = round(v[0], 3), round(v[1], 1)
                self.status, self.error = st, ""
                for r in recs:
                    self.publish("record", r)
                # uptime changes every poll; the page needs only real changes.
                key = json.dumps({k: v for k, v in st.items() if k != "uptime_ms"}, sort_keys=True, default=str)
                if key != last:
                    last = key
                    self.publish("status", st)
            except LinkError as e:
                if self.link is not None:
                    self.link.close()
                self.link = None
                if str(e) != self.error:
                    self.error = str(e)
                    self.publish("board-lost", {"error": self.error})
                self.stop.wait(1.5)
                continue
            self.stop.wait(self.period_s)


class StationPage:
    """The page's server side: the logbook view, the board's events to every open page,
    and (with a token) the tune and bypass requests."""

    def __init__(self, db: str | None, port: str | None, baud: int = 115200, token: str | None = None,
                 listen: str = "127.0.0.1", allow_hosts: tuple[str, ...] = ()):
        self.db, self.port, self.baud, self.token = db, port, baud, token
        self.listen, self.allow_hosts = listen, tuple(allow_hosts)
        self.queues: set[asyncio.Queue] = set()
        self.loop: asyncio.AbstractEventLoop | None = None
        self.watch: BoardWatch | None = None
        self.db_mtime = 0.0

    # -- events to the browsers ------------------------------------------------------
    def publish(self, kind: str, data: Any) -> None:
        """From any thread: queue an event for every open page."""
        if self.loop is None:
            return
        msg = f"event: {kind}\ndata: {json.dumps(data, default=str)}\n\n"
        self.loop.call_soon_threadsafe(self._fanout, msg)

    def _fanout(self, msg: str) -> None:
        for q in list(self.queues):
            if q.qsize() < 200:
                q.put_nowait(msg)

    async def _watch_db(self) -> None:
        """A new tune in the logbook (written by `log`) tells the pages to reload the view."""
        while True:
            await asyncio.sleep(1.0)
            if not self.db:
                continue
            p = Path(self.db)
            try:
                m = max(p.stat().st_mtime, Path(str(p) + "-wal").stat().st_mtime if Path(str(p) + "-wal").exists()
                        else 0.0)
            except OSError:
                continue
            if m != self.db_mtime:
                self.db_mtime = m
                self._fanout("event: logbook\ndata: {}\n\n")

    # -- handlers ----------------------------------------------------------------------
    async def index(self, _req: web.Request) -> web.StreamResponse:
        return web.FileResponse(STATIC / "index.html")

    async def config(self, _req: web.Request) -> web.Response:
        return web.json_response({"board": self.port is not None, "logbook": self.db is not None,
                                  "control": self.token is not None})

    async def view(self, _req: web.Request) -> web.Response:
        if not self.db:
            return web.json_response({"tunes": 0, "bands": [], "series": {}, "smith": {}, "lines": []})
        from feedmatch.logbook.report import station_view

        try:
            v = await asyncio.get_running_loop().run_in_executor(None, station_view, self.db)
        except InputError as e:
            return web.json_response({"error": str(e), "tunes": 0, "bands": [], "series": {}, "smith": {},
                                      "lines": []})
        return web.json_response(v, dumps=lambda o: json.dumps(o, default=str))

    async def antenna(self, _req: web.Request) -> web.Response:
        """The antenna as the box measured it (sim.curve): points with their errors, the
        loads' reflection coefficients for the Smith chart, resonances and health notes."""
        empty = {"points": [], "resonances": [], "health": {}, "notes": []}
        if not self.db:
            return web.json_response(empty)

        def build() -> dict:
            from feedmatch.sim.curve import add_antenna

            rep = add_antenna({"bands": []}, self.db)
            h = rep.get("antenna_health_bands", {})
            return rep["antenna_curve"] | {"health": h, "notes": rep["antenna_notes"]}

        try:
            v = await asyncio.get_running_loop().run_in_executor(None, build)
        except InputError as e:
            return web.json_response(empty | {"error": str(e)})
        return web.json_response(v)

    async def status(self, _req: web.Request) -> web.Response:
        w = self.watch
        return web.json_response({"status": w.status if w else None, "error": w.error if w else "no board"})

    async def events(self, req: web.Request) -> web.StreamResponse:
        if len(self.queues) >= MAX_STREAMS:
            return web.json_response({"error": f"too many open pages (at most {MAX_STREAMS})"}, status=503)
        resp = web.StreamResponse(headers={"Content-Type": "text/event-stream", "Cache-Control": "no-cache"})
        await resp.prepare(req)
        q: asyncio.Queue = asyncio.Queue()
        self.queues.add(q)
        try:
            if self.watch is not None and self.watch.status is not None:
                await resp.write(f"event: status\ndata: {json.dumps(self.watch.status)}\n\n".encode())
            while True:
                try:
                    msg = await asyncio.wait_for(q.get(), timeout=15.0)
                except TimeoutError:
                    msg = ": keep-alive\n\n"
                await resp.write(msg.encode())
        except (ConnectionResetError, asyncio.CancelledError):
            pass
        finally:
            self.queues.discard(q)
        return resp

    async def control(self, req: web.Request) -> web.Response:
        if self.token is None:
            return web.json_response({"error": "read-only: start serve with --allow-control TOKEN"}, status=403)
        got = req.headers.get(TOKEN_HEADER, "")
        if not hmac.compare_digest(got.encode(), self.token.encode()):
            return web.json_response({"error": "wrong or missing token"}, status=403)
        word = req.match_info["word"]
        try:
            body = await asyncio.wait_for(req.read(), BODY_TIMEOUT_S) if req.can_read_body else b""
        except TimeoutError:
            return web.json_response({"error": f"the request body did not arrive within {BODY_TIMEOUT_S:g} s"},
                                     status=408)
        try:
            obj = json.loads(body) if body.strip() else {}
        except ValueError:
            return web.json_response({"error": "the body must be a JSON object, e.g. {\"on\": true}"}, status=400)
        if not isinstance(obj, dict):
            return web.json_response({"error": "the body must be a JSON object, e.g. {\"on\": true}"}, status=400)
        args: dict[str, Any] = {}
        if word == "bypass":
            on = obj.get("on", True)
            if not isinstance(on, bool):
                return web.json_response({"error": "\"on\" must be true or false"}, status=400)
            args = {"on": on}
        if self.watch is None:
            return web.json_response({"error": "no board"}, status=409)
        try:
            ans = await asyncio.get_running_loop().run_in_executor(None, self.watch.request, word, args)
        except BoardRefused as e:
            return web.json_response({"error": f"the board refused: {e.words}", "why": e.why, "detail": e.detail},
                                     status=409)
        except LinkError as e:
            return web.json_response({"error": str(e)}, status=503)
        return web.json_response(ans)

    def app(self) -> web.Application:
        a = web.Application(middlewares=[host_guard(self.listen, self.allow_hosts)], client_max_size=MAX_BODY)
        a.router.add_get("/", self.index)
        a.router.add_get("/api/config", self.config)
        a.router.add_get("/api/view", self.view)
        a.router.add_get("/api/antenna", self.antenna)
        a.router.add_get("/api/status", self.status)
        a.router.add_get("/api/events", self.events)
        a.router.add_post(r"/api/{word:tune|bypass}", self.control)
        a.router.add_static("/static/", STATIC)

        async def on_startup(_app: web.Application) -> None:
            self.loop = asyncio.get_running_loop()
            if self.port is not None:
                self.watch = BoardWatch(self.port, self.baud, self.publish).start()
            _app["dbwatch"] = asyncio.create_task(self._watch_db())

        async def on_cleanup(_app: web.Application) -> None:
            _app["dbwatch"].cancel()
            if self.watch is not None:
                await asyncio.get_running_loop().run_in_executor(None, self.watch.close)

        async def on_shutdown(_app: web.Application) -> None:
            for q in list(self.queues):
                q.put_nowait(": bye\n\n")

        a.on_startup.append(on_startup)
        a.on_shutdown.append(on_shutdown)
        a.on_cleanup.append(on_cleanup)
        return a


def serve(db: str | None, port: str | None, host: str, http_port: int, token: str | None,
          baud: int = 115200, ready=None, allow_hosts: tuple[str, ...] = (),
          idle_timeout_s: float = HEADER_TIMEOUT_S) -> None:
    """Run until interrupted.  ready(url), when given, is called once listening.
    idle_timeout_s: a connection that sends no complete request for this long is closed."""
    st = StationPage(db, port, baud, token, listen=host, allow_hosts=allow_hosts)

    async def main() -> None:
        # keepalive_timeout also closes a connection that sends no complete request
        # within it (aiohttp arms it when the connection is made).
        runner = web.AppRunner(st.app(), shutdown_timeout=2.0, keepalive_timeout=idle_timeout_s)
        await runner.setup()
        site = web.TCPSite(runner, host, http_port)
        await site.start()
        if ready:
            ready(f"http://{host}:{http_port}/")
        try:
            while True:
                await asyncio.sleep(3600)
        finally:
            await runner.cleanup()

    try:
        asyncio.run(main())
    except OSError as e:
        raise InputError(f"cannot listen on {host}:{http_port}: {e.strerror or e}") from None
