"""Headless Chromium over a page file, for the tests of every page tonebench writes.

Chromium is driven over its DevTools protocol on a pipe (--remote-debugging-pipe: fd 3 in, fd 4
out, messages separated by NUL bytes), which needs nothing beyond the standard library. Every
request the page makes is recorded (Network.requestWillBeSent) and any that is not the page file
itself fails the tests; in addition the browser runs with a dead proxy and a host resolver that
resolves nothing, so no request could leave the machine even if one were made. The state read
back includes every plotted trace as plotly holds it in the page (name, mode, colour, symbol).
"""

from __future__ import annotations

import fcntl
import json
import os
import queue
import shutil
import subprocess
import tempfile
import threading
from dataclasses import dataclass, field
from pathlib import Path

import pytest

TIMEOUT_S = 60.0


def chromium_binary() -> str:
    found = shutil.which("chromium") or shutil.which("chromium-browser")
    if found is None:
        if os.environ.get("TONEBENCH_REQUIRE_POSTGRES") == "1":  # CI installs chromium and sets this
            pytest.fail("chromium not found (apt-get install chromium)")
        pytest.skip("chromium not found")
    return found


@dataclass
class PageLoad:
    requests: list[str] = field(default_factory=list)
    exceptions: list[str] = field(default_factory=list)
    state: dict = field(default_factory=dict)


# What the page looks like once plotly has drawn: figures, drawn figures, markers, boxes.
STATE_JS = """new Promise(done => setTimeout(done, 250)).then(() => JSON.stringify({
  figures: document.querySelectorAll('div.figure, div.sweep').length,
  drawn: [...document.querySelectorAll('div.figure .js-plotly-plot, div.sweep .js-plotly-plot')].filter(d => d.querySelector('svg.main-svg .cartesianlayer')).length,
  points: document.querySelectorAll('.scatterlayer .point').length,
  boxes: document.querySelectorAll('.boxlayer .trace').length,
  titles: [...document.querySelectorAll('.gtitle')].map(t => t.textContent),
  traces: [...document.querySelectorAll('.js-plotly-plot')].flatMap(d => (d.data || []).map((t, i) => ({
    figure: d.id, name: t.name || '', mode: t.mode || '', legendgroup: t.legendgroup || '',
    color: t.marker && typeof t.marker.color === 'string' ? t.marker.color : null,
    symbol: t.marker && typeof t.marker.symbol === 'string' ? t.marker.symbol : null,
    line_color: t.marker && t.marker.line && typeof t.marker.line.color === 'string' ? t.marker.line.color : null,
    points: d.calcdata && d.calcdata[i] ? d.calcdata[i].length : null}))),
}))"""


class DevTools:
    """A minimal DevTools protocol client over Chromium's pipe."""

    def __init__(self, binary: str, profile: str):
        to_browser_r, self._to_browser = os.pipe()
        self._from_browser, from_browser_w = os.pipe()

        def child_fds():
            # Chromium reads fd 3 and writes fd 4; copy high first so the two cannot clobber each other.
            read_fd = fcntl.fcntl(to_browser_r, fcntl.F_DUPFD, 10)
            write_fd = fcntl.fcntl(from_browser_w, fcntl.F_DUPFD, 10)
            os.dup2(read_fd, 3)
            os.dup2(write_fd, 4)

        self.process = subprocess.Popen(
            [binary, "--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage", "--disable-quic",
             "--no-first-run", "--disable-background-networking", "--disable-component-update", "--disable-sync",
             "--disable-default-apps", f"--user-data-dir={profile}", "--proxy-server=http://127.0.0.1:9",
             "--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE localhost", "--remote-debugging-pipe", "about:blank"],
            pass_fds=(3, 4), preexec_fn=child_fds, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL)
        os.close(to_browser_r)
        os.close(from_browser_w)
        self._messages: queue.Queue = queue.Queue()
        self._next_id = 0
        self.events: list[dict] = []
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    def _read(self) -> None:
        buffer = b""
        while chunk := os.read(self._from_browser, 1 << 16):
            buffer += chunk
            *messages, buffer = buffer.split(b"\0")
            for message in messages:
                self._messages.put(json.loads(message))
        self._messages.put(None)

    def _next_message(self) -> dict:
        message = self._messages.get(timeout=TIMEOUT_S)
        if message is None:
            raise RuntimeError("chromium closed the DevTools pipe")
        return message

    def call(self, method: str, params: dict | None = None, session: str | None = None) -> dict:
        self._next_id += 1
        message = {"id": self._next_id, "method": method, "params": params or {}}
        if session:
            message["sessionId"] = session
        os.write(self._to_browser, json.dumps(message).encode() + b"\0")
        while True:
            reply = self._next_message()
            if reply.get("id") == self._next_id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply["result"]
            self.events.append(reply)

    def wait_for(self, method: str) -> None:
        while not any(e.get("method") == method for e in self.events):
            self.events.append(self._next_message())

    def close(self) -> None:
        try:
            self.call("Browser.close")
        except (RuntimeError, queue.Empty, OSError):
            pass
        try:
            self.process.wait(timeout=20)
        except subprocess.TimeoutExpired:
            self.process.kill()
            self.process.wait()
        os.close(self._to_browser)
        self._reader.join(timeout=10)  # ends at end of file, once the browser has gone
        os.close(self._from_browser)


def load_in_chromium(page: Path, tmp_path: Path, want_figures: int | None = None) -> PageLoad:
    """Open a file in headless Chromium; return its requests, script errors and drawn state."""
    tools = DevTools(chromium_binary(), tempfile.mkdtemp(dir=tmp_path, prefix="profile-"))
    try:
        target = tools.call("Target.createTarget", {"url": "about:blank"})["targetId"]
        session = tools.call("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]
        for domain in ("Network", "Page", "Runtime"):
            tools.call(f"{domain}.enable", session=session)
        tools.call("Page.navigate", {"url": page.resolve().as_uri()}, session=session)
        tools.wait_for("Page.loadEventFired")
        state = {}
        for _ in range(40):  # each evaluation waits 250 ms in the page
            reply = tools.call("Runtime.evaluate", {"expression": STATE_JS, "awaitPromise": True,
                                                    "returnByValue": True}, session=session)
            state = json.loads(reply["result"]["value"])
            if want_figures is None or state["drawn"] >= want_figures:
                break
        return PageLoad(
            requests=[e["params"]["request"]["url"] for e in tools.events if e.get("method") == "Network.requestWillBeSent"],
            exceptions=[json.dumps(e["params"])[:300] for e in tools.events if e.get("method") == "Runtime.exceptionThrown"],
            state=state)
    finally:
        tools.close()


def leaving_requests(load: PageLoad, page: Path) -> list[str]:
    """Requests other than the page itself (inline data: and blob: URLs never leave the page)."""
    return [url for url in load.requests if url != page.resolve().as_uri() and not url.startswith(("data:", "blob:"))]
