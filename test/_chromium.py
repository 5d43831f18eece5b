"""Open a page in headless Chromium over the DevTools protocol on a local pipe (no network port).

Chromium with ``--remote-debugging-pipe`` reads protocol commands from fd 3 and writes replies
and events to fd 4, each a JSON message ending in a NUL byte (Chrome DevTools Protocol,
https://chromedevtools.github.io/devtools-protocol/). The helper loads a page, collects console
errors, uncaught exceptions, log errors and every network request, describes each ``<img>``
and takes a full-page screenshot.
"""

from __future__ import annotations

import base64
import fcntl
import json
import os
import select
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

CHROMIUM_FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--disable-default-apps",
    "--disable-extensions",
    "--disable-domain-reliability",
    "--disable-client-side-phishing-detection",
    "--no-pings",
    "--dns-prefetch-disable",
    # Resolve no host name at all: the page is a local file, and nothing may leave loopback
    # (Chromium still looks up its update servers despite the flags above).
    "--host-resolver-rules=MAP * ~NOTFOUND",
    "--remote-debugging-pipe",
)

_TRAMPOLINE = (
    "import os, sys; os.dup2(int(sys.argv[1]), 3); os.dup2(int(sys.argv[2]), 4); "
    "os.execvp(sys.argv[3], sys.argv[3:])"
)
_IMAGES_JS = """JSON.stringify(Array.from(document.images).map(img => ({
  figure: img.closest('figure') ? img.closest('figure').id : null,
  complete: img.complete, width: img.naturalWidth, height: img.naturalHeight,
  src: img.src})))"""


def chromium_binary() -> str:
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    raise RuntimeError("Debian's chromium is not installed: apt-get install -y chromium")


@dataclass
class PageVisit:
    """What the browser saw while loading one page."""

    errors: list[str] = field(default_factory=list)
    requests: list[str] = field(default_factory=list)
    images: list[dict] = field(default_factory=list)
    screenshot_png: bytes = b""
    title: str = ""


class _Pipe:
    def __init__(self, proc: subprocess.Popen, write_fd: int, read_fd: int) -> None:
        self.proc, self.write_fd, self.read_fd = proc, write_fd, read_fd
        self.buffer = b""
        self.next_id = 0
        self.events: list[dict] = []

    def send(self, method: str, params: dict | None = None, session: str | None = None,
             timeout: float = 30.0) -> dict:
        self.next_id += 1
        message = {"id": self.next_id, "method": method, "params": params or {}}
        if session:
            message["sessionId"] = session
        os.write(self.write_fd, json.dumps(message).encode() + b"\0")
        deadline = time.monotonic() + timeout
        while True:
            reply = self._read(deadline)
            if reply.get("id") == self.next_id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply["result"]
            self.events.append(reply)

    def wait_event(self, method: str, timeout: float = 30.0) -> dict:
        deadline = time.monotonic() + timeout
        for event in self.events:
            if event.get("method") == method:
                return event
        while True:
            event = self._read(deadline)
            self.events.append(event)
            if event.get("method") == method:
                return event

    def _read(self, deadline: float) -> dict:
        while b"\0" not in self.buffer:
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                raise TimeoutError("no reply from chromium")
            ready, _, _ = select.select([self.read_fd], [], [], remaining)
            if ready:
                chunk = os.read(self.read_fd, 1 << 20)
                if not chunk:
                    raise RuntimeError(f"chromium closed the pipe (exit {self.proc.poll()})")
                self.buffer += chunk
        raw, self.buffer = self.buffer.split(b"\0", 1)
        return json.loads(raw)


def _above_four(fd: int) -> int:
    if fd > 4:
        return fd
    moved = fcntl.fcntl(fd, fcntl.F_DUPFD_CLOEXEC, 5)
    os.close(fd)
    return moved


def visit(page: Path, *, timeout: float = 60.0) -> PageVisit:
    """Load ``page`` (a local file) in headless Chromium and report what happened."""
    command_read, command_write = os.pipe()
    reply_read, reply_write = os.pipe()
    # Keep the child's ends above 4 so the shell's redirections cannot overwrite one another.
    command_read, reply_write = _above_four(command_read), _above_four(reply_write)

    with tempfile.TemporaryDirectory(prefix="chromium-profile-") as profile:
        # A small Python trampoline (no shell) puts the pipe ends on fds 3 and 4 for Chromium.
        argv = [chromium_binary(), *CHROMIUM_FLAGS, f"--user-data-dir={profile}", "about:blank"]
        proc = subprocess.Popen(
            [sys.executable, "-c", _TRAMPOLINE, str(command_read), str(reply_write), *argv],
            stdin=subprocess.DEVNULL,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
            pass_fds=(command_read, reply_write),
        )
        os.close(command_read)
        os.close(reply_write)
        pipe = _Pipe(proc, command_write, reply_read)
        try:
            return _load(pipe, page, timeout)
        finally:
            try:
                pipe.send("Browser.close", timeout=10)
            except (RuntimeError, TimeoutError, OSError):
                pass
            try:
                proc.wait(timeout=15)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(timeout=15)
            os.close(command_write)
            os.close(reply_read)


def _load(pipe: _Pipe, page: Path, timeout: float) -> PageVisit:
    target = pipe.send("Target.createTarget", {"url": "about:blank"})["targetId"]
    session = pipe.send("Target.attachToTarget", {"targetId": target, "flatten": True})[
        "sessionId"
    ]
    for domain in ("Runtime", "Log", "Page", "Network"):
        pipe.send(f"{domain}.enable", session=session)
    pipe.events.clear()
    pipe.send("Page.navigate", {"url": page.resolve().as_uri()}, session=session)
    pipe.wait_event("Page.loadEventFired", timeout=timeout)
    result = PageVisit()
    result.title = pipe.send(
        "Runtime.evaluate", {"expression": "document.title", "returnByValue": True},
        session=session)["result"]["value"]
    result.images = json.loads(pipe.send(
        "Runtime.evaluate", {"expression": _IMAGES_JS, "returnByValue": True},
        session=session)["result"]["value"])
    shot = pipe.send("Page.captureScreenshot",
                     {"format": "png", "captureBeyondViewport": True}, session=session)
    result.screenshot_png = base64.b64decode(shot["data"])
    for event in pipe.events:
        method, params = event.get("method"), event.get("params", {})
        if method == "Runtime.exceptionThrown":
            result.errors.append(f"exception: {params['exceptionDetails'].get('text')}")
        elif method == "Runtime.consoleAPICalled" and params.get("type") in ("error", "assert"):
            result.errors.append(f"console.{params['type']}: {params.get('args')}")
        elif method == "Log.entryAdded" and params["entry"].get("level") == "error":
            result.errors.append(f"log: {params['entry'].get('text')}")
        elif method == "Network.loadingFailed":
            result.errors.append(f"loading failed: {params.get('errorText')}")
        elif method == "Network.requestWillBeSent":
            result.requests.append(params["request"]["url"])
    return result
