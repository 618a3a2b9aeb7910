"""A small headless-Chromium client for the report tests (DevTools protocol over a pipe).

Chromium started with ``--remote-debugging-pipe`` reads protocol commands from
file descriptor 3 and writes replies and events to descriptor 4, each message
a JSON text ended by a NUL byte (Chrome DevTools Protocol, "remote debugging
pipe"). Nothing here needs a network port or a websocket library.
"""

from __future__ import annotations

import base64
import fcntl
import json
import os
import select
import subprocess
import time
from pathlib import Path
from typing import Any

CHROMIUM = Path("/usr/bin/chromium")
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--remote-debugging-pipe")


class Browser:
    """One headless Chromium process driven over the DevTools pipe."""

    def __init__(self, profile_dir: Path, timeout: float = 60.0) -> None:
        self.timeout = timeout
        r_cmd, w_cmd = os.pipe()
        r_res, w_res = os.pipe()

        def fds() -> None:  # in the child: the pipe ends become fds 3 and 4
            a = fcntl.fcntl(r_cmd, fcntl.F_DUPFD, 10)
            b = fcntl.fcntl(w_res, fcntl.F_DUPFD, 10)
            os.dup2(a, 3)
            os.dup2(b, 4)

        self.proc = subprocess.Popen(
            [str(CHROMIUM), *FLAGS, f"--user-data-dir={profile_dir}", "about:blank"],
            stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
            preexec_fn=fds, close_fds=False)
        os.close(r_cmd)
        os.close(w_res)
        self.w, self.r = w_cmd, r_res
        self.buf = b""
        self.next_id = 0
        self.events: list[dict] = []

    def _read_message(self, deadline: float) -> dict:
        while b"\0" not in self.buf:
            left = deadline - time.monotonic()
            if left <= 0 or not select.select([self.r], [], [], left)[0]:
                raise TimeoutError("no answer from chromium")
            chunk = os.read(self.r, 1 << 16)
            if not chunk:
                raise RuntimeError("chromium closed the pipe")
            self.buf += chunk
        msg, self.buf = self.buf.split(b"\0", 1)
        return json.loads(msg)

    def call(self, method: str, params: dict | None = None, session: str | None = None) -> dict:
        """Send one command and return its result (events meanwhile go to ``events``)."""
        self.next_id += 1
        msg: dict[str, Any] = {"id": self.next_id, "method": method, "params": params or {}}
        if session:
            msg["sessionId"] = session
        os.write(self.w, json.dumps(msg).encode() + b"\0")
        deadline = time.monotonic() + self.timeout
        while True:
            rec = self._read_message(deadline)
            if rec.get("id") == self.next_id:
                if "error" in rec:
                    raise RuntimeError(f"{method}: {rec['error']}")
                return rec.get("result", {})
            self.events.append(rec)

    def wait_event(self, method: str) -> dict:
        deadline = time.monotonic() + self.timeout
        for i, rec in enumerate(self.events):
            if rec.get("method") == method:
                return self.events.pop(i)
        while True:
            rec = self._read_message(deadline)
            if rec.get("method") == method:
                return rec
            self.events.append(rec)

    def close(self) -> None:
        try:
            self.call("Browser.close")
        except Exception:  # already gone: nothing to close
            pass
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        os.close(self.w)
        os.close(self.r)


def load_page(page: Path, profile_dir: Path, screenshot: Path | None = None) -> dict:
    """Open ``page`` in headless Chromium; report its images, errors and title.

    Returns
    -------
    dict
        ``images``: ``[src, complete, naturalWidth]`` per ``<img>``; ``errors``:
        console errors, uncaught exceptions and failed loads (text); ``title``.
    """
    b = Browser(profile_dir)
    try:
        target = b.call("Target.createTarget", {"url": "about:blank"})["targetId"]
        sid = b.call("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]
        for domain in ("Page", "Runtime", "Log"):
            b.call(f"{domain}.enable", session=sid)
        b.call("Emulation.setDeviceMetricsOverride",
               {"width": 1200, "height": 900, "deviceScaleFactor": 1, "mobile": False},
               session=sid)
        b.call("Page.navigate", {"url": page.resolve().as_uri()}, session=sid)
        b.wait_event("Page.loadEventFired")
        expr = ("JSON.stringify({title: document.title, images: Array.from(document.images)"
                ".map(i => [i.getAttribute('src'), i.complete, i.naturalWidth])})")
        value = b.call("Runtime.evaluate", {"expression": expr, "returnByValue": True},
                       session=sid)["result"]["value"]
        out = json.loads(value)
        if screenshot is not None:
            shot = b.call("Page.captureScreenshot", {"format": "png",
                                                     "captureBeyondViewport": True},
                          session=sid)
            screenshot.write_bytes(base64.b64decode(shot["data"]))
        errors = []
        for ev in b.events:
            m, p = ev.get("method"), ev.get("params", {})
            if m == "Runtime.exceptionThrown":
                errors.append(str(p.get("exceptionDetails", {}).get("text")))
            elif m == "Runtime.consoleAPICalled" and p.get("type") == "error":
                errors.append(" ".join(str(a.get("value")) for a in p.get("args", [])))
            elif m == "Log.entryAdded" and p.get("entry", {}).get("level") == "error":
                errors.append(str(p["entry"].get("text")))
        out["errors"] = errors
        return out
    finally:
        b.close()
