"""The stage server on its own: a real aiohttp server on 127.0.0.1, spoken to over real
sockets (http.client and raw sockets); the windows come from `StageFeed.on_window`, the very
call the engine's compute thread makes.

Sources a check relies on: the WHATWG HTML Living Standard, section 9.2 "Server-sent
events" (the stream's format and its ``text/event-stream`` type); RFC 7034 (X-Frame-Options);
W3C Content Security Policy Level 3 (``frame-ancestors``, ``default-src``); W3C Referrer
Policy (``no-referrer``); RFC 9111 (``Cache-Control: no-store``).
"""

from __future__ import annotations

import http.client
import json
import re
import socket
import time

import numpy as np
import pytest

from conftest import MODELS, cli, write_wav
from monitor.base import palette as P
from monitor.cli.flags import serve_address
from monitor.decisions.contract import WindowResult
from monitor.web.feed import window_message
from monitor.web.server import (
    FILES,
    MAX_CONNECTIONS,
    MAX_PRESENTERS,
    MAX_VIEWERS,
    QUEUE,
    StageServer,
    sse_event,
)

SECURITY = {
    "X-Frame-Options": "DENY",
    "Referrer-Policy": "no-referrer",
    "Cache-Control": "no-store",
}


@pytest.fixture
def server():
    s = StageServer("127.0.0.1", 0, heading="test")
    s.start()
    yield s
    s.stop()


def request(server, path, *, method="GET", body=None, token=None):
    """(status, headers, body) of one request; the path is sent as it is written."""
    c = http.client.HTTPConnection("127.0.0.1", server.port, timeout=10)
    sep = "&" if "?" in path else "?"
    url = path if token is None else f"{path}{sep}k={token}"
    headers = {"Content-Type": "application/json"} if body is not None else {}
    c.request(method, url, body=None if body is None else json.dumps(body), headers=headers)
    r = c.getresponse()
    data = r.read()
    c.close()
    return r.status, dict(r.getheaders()), data


def result(i, label="voices", classes=("quiet_room", "voices", "traffic", "machinery")):
    p = np.full(len(classes), 0.02, np.float32)
    p[classes.index(label)] = 1.0 - 0.02 * (len(classes) - 1)
    return WindowResult(i=i, start=i * 8000, t0=i * 0.5, t1=i * 0.5 + 1.0, probs=p, smoothed=p,
                        top=label, decision=label, truth=None, level_dbfs=-23.0, clipped=0.0,
                        gap=0, ms=0.5)


def publish(server, results):
    """What the engine does with a batch of windows: `on_window` for each, then `on_status`."""
    for r in results:
        server.feed.on_window(r)
    server.feed.on_status(None)  # the feed does not read the snapshot


def open_stream(server, token, rcvbuf=None):
    """A raw socket that has asked for the event stream; returns it and its first reply bytes."""
    s = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    if rcvbuf:
        s.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, rcvbuf)
    s.settimeout(10)
    s.connect(("127.0.0.1", server.port))
    s.sendall(f"GET /events?k={token} HTTP/1.1\r\nHost: 127.0.0.1\r\n\r\n".encode())
    return s


def status_of(sock) -> int:
    head = b""
    while b"\r\n" not in head:
        chunk = sock.recv(256)
        if not chunk:
            break
        head += chunk
    return int(head.split(b" ", 2)[1])


class Reader:
    """Reads server-sent events from a stream socket (WHATWG HTML 9.2: blocks end in a blank line)."""

    def __init__(self, sock):
        self.sock, self.buf = sock, b""

    def event(self):
        while b"\n\n" not in self.buf:
            chunk = self.sock.recv(65536)
            if not chunk:
                raise EOFError
            self.buf += chunk
        block, self.buf = self.buf.split(b"\n\n", 1)
        fields = {}
        for line in block.decode().split("\n"):
            if line.startswith(":") or ":" not in line:
                continue
            k, v = line.split(":", 1)
            fields[k] = v[1:] if v.startswith(" ") else v
        return fields

    def next_of(self, kind):
        while True:
            f = self.event()
            if f.get("event") == kind:
                return json.loads(f["data"])


def test_serve_flag_values():
    assert serve_address("8765") == ("127.0.0.1", 8765)  # this machine only unless a host is given
    assert serve_address("0.0.0.0:8765") == ("0.0.0.0", 8765)
    assert serve_address("[::1]:0") == ("::1", 0)
    for bad in ("", "http", "70000", "-1", ":80", "host:", "1.2.3.4:x"):
        with pytest.raises(Exception, match="PORT|port|host"):
            serve_address(bad)


def test_without_the_token_every_path_is_403_with_nothing_in_it(server):
    paths = [*FILES, "/events", "/truth", "/capture", "/nope", "/../etc/passwd", "/favicon.ico"]
    wrong = [None, "", server.viewer_token[:-1], server.viewer_token + "x",
             server.presenter_token.upper(), "k"]
    for path in paths:
        for token in wrong:
            status, headers, body = request(server, path, token=token)
            assert (status, body) == (403, b""), (path, token, status, body)
            for k, v in SECURITY.items():
                assert headers[k] == v
            csp = headers["Content-Security-Policy"]
            assert "frame-ancestors 'none'" in csp and "default-src 'self'" in csp
    assert server.refused[403] == len(paths) * len(wrong)


def test_the_viewer_token_opens_the_stage_and_not_the_presenter(server):
    v, p = server.viewer_token, server.presenter_token
    assert v != p and len(v) >= 24 and len(p) >= 24
    status, headers, body = request(server, "/", token=v)
    assert status == 200 and headers["Content-Type"].startswith("text/html")
    assert f"stage.js?k={v}" in body.decode() and "{{k}}" not in body.decode()
    for path in ("/present", "/present.js"):
        assert request(server, path, token=v)[:3:2] == (403, b"")
    for path in ("/truth", "/capture"):
        assert request(server, path, method="POST", body={"label": None}, token=v)[:3:2] == (403, b"")
    # the presenter token opens both pages
    assert request(server, "/present", token=p)[0] == 200
    assert request(server, "/", token=p)[0] == 200
    # a method a path does not take: refused, nothing in the body
    assert request(server, "/truth", token=p)[:3:2] == (405, b"")


def test_no_path_outside_the_pages_own_files(server):
    v = server.viewer_token
    for path in ("/../../etc/passwd", "/%2e%2e/%2e%2e/etc/passwd", "/page/viewer.html",
                 "/web/server.py", "/monitor/web/server.py", "//etc/passwd", "/stage.css/../x",
                 "/page/", "/.", "/%2fetc%2fpasswd", "/stage.css%00.html", "/audio.wav"):
        status, _, body = request(server, path, token=v)
        assert status in (403, 404) and body == b"", (path, status)


def test_the_page_fetches_nothing_from_elsewhere(server):
    v, p = server.viewer_token, server.presenter_token
    for path, (name, ctype, who) in FILES.items():
        status, headers, body = request(server, path, token=p if who == "presenter" else v)
        assert status == 200 and headers["Content-Type"] == ctype
        text = body.decode()
        # no absolute or scheme-relative address (an SVG's XML namespace name is not a fetch)
        found = re.findall(r"""(?:src|href|url|fetch|EventSource)\s*[=(]\s*["'`]?\s*(?:https?:)?//""",
                           text)
        assert found == [], (name, found)
        assert "{{" not in text, name  # the token and the palette are filled in
    css = request(server, "/stage.css", token=v)[2].decode()
    for colour in (P.GROUND, P.TEXT, P.MUTED, P.ALERT, P.LINE):
        assert colour in css  # the terminal's palette, one source


def test_the_stream_is_server_sent_events(server):
    sock = open_stream(server, server.viewer_token)
    try:
        assert status_of(sock) == 200
        r = Reader(sock)
        first = r.event()
        assert first.get("retry") == "1000"  # the browser reconnects after a second
        hello = r.next_of("hello")
        assert hello["session"] is None and hello["history"] == [] and not hello["presenter"]
        publish(server, [result(i, "traffic") for i in range(3)])
        got = [r.next_of("window") for _ in range(3)]
        assert [g["i"] for g in got] == [0, 1, 2]
        assert got[0] == json.loads(json.dumps(window_message(result(0, "traffic"))))
    finally:
        sock.close()
    # one event: its type, one data line of JSON, a blank line (WHATWG HTML 9.2)
    assert sse_event("window", {"a": 1}) == b'event: window\ndata: {"a":1}\n\n'


def test_open_connections_are_capped(server):
    idle = []
    try:
        for _ in range(MAX_CONNECTIONS):  # sockets that ask for nothing
            idle.append(socket.create_connection(("127.0.0.1", server.port), timeout=10))
        deadline = time.monotonic() + 10
        while server.refused["closed"] == 0 and time.monotonic() < deadline:
            extra = socket.create_connection(("127.0.0.1", server.port), timeout=10)
            try:
                extra.sendall(f"GET /?k={server.viewer_token} HTTP/1.0\r\n\r\n".encode())
                answer = extra.recv(64)
            except ConnectionError:
                answer = b""
            extra.close()
        assert server.refused["closed"] >= 1 and answer == b""  # closed, unanswered
    finally:
        for s in idle:
            s.close()
    # once they are gone the page opens again
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline:
        try:
            if request(server, "/", token=server.viewer_token)[0] == 200:
                break
        except ConnectionError:
            time.sleep(0.1)
    assert request(server, "/", token=server.viewer_token)[0] == 200


def test_a_window_message_carries_figures_not_sound():
    m = window_message(result(7, "machinery"))
    assert set(m) == {"i", "t", "truth", "lvl", "clip", "gap", "a", "b"}
    assert set(m["a"]) == {"d", "top", "p", "unf", "fault"} and m["b"] is None
    assert m["a"]["d"] == "machinery" and len(m["a"]["p"]) == 4
    assert len(json.dumps(m)) < 400  # a few numbers a window, never samples


def test_viewers_are_limited_and_a_refusal_is_503(server):
    socks = []
    try:
        for _ in range(MAX_VIEWERS):
            s = open_stream(server, server.viewer_token)
            assert status_of(s) == 200
            socks.append(s)
        extra = open_stream(server, server.viewer_token)
        assert status_of(extra) == 503
        extra.close()
        # the presenter's own streams are counted apart: a full room does not lock them out
        pres = [open_stream(server, server.presenter_token) for _ in range(MAX_PRESENTERS)]
        assert [status_of(s) for s in pres] == [200] * MAX_PRESENTERS
        socks += pres
        # a viewer who leaves makes room for the next
        socks.pop(0).close()
        deadline = time.monotonic() + 10
        while True:
            again = open_stream(server, server.viewer_token)
            code = status_of(again)
            if code == 200 or time.monotonic() > deadline:
                break
            again.close()
            time.sleep(0.1)
        assert code == 200
        socks.append(again)
    finally:
        for s in socks:
            s.close()


@pytest.mark.slow  # the stuck socket is let go after the server's write timeout (5 s)
def test_a_stuck_viewer_is_dropped_and_the_others_get_every_window(server):
    stuck = open_stream(server, server.viewer_token, rcvbuf=4096)  # never read from again
    good = open_stream(server, server.viewer_token)
    try:
        assert status_of(good) == 200
        r = Reader(good)
        r.next_of("hello")
        seen, i = [], 0
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            # the compute thread's calls, in batches a reader can take
            publish(server, [result(i + k, "voices") for k in range(QUEUE // 2)])
            i += QUEUE // 2
            while not seen or seen[-1] < i - 1:
                seen.append(r.next_of("window")["i"])
            if len(server._streams) == 1:
                break
        assert len(server._streams) == 1, "the stuck viewer was never dropped"
        assert seen == list(range(i))  # the reader that keeps up misses nothing
        assert server.feed.posted == i
    finally:
        stuck.close()
        good.close()


def test_presenter_requests_before_the_session_are_refused_in_words(server):
    p = server.presenter_token
    status, _, body = request(server, "/truth", method="POST", body={"label": None}, token=p)
    assert status == 409 and "not running" in json.loads(body)["error"]
    # a label that is not a class, a body that is not JSON, a body too large
    assert request(server, "/truth", method="POST", body={"label": "x"}, token=p)[0] == 400
    c = http.client.HTTPConnection("127.0.0.1", server.port, timeout=10)
    c.request("POST", f"/capture?k={p}", body=b"{" * 5000,
              headers={"Content-Type": "application/json"})
    r = c.getresponse()
    assert r.status == 413 and r.read() == b""
    c.close()


def test_a_port_in_use_is_bad_input_in_one_sentence(tmp_path):
    taken = socket.socket()
    taken.bind(("127.0.0.1", 0))
    taken.listen(1)
    port = taken.getsockname()[1]
    wav = write_wav(tmp_path / "ok.wav", np.zeros(32000))
    out = tmp_path / "s"
    try:
        r = cli("replay", wav, "--model", MODELS / "demo.tflite", "--fast", "--headless",
                "--serve", f"127.0.0.1:{port}", "--out", out)
    finally:
        taken.close()
    assert r.returncode == 2
    lines = [x for x in r.stderr.splitlines() if x.strip()]
    assert len(lines) == 1 and f"--serve 127.0.0.1:{port}" in lines[0] and "in use" in lines[0]
    assert "Traceback" not in r.stderr and not out.exists()


def test_any_presenter_body_gets_an_answer_not_a_failure():
    # the presenter's requests are outside input: whatever the body, the answer is a refusal
    # or a reply in words (400, 409, 413), never a server error, and the server goes on
    from hypothesis import HealthCheck, given, settings
    from hypothesis import strategies as st

    s = StageServer("127.0.0.1", 0)
    s.start()
    try:
        bodies = st.one_of(st.binary(max_size=1500), st.text(max_size=200).map(str.encode),
                           st.dictionaries(st.text(max_size=8), st.one_of(
                               st.none(), st.text(max_size=12), st.integers(), st.booleans()),
                               max_size=3).map(lambda d: json.dumps(d).encode()))

        @settings(max_examples=60, deadline=None, derandomize=True,
                  suppress_health_check=list(HealthCheck))
        @given(body=bodies, path=st.sampled_from(["/truth", "/capture"]))
        def check(body, path):
            c = http.client.HTTPConnection("127.0.0.1", s.port, timeout=10)
            c.request("POST", f"{path}?k={s.presenter_token}", body=body,
                      headers={"Content-Type": "application/json"})
            r = c.getresponse()
            r.read()
            c.close()
            assert r.status in (400, 409, 413), (body, r.status)

        check()
        assert request(s, "/", token=s.viewer_token)[0] == 200
    finally:
        s.stop()


@pytest.mark.slow  # a real session of a few seconds at real-time pace
def test_with_a_truth_file_the_truth_buttons_are_off_and_capture_takes_its_truth(tour, tmp_path):
    # a real session in this process: `run_session` with the server's feed and ready hook, as
    # `scenemon replay --truth ... --serve` wires them; the recording is 4 s of the tour
    import threading

    import soundfile as sf

    from monitor.assembly.assemble import run_session
    from monitor.assembly.plan import FileInput, ModelPlan, OutputPlan, SessionPlan

    x, sr = sf.read(str(tour[0]), dtype="float32")
    wav = write_wav(tmp_path / "four.wav", x[35 * sr:39 * sr], sr=sr)
    truth = tmp_path / "four.tsv"
    truth.write_text("0.000\t4.000\tvoices\n")
    plan = SessionPlan(source=FileInput(wav, realtime=True), models=(ModelPlan(MODELS / "demo.tflite"),),
                       output=OutputPlan(tmp_path / "s"), truth=truth, live_truth=True)
    s = StageServer("127.0.0.1", 0)
    s.start()
    done = {}
    t = threading.Thread(target=lambda: done.update(
        summary=run_session(plan, observers=[s.feed], on_ready=s.attach)))
    try:
        t.start()
        sock = open_stream(s, s.presenter_token)
        assert status_of(sock) == 200
        r = Reader(sock)
        hello = r.next_of("hello")
        info = hello["session"] or r.next_of("session")
        assert info["truth"] == "file" and info["capture"] and info["keys"] == ["q", "v", "t", "m"]
        r.next_of("window")
        r.next_of("window")  # the windows carry the file's truth by now
        p = s.presenter_token
        status, _, body = request(s, "/truth", method="POST", body={"label": "traffic"}, token=p)
        assert status == 409 and "truth file" in json.loads(body)["error"]
        status, _, body = request(s, "/capture", method="POST", body={}, token=p)
        assert status == 200 and json.loads(body)["captured"]["label"] == "voices"
        sock.close()
    finally:
        t.join(30)
        s.stop()
    assert done["summary"]["windows"] == 7
    assert (tmp_path / "s" / "truth.tsv").read_text() == truth.read_text()  # the file's, untouched
    snips = [json.loads(p.read_text()) for p in (tmp_path / "s" / "snippets").glob("*/*.json")]
    assert [(m["reason"], m["label"]) for m in snips if m["reason"] == "manual"] == [("manual", "voices")]


def test_without_the_server_library_serve_says_what_to_install(tmp_path, monkeypatch):
    # a fake, to inject what a real install cannot show on demand here: aiohttp missing
    import sys

    monkeypatch.setitem(sys.modules, "aiohttp", None)
    wav = write_wav(tmp_path / "ok.wav", np.zeros(32000))
    r = cli("replay", wav, "--model", MODELS / "demo.tflite", "--fast", "--headless",
            "--serve", "0", "--out", tmp_path / "s")
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert "--serve needs the aiohttp package: pip install 'scenemon[serve]'" in r.stderr
    assert not (tmp_path / "s").exists()
