"""A minimal Chrome DevTools Protocol client over ``--remote-debugging-pipe`` (test helper).

Headless Chromium reads NUL-terminated JSON commands on fd 3 and writes
replies and events on fd 4, so no websocket library is needed. Used by the
real-browser test of ``report.html``.
"""

from __future__ import annotations

import base64
import fcntl
import json
import os
import select
import shutil
import subprocess
import tempfile
from pathlib import Path

FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--remote-debugging-pipe")
#: A browser that does not answer in this many seconds is treated as not runnable here.
PATIENCE = 120.0


def chromium_path() -> str | None:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name) or (f"/usr/bin/{name}" if Path(f"/usr/bin/{name}").exists() else None)
        if found:
            return found
    return None


class Browser:
    """One headless Chromium with a fresh empty profile, driven over the pipe."""

    def __init__(self, executable: str):
        self._profile = tempfile.mkdtemp(prefix="rk-chromium-")
        to_child_r, self._to_child = os.pipe()
        self._from_child, from_child_w = os.pipe()

        def wire() -> None:   # in the child: fds 3 and 4 are the protocol pipe
            high_r = fcntl.fcntl(to_child_r, fcntl.F_DUPFD, 10)    # out of the way of 3 and 4 first
            high_w = fcntl.fcntl(from_child_w, fcntl.F_DUPFD, 10)
            os.dup2(high_r, 3)
            os.dup2(high_w, 4)

        self.proc = subprocess.Popen([executable, *FLAGS, f"--user-data-dir={self._profile}", "about:blank"],
                                     stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                     stderr=subprocess.DEVNULL, preexec_fn=wire, pass_fds=(3, 4))
        os.close(to_child_r)
        os.close(from_child_w)
        self._buffer = b""
        self._next = 0
        self.events: list[dict] = []

    def send(self, method: str, params: dict | None = None, session: str | None = None) -> dict:
        self._next += 1
        message = {"id": self._next, "method": method, "params": params or {}}
        if session:
            message["sessionId"] = session
        os.write(self._to_child, json.dumps(message).encode() + b"\0")
        while True:
            reply = self._read()
            if reply.get("id") == self._next:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply.get("result", {})
            self.events.append(reply)

    def wait_for(self, method: str) -> dict:
        for i, event in enumerate(self.events):
            if event.get("method") == method:
                return self.events.pop(i)
        while True:
            event = self._read()
            if event.get("method") == method:
                return event
            self.events.append(event)

    def _read(self) -> dict:
        while b"\0" not in self._buffer:
            ready, _, _ = select.select([self._from_child], [], [], PATIENCE)
            if not ready:
                raise TimeoutError("chromium did not answer on the debugging pipe")
            chunk = os.read(self._from_child, 1 << 16)
            if not chunk:
                raise ConnectionError("chromium closed the debugging pipe")
            self._buffer += chunk
        raw, self._buffer = self._buffer.split(b"\0", 1)
        return json.loads(raw)

    def close(self) -> None:
        try:
            self.send("Browser.close")
        except (OSError, RuntimeError, TimeoutError, ConnectionError):
            pass
        try:
            self.proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        for fd in (self._to_child, self._from_child):
            try:
                os.close(fd)
            except OSError:
                pass
        shutil.rmtree(self._profile, ignore_errors=True)


def open_offline(executable: str, page: Path, screenshot: Path) -> list[dict]:
    """Open ``page`` from disk with the network off; save a screenshot; return the problem events.

    Problems are failed requests (``Network.loadingFailed``), console errors
    (``Runtime.consoleAPICalled`` of type error/assert), uncaught exceptions
    and browser log entries of level error.
    """
    browser = Browser(executable)
    try:
        target = browser.send("Target.createTarget", {"url": "about:blank"})["targetId"]
        session = browser.send("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]
        for domain in ("Page", "Runtime", "Log", "Network"):
            browser.send(f"{domain}.enable", session=session)
        browser.send("Network.emulateNetworkConditions", {"offline": True, "latency": 0, "downloadThroughput": 0,
                                                          "uploadThroughput": 0}, session=session)
        browser.send("Page.navigate", {"url": page.resolve().as_uri()}, session=session)
        browser.wait_for("Page.loadEventFired")
        shot = browser.send("Page.captureScreenshot", {"format": "png", "captureBeyondViewport": False},
                            session=session)
        screenshot.write_bytes(base64.b64decode(shot["data"]))
        browser.send("Runtime.evaluate", {"expression": "1"}, session=session)   # flush pending events
    finally:
        browser.close()
    return [e for e in browser.events if _is_problem(e)]


def _is_problem(event: dict) -> bool:
    method, params = event.get("method"), event.get("params", {})
    if method == "Network.loadingFailed" or method == "Runtime.exceptionThrown":
        return True
    if method == "Runtime.consoleAPICalled":
        return params.get("type") in ("error", "assert")
    if method == "Log.entryAdded":
        return params.get("entry", {}).get("level") == "error"
    return False
