"""The stage server: the stage view and the presenter's keys over HTTP, inside the session.

Threads: ``stage-server`` runs an asyncio event loop with an aiohttp server on it; every
request, stream and queue below lives on that thread. The compute thread only calls
`StageFeed.on_window` and `on_status`, which schedule each batch's messages on the loop
(``call_soon_threadsafe``) and return; the caller's thread calls `start`, `attach` (the
session's `SessionHandle`, before the first window) and `stop`. The presenter's truth and
capture requests call the handle's thread-safe `set_truth` and `capture_now` (the very
calls the terminal UI's keys make) in a worker thread of the loop, so the loop never waits
on the session's locks.

Access: every page, file and stream needs the session's viewer token or its presenter token
(``?k=`` in the printed links; random, ``secrets.token_urlsafe``); the presenter page and
its two requests need the presenter token. A request without the right token gets 403 and
an empty body, whatever its path; a path that is not one of the page's own files gets 404
and an empty body. The page's files are read from the package once, at start; nothing is
read from the disk per request, there is no directory listing and no audio.

A viewer never slows the session: each stream has a queue of at most `QUEUE` messages; a
viewer that falls that far behind, or whose socket takes more than `WRITE_TIMEOUT_S` to take
a message, is disconnected (its browser reconnects and starts again from a fresh snapshot).
At most `MAX_VIEWERS` streams are open at once (and `MAX_PRESENTERS` presenter streams
beside them); one more gets 503. A flood of sockets is cut short: beyond `MAX_CONNECTIONS`
open connections a new one is closed as soon as it is accepted, and a connection that asks
for nothing for `IDLE_S` seconds is closed, so the session's own files always find a file
descriptor.
"""

from __future__ import annotations

import asyncio
import collections
import errno
import hmac
import json
import secrets
import socket
import sys
import threading
from importlib import resources
from typing import Any, TextIO

from monitor.base import palette as P
from monitor.base.errors import ScenemonError
from monitor.web.feed import StageFeed

MAX_VIEWERS = 32  # open viewer streams at once
MAX_PRESENTERS = 4  # open presenter streams at once, beside the viewers
QUEUE = 64  # messages waiting per stream (32 s of windows at a 0.5 s hop)
HISTORY = 240  # windows a new viewer gets at once, for the recent strip
HEARTBEAT_S = 15.0  # a comment line on a quiet stream, so proxies and phones keep it open
WRITE_TIMEOUT_S = 5.0  # a socket that takes longer to take one message is a stuck viewer
RETRY_MS = 1000  # how soon a browser reconnects (the event stream's ``retry`` field)
MAX_BODY = 1024  # bytes of a presenter request
MAX_CONNECTIONS = 64  # open sockets at once: the streams and room for page loads
IDLE_S = 15.0  # a connection that asks for nothing this long is closed

# security headers on every answer, the refusals included
HEADERS = {
    "X-Frame-Options": "DENY",  # RFC 7034
    "Content-Security-Policy": ("default-src 'self'; frame-ancestors 'none'; base-uri 'none'; "
                                "form-action 'none'"),  # W3C CSP Level 2/3
    "Referrer-Policy": "no-referrer",  # keeps the token out of any Referer header
    "Cache-Control": "no-store",
    "X-Content-Type-Options": "nosniff",
}

# path -> (file in page/, content type, who may have it)
FILES = {
    "/": ("viewer.html", "text/html; charset=utf-8", "viewer"),
    "/present": ("presenter.html", "text/html; charset=utf-8", "presenter"),
    "/stage.css": ("stage.css", "text/css; charset=utf-8", "viewer"),
    "/stage.js": ("stage.js", "text/javascript; charset=utf-8", "viewer"),
    "/present.js": ("present.js", "text/javascript; charset=utf-8", "presenter"),
    "/icon.svg": ("icon.svg", "image/svg+xml", "viewer"),
}
POSTS = {"/truth", "/capture"}  # the presenter's requests
STREAM = "/events"


def sse_event(kind: str, data: Any) -> bytes:
    """One server-sent event: an ``event:`` line, one ``data:`` line of JSON, a blank line.

    Parameters
    ----------
    kind : str
        The event's type (the page listens for it by name).
    data : Any
        Its content, as JSON (one line: JSON text has no raw newline).

    Returns
    -------
    bytes
        The event in UTF-8.

    References
    ----------
    WHATWG HTML Living Standard, section 9.2 "Server-sent events", "Parsing an event stream".
    """
    text = json.dumps(data, separators=(",", ":"), ensure_ascii=False, allow_nan=False)
    return f"event: {kind}\ndata: {text}\n\n".encode()


def page_file(name: str) -> bytes:
    """One of the page's files as it is served (the stylesheet with the palette's colours).

    Parameters
    ----------
    name : str
        A file of ``monitor/web/page/``.

    Returns
    -------
    bytes
        Its content; in ``stage.css`` and ``icon.svg`` every ``{{NAME}}`` of `palette.UI_COLOURS` is replaced
        by its colour, so the page and the terminal share one palette.
    """
    body = resources.files("monitor.web").joinpath("page", name).read_bytes()
    if name.endswith((".css", ".svg")):
        for k, v in P.UI_COLOURS.items():
            body = body.replace(("{{" + k + "}}").encode(), v.encode())
    return body


def _link_host(host: str) -> list[str]:
    """The host names a link can carry for a server bound to `host`."""
    if host in ("", "0.0.0.0", "::"):
        found = []
        try:
            for info in socket.getaddrinfo(socket.gethostname(), None, socket.AF_INET):
                addr = info[4][0]
                if not addr.startswith("127.") and addr not in found:
                    found.append(addr)
        except OSError:
            pass
        return found or [socket.gethostname()]
    return [f"[{host}]" if ":" in host else host]


class _Refused(asyncio.Protocol):
    """A connection beyond `MAX_CONNECTIONS`: closed as soon as it is accepted."""

    def connection_made(self, transport) -> None:
        transport.abort()


class _Stream:
    """One open event stream: its bounded queue and its wake-up."""

    def __init__(self, presenter: bool) -> None:
        self.presenter = presenter
        self.queue: collections.deque[bytes] = collections.deque(maxlen=QUEUE)
        self.wake = asyncio.Event()
        self.behind = False  # the queue overflowed: the viewer is disconnected

    def put(self, data: bytes) -> None:
        if len(self.queue) == QUEUE:
            self.behind = True
        self.queue.append(data)
        self.wake.set()


class StageServer:
    """The stage view's HTTP server for one session (see the module docstring).

    Parameters
    ----------
    host : str
        The address to listen on ("127.0.0.1": this machine only; "0.0.0.0": every network).
    port : int
        The port (0: any free one; `port` holds the one taken after `start`).
    heading : str
        The session's title line on the page.
    """

    def __init__(self, host: str = "127.0.0.1", port: int = 0, *, heading: str = "") -> None:
        self.host, self.port, self.heading = host, port, heading
        self.viewer_token = secrets.token_urlsafe(18)
        self.presenter_token = secrets.token_urlsafe(18)
        self.feed = StageFeed(self._post)
        self.refused = collections.Counter()  # refusals by status (and "closed"), read by tests
        self._files = {name: page_file(name) for name, _, _ in FILES.values()}
        self._loop: asyncio.AbstractEventLoop | None = None
        self._thread: threading.Thread | None = None
        self._runner = None
        self._listener = None
        self._streams: set[_Stream] = set()
        self._history: collections.deque[dict] = collections.deque(maxlen=HISTORY)
        self._session: dict[str, Any] | None = None
        self._handle = None
        self._ended = False
        self._start_error: BaseException | None = None

    # --- the caller's thread --------------------------------------------------------------
    def start(self) -> None:
        """Listen, on the server's own thread; return once it listens.

        Raises
        ------
        ScenemonError
            The address cannot be listened on (the port is taken, the host is not one of this
            machine's addresses, a port below 1024 without the right to it), or aiohttp or
            segno is not installed.
        """
        try:
            import aiohttp  # noqa: F401
            import segno  # noqa: F401
        except ImportError as exc:
            raise ScenemonError(f"--serve needs the {exc.name} package: pip install "
                                f"'scenemon[serve]'") from None
        ready = threading.Event()
        self._loop = asyncio.new_event_loop()
        self._thread = threading.Thread(target=self._run, args=(ready,), name="stage-server",
                                        daemon=True)
        self._thread.start()
        ready.wait(30.0)
        if self._start_error is not None:
            self._thread.join(5.0)
            exc = self._start_error
            where = f"[{self.host}]:{self.port}" if ":" in self.host else f"{self.host}:{self.port}"
            if isinstance(exc, OSError) and exc.errno == errno.EADDRINUSE:
                why = "the port is in use by another program (pick another, or 0 for any free one)"
            elif isinstance(exc, OSError) and exc.errno in (errno.EACCES, errno.EPERM):
                why = "no permission to listen there (ports below 1024 need it; pick 1024 or above)"
            elif isinstance(exc, (socket.gaierror, OSError)):
                why = f"not an address of this machine ({exc.strerror or exc})"
            else:
                why = str(exc)
            raise ScenemonError(f"--serve {where}: cannot listen there: {why}") from None

    def attach(self, handle) -> None:
        """Keep the session's handle (presenter requests) and tell the pages its classes.

        Called by `run_session` through its ``on_ready``, before the first window.

        Parameters
        ----------
        handle : SessionHandle
            The running session.
        """
        classes = list(handle.classes)
        keys = P.class_keys(classes)
        truth = "keys" if handle.live_truth is not None else "file"
        info = {"heading": self.heading, "classes": classes,
                "colours": [P.class_colour(classes, c) for c in classes],
                "keys": [keys[c] for c in classes],
                "names": [m.plan.path.name for m in handle.models],
                "hop_s": handle.card.hop_s, "truth": truth, "capture": handle.can_capture,
                "profiled": [m.profile is not None for m in handle.models]}
        self._handle = handle
        self._call(self._set_session, info)

    def stop(self) -> None:
        """Tell the pages that the session has ended, close every stream, stop the thread."""
        if self._loop is None or self._thread is None:
            return
        self._call(self._end)
        self._thread.join(10.0)

    def links(self) -> tuple[list[str], list[str]]:
        """The viewer links and the presenter links, one per address a browser may use.

        Returns
        -------
        tuple of (list of str, list of str)
            ``http://HOST:PORT/?k=TOKEN`` and ``http://HOST:PORT/present?k=TOKEN``.
        """
        hosts = _link_host(self.host)
        return ([f"http://{h}:{self.port}/?k={self.viewer_token}" for h in hosts],
                [f"http://{h}:{self.port}/present?k={self.presenter_token}" for h in hosts])

    def announce(self, stream: TextIO | None = None, *, qr: bool = True) -> None:
        """Print the links, the caution and a QR code of the viewer link.

        Parameters
        ----------
        stream : TextIO, optional
            Where (stderr).
        qr : bool
            Draw the QR code of the first viewer link (half-block characters).
        """
        out = stream or sys.stderr
        viewers, presenters = self.links()
        local = self.host.startswith("127.") or self.host in ("localhost", "::1")
        out.write("scenemon: stage view for browsers (anyone with this link sees the decisions; "
                  "no audio is served):\n")
        for link in viewers:
            out.write(f"  {link}\n")
        out.write("scenemon: presenter page (truth and capture; keep it to yourself):\n")
        for link in presenters:
            out.write(f"  {link}\n")
        if local:
            out.write("scenemon: listening on this machine only; --serve 0.0.0.0:PORT lets "
                      "phones on the network in\n")
        if qr:
            import segno

            segno.make(viewers[0], error="m").terminal(out=out, compact=True, border=2)
        out.flush()

    # --- anywhere: hand work to the loop --------------------------------------------------
    def _call(self, fn, *args) -> None:
        loop = self._loop
        if loop is None or loop.is_closed():
            return
        try:
            loop.call_soon_threadsafe(fn, *args)
        except RuntimeError:  # the loop closed between the check and the call
            pass

    def _post(self, messages: list[dict]) -> None:
        """The feed's hand-off (compute thread): schedule `_publish`, never wait."""
        self._call(self._publish, messages)

    # --- the server's thread --------------------------------------------------------------
    def _run(self, ready: threading.Event) -> None:
        loop = self._loop
        asyncio.set_event_loop(loop)
        try:
            loop.run_until_complete(self._open())
        except BaseException as exc:  # noqa: BLE001  (reported by start, on the caller's thread)
            self._start_error = exc
            ready.set()
            loop.close()
            return
        ready.set()
        try:
            loop.run_forever()
        finally:
            self._listener.close()
            loop.run_until_complete(self._runner.cleanup())
            loop.close()

    async def _open(self) -> None:
        from aiohttp import web

        app = web.Application(middlewares=[self._guard], client_max_size=MAX_BODY)
        app.on_response_prepare.append(self._headers)
        for path in FILES:
            app.router.add_get(path, self._file, allow_head=False)
        app.router.add_get(STREAM, self._events, allow_head=False)
        app.router.add_post("/truth", self._truth)
        app.router.add_post("/capture", self._capture)
        # handler_cancellation: a browser that leaves ends its stream's handler at once (its
        # place among the viewers is free again), not at the next write
        runner = web.AppRunner(app, access_log=None, handle_signals=False,
                               handler_cancellation=True, keepalive_timeout=IDLE_S,
                               shutdown_timeout=1.0)
        await runner.setup()
        self._runner = runner
        server = runner.server  # aiohttp's protocol factory ("low level server")

        def protocol():
            if len(server.connections) >= MAX_CONNECTIONS:
                self.refused["closed"] += 1
                return _Refused()
            return server()

        try:
            self._listener = await asyncio.get_running_loop().create_server(
                protocol, self.host, self.port, backlog=64, reuse_address=True)
        except BaseException:
            await runner.cleanup()
            raise
        self.port = self._listener.sockets[0].getsockname()[1]

    def _role(self, request) -> str | None:
        """"presenter", "viewer" or None, from the request's token (compared in constant time)."""
        given = request.query.get("k", "").encode()
        if hmac.compare_digest(given, self.presenter_token.encode()):
            return "presenter"
        if hmac.compare_digest(given, self.viewer_token.encode()):
            return "viewer"
        return None

    @staticmethod
    def _needs(path: str) -> str | None:
        if path in FILES:
            return FILES[path][2]
        if path == STREAM:
            return "viewer"
        if path in POSTS:
            return "presenter"
        return None

    def _refuse(self, status: int):
        from aiohttp import web

        self.refused[status] += 1
        return web.Response(status=status, body=b"")

    async def _guard(self, request, handler):
        """The token first (403 for any path without it), then the path (404), then the handler;
        every refusal is an empty body."""
        from aiohttp import web

        role = self._role(request)
        if role is None:
            return self._refuse(403)
        need = self._needs(request.path)
        if need is None:
            return self._refuse(404)
        if need == "presenter" and role != "presenter":
            return self._refuse(403)
        try:
            return await handler(request)
        except web.HTTPException as exc:  # a wrong method, a body too large
            return self._refuse(exc.status)

    # aiohttp looks for this attribute on a middleware (its new-style marker)
    _guard.__middleware_version__ = 1

    async def _headers(self, request, response) -> None:
        for k, v in HEADERS.items():
            response.headers[k] = v
        response.headers["Server"] = "scenemon"  # not the library and its version

    async def _file(self, request):
        from aiohttp import web

        name, ctype, _ = FILES[request.path]
        body = self._files[name]
        if name.endswith(".html"):  # the page's files carry the token the page was opened with
            body = body.replace(b"{{k}}", request.query["k"].encode())
        return web.Response(body=body, headers={"Content-Type": ctype})

    def _hello(self, presenter: bool) -> bytes:
        told = None
        h = self._handle
        if h is not None and h.live_truth is not None:
            told = h.live_truth.current
        return sse_event("hello", {"session": self._session, "heading": self.heading,
                                   "presenter": presenter, "told": told, "ended": self._ended,
                                   "history": list(self._history)})

    async def _events(self, request):
        from aiohttp import web

        presenter = self._role(request) == "presenter"
        mine = sum(1 for s in self._streams if s.presenter == presenter)
        if self._ended or mine >= (MAX_PRESENTERS if presenter else MAX_VIEWERS):
            return self._refuse(503)
        me = _Stream(presenter)
        self._streams.add(me)
        resp = web.StreamResponse(headers={"Content-Type": "text/event-stream; charset=utf-8",
                                           "X-Accel-Buffering": "no"})
        try:
            await resp.prepare(request)
            await resp.write(f"retry: {RETRY_MS}\n\n".encode() + self._hello(presenter))
            while True:
                if not me.queue:
                    try:
                        await asyncio.wait_for(me.wake.wait(), HEARTBEAT_S)
                    except asyncio.TimeoutError:
                        me.queue.append(b": still here\n\n")
                    me.wake.clear()
                if me.behind:
                    break  # too far behind: it reconnects and starts from a fresh snapshot
                while me.queue:
                    data = me.queue.popleft()
                    await asyncio.wait_for(resp.write(data), WRITE_TIMEOUT_S)
                    if data.startswith(b"event: end"):
                        return resp
        except (ConnectionError, asyncio.TimeoutError, RuntimeError):
            pass  # the browser left, or was stuck: drop it
        finally:
            self._streams.discard(me)
        return resp

    def _publish(self, messages: list[dict]) -> None:
        for message in messages:
            self._history.append(message)
            data = sse_event("window", message)
            for s in self._streams:
                s.put(data)

    def _set_session(self, info: dict) -> None:
        self._session = info
        data = sse_event("session", info)
        for s in self._streams:
            s.put(data)

    def _end(self) -> None:
        self._ended = True
        data = sse_event("end", {})
        for s in self._streams:
            s.put(data)
        # give the streams a moment to say so, then stop the loop
        self._loop.call_later(0.3, self._loop.stop)

    async def _body(self, request) -> dict:
        from aiohttp import web

        try:
            data = await request.json()
        except (ValueError, UnicodeDecodeError):
            raise web.HTTPBadRequest() from None
        if not isinstance(data, dict):
            raise web.HTTPBadRequest()
        return data

    def _label(self, data: dict, key: str = "label") -> str | None:
        from aiohttp import web

        label = data.get(key)
        if label is not None and (self._session is None or label not in self._session["classes"]):
            raise web.HTTPBadRequest()
        return label

    def _answer(self, status: int = 200, **fields):
        from aiohttp import web

        return web.json_response(fields, status=status)

    async def _truth(self, request):
        """The truth keys: from the newest sample on the truth is ``label`` (null: unknown)."""
        data = await self._body(request)
        label = self._label(data)
        h = self._handle
        if h is None or self._ended:
            return self._answer(409, error="the session is not running")
        if h.live_truth is None:
            return self._answer(409, error="the truth comes from the truth file in this session")
        await asyncio.to_thread(h.set_truth, label)
        told = h.live_truth.current
        for s in self._streams:
            s.put(sse_event("told", {"told": told}))
        return self._answer(told=told, at=round(h.now_s(), 3))

    async def _capture(self, request):
        """The capture key: the last seconds as a manual snippet labelled with the truth now
        (the one told, or the truth file's); with no truth the page must name the sound."""
        data = await self._body(request)
        label = self._label(data)
        h = self._handle
        if h is None or self._ended:
            return self._answer(409, error="the session is not running")
        if not h.can_capture:
            return self._answer(409, error="capture is off in this session (--capture none)")
        if label is None:
            if h.live_truth is not None:
                label = h.live_truth.current
            elif self._history:
                label = self._history[-1]["truth"]
        if label is None:
            return self._answer(409, ask=True, error="no truth is set: what is this sound?")
        snip = await asyncio.to_thread(h.capture_now, label)
        if snip is None:
            return self._answer(captured=None, note="nothing to capture yet")
        return self._answer(captured={"label": label,
                                      "seconds": round(snip["t1"] - snip["t0"], 2)})
