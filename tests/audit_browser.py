"""Load a page in headless Chromium over the DevTools protocol; record console errors and requests.

Talks to Chromium through ``--remote-debugging-pipe`` (file descriptors 3 and 4, messages
separated by NUL bytes), so no driver package is needed. Used by the audit report tests.
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
import time
from dataclasses import dataclass, field
from pathlib import Path

import pytest

BROWSERS = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")


def find_chromium() -> str:
    """Path of a Chromium binary, or skip: a test never installs software on the machine."""
    for name in BROWSERS:
        path = shutil.which(name)
        if path:
            return path
    pytest.skip("no Chromium found; install Debian's 'chromium' package (apt-get install chromium) "
                "to run the headless-browser test of the audit report")


@dataclass
class PageLoad:
    """What happened while a page loaded."""

    console_errors: list[str] = field(default_factory=list)
    requests: list[str] = field(default_factory=list)
    title: str = ""
    screenshot: Path | None = None
    width: int = 0
    height: int = 0


class _Pipe:
    def __init__(self, binary: str, profile_dir: str) -> None:
        to_child_r, self._to_child = os.pipe()
        self._from_child, from_child_w = os.pipe()

        def wire() -> None:  # runs in the child: its fd 3 reads commands, fd 4 writes replies
            # move both ends out of the way first: either may already be fd 3 or 4
            spare_r = fcntl.fcntl(to_child_r, fcntl.F_DUPFD, 10)
            spare_w = fcntl.fcntl(from_child_w, fcntl.F_DUPFD, 10)
            os.dup2(spare_r, 3)
            os.dup2(spare_w, 4)
            os.set_inheritable(3, True)
            os.set_inheritable(4, True)

        self.proc = subprocess.Popen(
            [binary, "--headless=new", "--remote-debugging-pipe", "--no-sandbox", "--disable-gpu",
             "--no-first-run", "--no-default-browser-check", "--disable-extensions",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             f"--user-data-dir={profile_dir}", "about:blank"],
            stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
            close_fds=False, preexec_fn=wire,  # noqa: PLW1509 - single-threaded test helper
        )
        os.close(to_child_r)
        os.close(from_child_w)
        self._buffer = b""
        self._next_id = 0
        self.events: list[dict] = []

    def _read_message(self, deadline: float) -> dict:
        while b"\0" not in self._buffer:
            left = deadline - time.monotonic()
            if left <= 0:
                raise TimeoutError("Chromium did not answer in time")
            ready, _, _ = select.select([self._from_child], [], [], left)
            if ready:
                chunk = os.read(self._from_child, 1 << 20)
                if not chunk:
                    raise RuntimeError("Chromium closed the DevTools pipe")
                self._buffer += chunk
        raw, self._buffer = self._buffer.split(b"\0", 1)
        return json.loads(raw)

    def call(self, method: str, params: dict | None = None, session: str | None = None,
             timeout: float = 30.0) -> dict:
        self._next_id += 1
        msg: dict = {"id": self._next_id, "method": method, "params": params or {}}
        if session:
            msg["sessionId"] = session
        os.write(self._to_child, json.dumps(msg).encode() + b"\0")
        deadline = time.monotonic() + timeout
        while True:
            reply = self._read_message(deadline)
            if reply.get("id") == self._next_id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply.get("result", {})
            self.events.append(reply)

    def wait_for(self, method: str, timeout: float = 30.0) -> dict:
        deadline = time.monotonic() + timeout
        for ev in self.events:
            if ev.get("method") == method:
                return ev
        while True:
            ev = self._read_message(deadline)
            self.events.append(ev)
            if ev.get("method") == method:
                return ev

    def close(self) -> None:
        try:
            self.call("Browser.close", timeout=5)
        except (RuntimeError, TimeoutError, OSError):
            pass
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        os.close(self._to_child)
        os.close(self._from_child)


def load_page(binary: str, page: Path, screenshot: Path, width: int = 1200,
              segment_height: int | None = None) -> PageLoad:
    """Open ``page`` in headless Chromium, screenshot it whole, and report console errors and requests.

    With ``segment_height``, the page is also saved in slices of that height
    (``<screenshot stem>-<i>.png``), which are easier to look at than one tall image.
    """
    url = page.resolve().as_uri()
    result = PageLoad()
    with tempfile.TemporaryDirectory() as profile:
        pipe = _Pipe(binary, profile)
        try:
            target = pipe.call("Target.createTarget", {"url": "about:blank"})["targetId"]
            session = pipe.call("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]
            for domain in ("Page", "Runtime", "Log", "Network"):
                pipe.call(f"{domain}.enable", session=session)
            pipe.call("Emulation.setDeviceMetricsOverride",
                      {"width": width, "height": 900, "deviceScaleFactor": 1, "mobile": False}, session=session)
            pipe.call("Page.navigate", {"url": url}, session=session)
            pipe.wait_for("Page.loadEventFired")
            time.sleep(0.3)  # let late console messages arrive
            result.title = pipe.call("Runtime.evaluate", {"expression": "document.title", "returnByValue": True},
                                     session=session)["result"]["value"]
            size = pipe.call("Page.getLayoutMetrics", session=session)["cssContentSize"]
            result.width, result.height = int(size["width"]), int(size["height"])
            shot = pipe.call("Page.captureScreenshot", {
                "format": "png", "captureBeyondViewport": True,
                "clip": {"x": 0, "y": 0, "width": size["width"], "height": size["height"], "scale": 1}},
                session=session, timeout=60)
            screenshot.write_bytes(base64.b64decode(shot["data"]))
            result.screenshot = screenshot
            for i, top in enumerate(range(0, result.height, segment_height) if segment_height else []):
                part = pipe.call("Page.captureScreenshot", {
                    "format": "png", "captureBeyondViewport": True,
                    "clip": {"x": 0, "y": top, "width": size["width"],
                             "height": min(segment_height, result.height - top), "scale": 1}},
                    session=session, timeout=60)
                screenshot.with_name(f"{screenshot.stem}-{i}.png").write_bytes(base64.b64decode(part["data"]))
        finally:
            pipe.close()
    for ev in pipe.events:
        method, params = ev.get("method"), ev.get("params", {})
        if method == "Runtime.consoleAPICalled" and params.get("type") in ("error", "assert", "warning"):
            result.console_errors.append(" ".join(str(a.get("value", a.get("description", ""))) for a in params.get("args", [])))
        elif method == "Runtime.exceptionThrown":
            result.console_errors.append(params.get("exceptionDetails", {}).get("text", "exception"))
        elif method == "Log.entryAdded" and params.get("entry", {}).get("level") in ("error", "warning"):
            result.console_errors.append(params["entry"].get("text", ""))
        elif method == "Network.requestWillBeSent":
            req_url = params.get("request", {}).get("url", "")
            if req_url != url:
                result.requests.append(req_url)
    return result
