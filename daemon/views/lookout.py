"""The operators' view in a browser (``brimline lookout``): a status subscriber that serves a page.

:class:`Lookout` is a separate subscriber of the daemon's status stream (a ZeroMQ SUB, CURVE
optional, exactly as ``brimline watch``) and a small web server on loopback. Each status message
is decoded once, turned into page data by the pure functions of
:mod:`~brimline.daemon.views.lookout_data`, encoded as JSON once and pushed to every open page
over a WebSocket. However many browsers are open, the daemon sees one subscriber, so they cost
it nothing.

Why aiohttp: one well-kept asyncio library that serves the page, its static files and the
WebSocket in the same event loop as a ``zmq.asyncio`` socket, and whose client the benchmark
and the tests use to connect as pages do; no thread per browser and no second web stack.

Everything runs on one thread of its own with its own event loop (so the ZeroMQ socket stays on
one thread); :class:`Lookout` is a context manager that starts it and stops it. Bounded
everywhere:

- the SUB socket refuses frames above the codec's bound; a message that does not decode, or a
  status whose known fields have the wrong type, is dropped and counted by reason (shown on the
  page), never raised;
- each page has a small send queue; a page that does not keep up loses updates (counted)
  instead of holding up the others; at most ``max_pages`` pages at once;
- the page sends nothing the server acts on: incoming WebSocket messages are read and ignored,
  at most 4 KiB each.

Routes: ``/`` (the page), ``/static/...`` (its script and style sheet, shipped in the package:
no network at run time), ``/stream`` (the WebSocket), ``/snapshot.json`` (what a new page starts
from, for scripts).
"""

from __future__ import annotations

import asyncio
import collections
import importlib.resources
import json
import logging
import threading
import time
from pathlib import Path
from typing import Any, Callable

import zmq
import zmq.asyncio
from aiohttp import WSMsgType, web

from brimline.daemon.errors import InputError, ProtocolError
from brimline.daemon.net.curve import apply_client
from brimline.daemon.net.drops import DropCounter, limit_inbound
from brimline.daemon.views.lookout_data import Timeline, page_frame
from brimline.daemon.views.watch import DEFAULT_STATUS_ENDPOINT
from brimline.daemon.wire import codec

__all__ = ["Lookout", "DEFAULT_HOST", "DEFAULT_PORT", "DEFAULT_SNR_RANGE_DB", "STATIC_FILES"]

DEFAULT_HOST = "127.0.0.1"
DEFAULT_PORT = 7360
#: Fixed SNR scale of the band chart and the waterfall, dB (the page never rescales it).
DEFAULT_SNR_RANGE_DB = (0.0, 40.0)
#: The page's files, shipped in the package (``lookout_static/``), with their content types.
STATIC_FILES = {"index.html": "text/html", "lookout.js": "text/javascript",
                "lookout.css": "text/css"}

log = logging.getLogger("brimline.lookout")

_PAGE_QUEUE = 16  # updates waiting for one page before it loses some
_MAX_INCOMING_BYTES = 4096
_RECEIVE_BATCH = 256  # status messages handled before the loop serves pages again
_SECURITY_HEADERS = {
    "Content-Security-Policy": "default-src 'self'; connect-src 'self' ws: wss:; "
                               "img-src 'self' data:",
    "X-Content-Type-Options": "nosniff",
    "Cache-Control": "no-store",
}


def _read_static() -> dict[str, bytes]:
    folder = importlib.resources.files("brimline.daemon.views") / "lookout_static"
    return {name: (folder / name).read_bytes() for name in STATIC_FILES}


class _Page:
    """One open page: its WebSocket and the bounded queue of updates waiting for it."""

    def __init__(self, ws: web.WebSocketResponse) -> None:
        self.ws = ws
        self.queue: asyncio.Queue[str] = asyncio.Queue(maxsize=_PAGE_QUEUE)
        self.lost = 0

    def offer(self, text: str) -> None:
        try:
            self.queue.put_nowait(text)
        except asyncio.QueueFull:
            self.lost += 1


class Lookout:
    """Subscribe to a status stream and serve the live page; a context manager.

    Parameters
    ----------
    endpoint : str
        The daemon's status endpoint (a ZeroMQ address).
    host : str
        Address the web server listens on (loopback by default: the page has no login).
    port : int
        TCP port of the web server; 0 picks a free one (see :attr:`url`).
    curve_server_key, curve_client_key : str or Path, optional
        The daemon's public ``.key`` file and this viewer's ``.key_secret`` file; together they
        turn CURVE on (as for ``brimline watch``).
    snr_range_db : tuple of float
        Fixed SNR scale of the band chart and waterfall, dB (low, high).
    max_pages : int
        Pages served at once; one more is refused with HTTP 503.
    history_points, history_rows : int
        Rate and margin points, and waterfall rows, a newly opened page starts from.
    context : zmq.asyncio.Context, optional
        Context of the SUB socket (default: a private one, terminated on close).
    clock : callable
        Monotonic seconds, for the rate-limited drop warnings and drop counts sent to pages.

    Raises
    ------
    InputError
        From :meth:`start`: only one key file given, a key file unusable, an endpoint ZeroMQ
        refuses, or an address the web server cannot listen on.
    """

    def __init__(self, endpoint: str = DEFAULT_STATUS_ENDPOINT, *, host: str = DEFAULT_HOST,
                 port: int = DEFAULT_PORT, curve_server_key: str | Path | None = None,
                 curve_client_key: str | Path | None = None,
                 snr_range_db: tuple[float, float] = DEFAULT_SNR_RANGE_DB,
                 max_pages: int = 64, history_points: int = 1200, history_rows: int = 240,
                 context: zmq.asyncio.Context | None = None,
                 clock: Callable[[], float] = time.monotonic) -> None:
        if (curve_server_key is None) != (curve_client_key is None):
            raise InputError("CURVE needs both the daemon's public key and this viewer's "
                             "secret key")
        lo, hi = (float(v) for v in snr_range_db)
        if not lo < hi:
            raise InputError(f"snr range {lo:g}..{hi:g} dB must run from low to high")
        self.endpoint = endpoint
        self.host = host
        self.port = int(port)
        self._keys = (curve_server_key, curve_client_key)
        self.snr_range_db = (lo, hi)
        self.max_pages = int(max_pages)
        self._timeline = Timeline(points=history_points, rows=history_rows)
        self._own_ctx = context is None
        self._ctx = context
        self._clock = clock
        self._view_sent_at: float | None = None
        self.drops = DropCounter(log, clock=clock)
        self.counters: collections.Counter[str] = collections.Counter()
        self._static = _read_static()
        self._pages: set[_Page] = set()
        self._last_seq: int | None = None
        self._thread: threading.Thread | None = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self._stop: asyncio.Event | None = None
        self._started = threading.Event()
        self._failure: BaseException | None = None
        self._closed = False
        self.url: str | None = None

    # -- life cycle (caller's thread) -------------------------------------------------------

    def start(self) -> "Lookout":
        """Start the subscriber and the web server on a thread of their own; return self.

        Returns once the server listens (:attr:`url` is set) or raises what stopped it.
        """
        if self._closed:
            raise RuntimeError("Lookout is closed")
        if self._thread is not None:
            return self
        self._thread = threading.Thread(target=self._run, name="brimline-lookout", daemon=True)
        self._thread.start()
        self._started.wait()
        if self._failure is not None:
            failure, self._failure = self._failure, None
            self._thread.join()
            self._closed = True
            raise failure
        return self

    def wait(self, duration_s: float | None = None) -> None:
        """Block until ``duration_s`` has passed (None: until the server stops or Ctrl-C)."""
        deadline = None if duration_s is None else time.monotonic() + duration_s
        while self._thread is not None and self._thread.is_alive():
            left = None if deadline is None else deadline - time.monotonic()
            if left is not None and left <= 0:
                return
            self._thread.join(0.25 if left is None else min(0.25, left))

    def close(self) -> None:
        """Stop serving, close every page, the socket and a private context. Idempotent."""
        if self._closed:
            return
        self._closed = True
        if self._loop is not None and self._stop is not None and self._thread is not None \
                and self._thread.is_alive():
            self._loop.call_soon_threadsafe(self._stop.set)
        if self._thread is not None:
            self._thread.join(10.0)

    def __enter__(self) -> "Lookout":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.close()

    def status_counts(self) -> dict[str, Any]:
        """What the viewer has seen: status messages taken, missed (gaps in ``status_seq``),
        dropped by reason, pages open and updates pages lost."""
        return {"received": self.counters["received"], "missed": self.counters["missed"],
                "dropped": dict(self.drops.counts().get("status", {})),
                "pages": len(self._pages), "pages_refused": self.counters["pages_refused"],
                "updates_lost": self.counters["updates_lost"]}

    # -- the event loop's thread ------------------------------------------------------------

    def _run(self) -> None:
        loop = asyncio.new_event_loop()
        self._loop = loop
        try:
            loop.run_until_complete(self._main())
        except BaseException as exc:  # handed to start(); the thread ends either way
            if not self._started.is_set():
                self._failure = exc
            else:
                log.error("lookout stopped: %s", exc)
        finally:
            self._started.set()
            loop.run_until_complete(loop.shutdown_asyncgens())
            loop.close()

    async def _main(self) -> None:
        self._stop = asyncio.Event()
        ctx = zmq.asyncio.Context() if self._own_ctx else self._ctx
        sock = ctx.socket(zmq.SUB)
        runner: web.AppRunner | None = None
        receiver = None
        try:
            sock.setsockopt(zmq.LINGER, 0)
            sock.setsockopt(zmq.RCVHWM, 64)
            limit_inbound(sock, codec.max_frame_bytes())
            if self._keys[0] is not None:
                try:
                    apply_client(sock, server_key_file=self._keys[0],
                                 client_secret_file=self._keys[1])
                except zmq.ZMQError as exc:
                    raise InputError(f"CURVE keys refused by ZeroMQ: {exc}") from None
            sock.setsockopt(zmq.SUBSCRIBE, b"")
            try:
                sock.connect(self.endpoint)
            except zmq.ZMQError as exc:
                raise InputError(f"--endpoint={self.endpoint!r}: {exc}") from None
            runner = web.AppRunner(self._app(), access_log=None, handle_signals=False,
                                   shutdown_timeout=1.0)
            await runner.setup()
            site = web.TCPSite(runner, self.host, self.port)
            try:
                await site.start()
            except OSError as exc:
                raise InputError(f"cannot serve on {self.host}:{self.port}: "
                                 f"{exc.strerror or exc}") from None
            port = runner.addresses[0][1]
            host = f"[{self.host}]" if ":" in self.host else self.host
            self.url = f"http://{host}:{port}/"
            self._started.set()
            receiver = asyncio.ensure_future(self._receive(sock))
            await self._stop.wait()
        finally:
            if receiver is not None:
                receiver.cancel()
                await asyncio.gather(receiver, return_exceptions=True)
            for page in list(self._pages):
                await page.ws.close()
            if runner is not None:
                await runner.cleanup()
            sock.close(linger=0)
            if self._own_ctx:
                ctx.term()

    async def _receive(self, sock) -> None:
        while True:
            for _ in range(_RECEIVE_BATCH):
                self.take(await sock.recv_multipart(copy=False))
            # A message already queued completes its await at once: after a batch, let the
            # pages be served even while a flood arrives.
            await asyncio.sleep(0)

    def take(self, frames) -> dict | None:
        """Decode one status message, add it to the history and send it to every page.

        Returns the update message, or None when the message was dropped (counted) or was not a
        daemon status.
        """
        try:
            _topic, record = codec.decode(frames, types={"dict"})
            if not isinstance(record, dict) or record.get("type") != "status":
                self.counters["ignored"] += 1  # a transmitter's status, a decision record
                return None
            frame = page_frame(record)
        except ProtocolError as exc:
            self.drops.drop("status", exc.reason, str(exc))
            now = self._clock()
            if self._view_sent_at is None or now - self._view_sent_at >= 1.0:
                # the pages learn of drops at most once a second (a flood costs no more)
                self._view_sent_at = now
                self._broadcast({"kind": "view", "view": self.status_counts()})
            return None
        seq = frame.get("status_seq")
        if seq is not None and self._last_seq is not None and seq > self._last_seq + 1:
            self.counters["missed"] += seq - self._last_seq - 1
        self._last_seq = seq
        self.counters["received"] += 1
        update = self._timeline.add(frame)
        update["view"] = self.status_counts()
        self._broadcast(update)
        return update

    def _broadcast(self, message: dict) -> None:
        text = json.dumps(message, separators=(",", ":"), allow_nan=False)
        for page in self._pages:
            before = page.lost
            page.offer(text)
            self.counters["updates_lost"] += page.lost - before

    def _start_message(self) -> str:
        snap = self._timeline.snapshot()
        snap["view"] = self.status_counts()
        snap["settings"] = {"endpoint": self.endpoint, "snr_range_db": list(self.snr_range_db)}
        return json.dumps(snap, separators=(",", ":"), allow_nan=False)

    # -- web --------------------------------------------------------------------------------

    def _app(self) -> web.Application:
        app = web.Application(client_max_size=_MAX_INCOMING_BYTES)
        app.router.add_get("/", self._serve_page)
        app.router.add_get("/static/{name}", self._serve_static)
        app.router.add_get("/stream", self._serve_stream)
        app.router.add_get("/snapshot.json", self._serve_snapshot)
        return app

    async def _serve_page(self, request: web.Request) -> web.Response:
        return web.Response(body=self._static["index.html"], content_type="text/html",
                            charset="utf-8", headers=_SECURITY_HEADERS)

    async def _serve_static(self, request: web.Request) -> web.Response:
        name = request.match_info["name"]
        if name == "index.html" or name not in self._static:
            raise web.HTTPNotFound()
        return web.Response(body=self._static[name], content_type=STATIC_FILES[name],
                            charset="utf-8", headers=_SECURITY_HEADERS)

    async def _serve_snapshot(self, request: web.Request) -> web.Response:
        return web.Response(text=self._start_message(), content_type="application/json",
                            headers=_SECURITY_HEADERS)

    async def _serve_stream(self, request: web.Request) -> web.StreamResponse:
        if len(self._pages) >= self.max_pages:
            self.counters["pages_refused"] += 1
            raise web.HTTPServiceUnavailable(text=f"at most {self.max_pages} pages at once")
        ws = web.WebSocketResponse(max_msg_size=_MAX_INCOMING_BYTES, heartbeat=20.0)
        await ws.prepare(request)
        page = _Page(ws)
        page.offer(self._start_message())
        self._pages.add(page)
        sender = asyncio.ensure_future(self._send_to(page))
        try:
            async for msg in ws:  # the page sends nothing we act on
                if msg.type == WSMsgType.ERROR:
                    break
        finally:
            self._pages.discard(page)
            sender.cancel()
            await asyncio.gather(sender, return_exceptions=True)
        return ws

    async def _send_to(self, page: _Page) -> None:
        try:
            while True:
                text = await page.queue.get()
                await page.ws.send_str(text)
        except (ConnectionError, RuntimeError):  # the page went away mid-send
            await page.ws.close()
