"""Headless Chromium driven over the Chrome DevTools Protocol (CDP), for the stage tests.

The browser is Debian's ``chromium``; the protocol's messages (``Target.createTarget``,
``Page.navigate``, ``Runtime.evaluate``, ``Input.dispatchMouseEvent``,
``Emulation.setDeviceMetricsOverride``, ``Page.captureScreenshot``) are those of the Chrome
DevTools Protocol's published reference (chromedevtools.github.io/devtools-protocol, "tot").
Its WebSocket is spoken with aiohttp's client on a loop thread of this module, so a test
calls plain functions. The browser listens on 127.0.0.1 only, on a port it picks itself
(``--remote-debugging-port=0``, read back from ``DevToolsActivePort`` in its profile).
"""

from __future__ import annotations

import asyncio
import base64
import itertools
import json
import os
import shutil
import subprocess
import threading
import time
from pathlib import Path

import pytest


def chromium_path() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome"):
        if shutil.which(name):
            return shutil.which(name)
    return None


def need_chromium() -> str:
    """The browser's path; the test fails under SCENEMON_REQUIRE_BROWSER=1 without one, else skips."""
    exe = chromium_path()
    if exe is None:
        if os.environ.get("SCENEMON_REQUIRE_BROWSER") == "1":
            pytest.fail("SCENEMON_REQUIRE_BROWSER=1 but no chromium")
        pytest.skip("no chromium installed")
    return exe


class Tab:
    """One page of the browser, with its own DevTools connection."""

    def __init__(self, browser: Chrome, target_id: str) -> None:
        self.browser = browser
        self.ws = browser._run(browser._session.ws_connect(
            f"ws://127.0.0.1:{browser.port}/devtools/page/{target_id}", max_msg_size=0))
        self.ids = itertools.count(1)
        self.pending: dict[int, asyncio.Future] = {}
        self.events: list[dict] = []  # console messages, exceptions, log entries (CSP reports)
        self.reader = asyncio.run_coroutine_threadsafe(self._read(), browser.loop)
        for domain in ("Page", "Runtime", "Log"):
            self.call(f"{domain}.enable")
        # a page the browser thinks hidden pauses its animation frames: each tab is a window of
        # its own and keeps the focus, as a screen in a room and a phone in a hand do
        self.call("Emulation.setFocusEmulationEnabled", enabled=True)

    async def _read(self) -> None:
        async for msg in self.ws:
            data = json.loads(msg.data)
            if "id" in data:
                fut = self.pending.pop(data["id"], None)
                if fut is not None and not fut.done():
                    fut.set_result(data)
            elif data.get("method") in ("Runtime.exceptionThrown", "Runtime.consoleAPICalled",
                                        "Log.entryAdded"):
                self.events.append(data)

    def call(self, method: str, timeout: float = 30.0, **params):
        async def send():
            i = next(self.ids)
            fut = self.browser.loop.create_future()
            self.pending[i] = fut
            await self.ws.send_str(json.dumps({"id": i, "method": method, "params": params}))
            return await asyncio.wait_for(fut, timeout)

        reply = self.browser._run(send(), timeout + 5)
        if "error" in reply:
            raise RuntimeError(f"{method}: {reply['error']}")
        return reply.get("result", {})

    def js(self, expression: str):
        """The value of a JavaScript expression in the page (returned by value)."""
        r = self.call("Runtime.evaluate", expression=expression, returnByValue=True,
                      awaitPromise=True)
        if "exceptionDetails" in r:
            raise RuntimeError(f"{expression}: {r['exceptionDetails']}")
        return r["result"].get("value")

    def size(self, width: int, height: int, *, mobile: bool) -> None:
        self.call("Emulation.setDeviceMetricsOverride", width=width, height=height,
                  deviceScaleFactor=1, mobile=mobile)

    def open(self, url: str, *, wait_for: str = "true", timeout: float = 20.0) -> None:
        self.call("Page.navigate", url=url)
        self.wait(f"document.readyState === 'complete' && ({wait_for})", timeout)

    def wait(self, expression: str, timeout: float = 20.0) -> None:
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            try:
                if self.js(expression):
                    return
            except RuntimeError:
                pass
            time.sleep(0.05)
        raise AssertionError(f"not true within {timeout} s: {expression}")

    def click(self, selector: str) -> None:
        """A real mouse click at the middle of the element (pressed and released)."""
        box = self.js(f"(() => {{ const e = document.querySelector({json.dumps(selector)});"
                      f" e.scrollIntoView({{block: 'center'}});"
                      f" const r = e.getBoundingClientRect();"
                      f" return [r.x + r.width / 2, r.y + r.height / 2]; }})()")
        for kind in ("mousePressed", "mouseReleased"):
            self.call("Input.dispatchMouseEvent", type=kind, x=box[0], y=box[1], button="left",
                      clickCount=1)

    def screenshot(self, path: Path) -> Path:
        data = self.call("Page.captureScreenshot", format="png")["data"]
        Path(path).write_bytes(base64.b64decode(data))
        return Path(path)

    def problems(self) -> list[str]:
        """Uncaught exceptions, console errors and the browser's log errors (a refused fetch,
        a content-security-policy violation) seen so far."""
        out = []
        for e in self.events:
            p = e.get("params", {})
            if e["method"] == "Runtime.exceptionThrown":
                out.append(json.dumps(p.get("exceptionDetails", {}))[:300])
            elif e["method"] == "Runtime.consoleAPICalled" and p.get("type") == "error":
                out.append(json.dumps(p.get("args", []))[:300])
            elif e["method"] == "Log.entryAdded" and p.get("entry", {}).get("level") == "error":
                out.append(p["entry"].get("text", "")[:300])
        return out


class Chrome:
    """A headless Chromium of its own (profile in `folder`), closed by `close`."""

    def __init__(self, folder: Path) -> None:
        exe = need_chromium()
        profile = Path(folder) / "chrome-profile"
        profile.mkdir(parents=True, exist_ok=True)
        flags = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                 "--no-first-run", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--hide-scrollbars",
                 "--disable-extensions", "--mute-audio", "--remote-debugging-address=127.0.0.1",
                 "--remote-debugging-port=0", f"--user-data-dir={profile}",
                 "--window-size=1280,800", "about:blank"]
        port_file = profile / "DevToolsActivePort"
        port_file.unlink(missing_ok=True)  # a browser before this one may have left it
        self.proc = subprocess.Popen([exe, *flags], stdout=subprocess.DEVNULL,
                                     stderr=subprocess.DEVNULL)
        end = time.monotonic() + 30
        while not (port_file.is_file() and port_file.read_text().count("\n") >= 1):
            if time.monotonic() > end or self.proc.poll() is not None:
                self.proc.kill()
                raise RuntimeError("chromium did not start its DevTools endpoint")
            time.sleep(0.05)
        lines = port_file.read_text().split("\n")
        self.port, browser_path = int(lines[0]), lines[1]
        self.loop = asyncio.new_event_loop()
        self.thread = threading.Thread(target=self.loop.run_forever, name="cdp", daemon=True)
        self.thread.start()
        import aiohttp

        self._session = self._run(self._make_session(aiohttp))
        self._browser_ws = self._run(self._session.ws_connect(
            f"ws://127.0.0.1:{self.port}{browser_path}", max_msg_size=0))
        self._bid = itertools.count(1)
        self.tabs: list[Tab] = []

    @staticmethod
    async def _make_session(aiohttp):
        return aiohttp.ClientSession()

    def _run(self, coro, timeout: float = 60.0):
        return asyncio.run_coroutine_threadsafe(coro, self.loop).result(timeout)

    def tab(self) -> Tab:
        async def create():
            i = next(self._bid)
            await self._browser_ws.send_str(json.dumps(
                {"id": i, "method": "Target.createTarget", "params": {"url": "about:blank", "newWindow": True}}))
            async for msg in self._browser_ws:
                data = json.loads(msg.data)
                if data.get("id") == i:
                    return data["result"]["targetId"]

        t = Tab(self, self._run(create()))
        self.tabs.append(t)
        return t

    def close(self) -> None:
        async def shut():
            for t in self.tabs:
                await t.ws.close()
            await self._browser_ws.close()
            await self._session.close()

        try:
            self._run(shut(), 10)
        finally:
            self.loop.call_soon_threadsafe(self.loop.stop)
            self.thread.join(5)
            self.proc.terminate()
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)
