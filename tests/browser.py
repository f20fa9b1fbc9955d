"""Open a page in headless Chromium and report what a reader would see (stdlib only).

Chromium is driven over its DevTools protocol on a pipe (``--remote-debugging-pipe``:
it reads commands on fd 3 and writes answers and events on fd 4, each JSON
message ended by a NUL byte), so no port is opened and nothing but the page is
loaded. Host names resolve nowhere (``--host-resolver-rules``), so a page
that tries to fetch from the network shows it as a failed request instead of
fetching. What is collected:

* every request the page made (``Network.requestWillBeSent``) -- a
  self-contained page makes none but its own ``file:`` URL and ``data:`` URIs;
* console errors, uncaught exceptions and browser log errors
  (``Runtime.consoleAPICalled`` of type error/assert, ``Runtime.exceptionThrown``,
  ``Log.entryAdded`` of level error);
* per image: complete and its natural width (0: it did not load);
* the ``data-images`` attribute the report's script sets on ``<body>``;
* a PNG screenshot of the top of the page.
"""

from __future__ import annotations

import base64
import json
import os
import select
import shutil
import subprocess
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

FLAGS = (
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
    "--disable-extensions", "--disable-dev-shm-usage",  # containers often have a tiny /dev/shm
    "--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE localhost",
)


def find_chromium() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome"):
        path = shutil.which(name)
        if path:
            return path
    return "/usr/bin/chromium" if os.access("/usr/bin/chromium", os.X_OK) else None


@dataclass
class PageCheck:
    requests: list[str] = field(default_factory=list)
    errors: list[str] = field(default_factory=list)
    images: list[tuple[bool, int]] = field(default_factory=list)
    images_attr: str | None = None
    title: str = ""
    text: str = ""
    screenshot: bytes = b""


class _Pipe:
    def __init__(self, proc: subprocess.Popen, write_fd: int, read_fd: int) -> None:
        self.proc, self.w, self.r = proc, write_fd, read_fd
        self.buf = b""
        self.next_id = 0
        self.events: list[dict[str, Any]] = []

    def send(self, method: str, params: dict[str, Any] | None = None, session: str | None = None,
             timeout: float = 60.0) -> dict[str, Any]:
        self.next_id += 1
        msg: dict[str, Any] = {"id": self.next_id, "method": method, "params": params or {}}
        if session:
            msg["sessionId"] = session
        os.write(self.w, json.dumps(msg).encode() + b"\0")
        while True:
            m = self._read(timeout)
            if m.get("id") == self.next_id:
                if "error" in m:
                    raise RuntimeError(f"{method}: {m['error']}")
                return m.get("result", {})
            self.events.append(m)

    def wait_event(self, method: str, timeout: float = 60.0) -> dict[str, Any]:
        for i, e in enumerate(self.events):
            if e.get("method") == method:
                return self.events.pop(i)
        while True:
            m = self._read(timeout)
            if m.get("method") == method:
                return m
            self.events.append(m)

    def _read(self, timeout: float) -> dict[str, Any]:
        end = time.monotonic() + timeout
        while b"\0" not in self.buf:
            left = end - time.monotonic()
            if left <= 0 or self.proc.poll() is not None:
                raise TimeoutError("no answer from chromium")
            ready, _, _ = select.select([self.r], [], [], min(left, 1.0))
            if ready:
                chunk = os.read(self.r, 1 << 20)
                if not chunk:
                    raise TimeoutError("chromium closed the pipe")
                self.buf += chunk
        raw, self.buf = self.buf.split(b"\0", 1)
        return json.loads(raw)


def open_page(page: Path, profile: Path, *, width: int = 1280, height: int = 2400, timeout: float = 90.0,
              wait_images_attr: float = 10.0) -> PageCheck:
    """Load ``page`` (a local file) in headless Chromium and collect a :class:`PageCheck`.

    ``wait_images_attr``: seconds to wait after the load event for ``<body data-images>``.
    """
    exe = find_chromium()
    if exe is None:
        raise FileNotFoundError("chromium not found")
    to_chrome_r, to_chrome_w = os.pipe()
    from_chrome_r, from_chrome_w = os.pipe()

    def child_fds() -> None:  # runs in the child: its fd 3 reads our commands, fd 4 carries its answers
        a, b = os.dup(to_chrome_r), os.dup(from_chrome_w)
        os.dup2(a, 3)
        os.dup2(b, 4)

    proc = subprocess.Popen(
        [exe, *FLAGS, f"--user-data-dir={profile}", "--remote-debugging-pipe", "about:blank"],
        stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        preexec_fn=child_fds, close_fds=False,
    )
    os.close(to_chrome_r)
    os.close(from_chrome_w)
    pipe = _Pipe(proc, to_chrome_w, from_chrome_r)
    out = PageCheck()
    try:
        target = pipe.send("Target.createTarget", {"url": "about:blank"}, timeout=timeout)["targetId"]
        session = pipe.send("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]
        for domain in ("Page", "Runtime", "Log", "Network"):
            pipe.send(f"{domain}.enable", session=session)
        pipe.send("Emulation.setDeviceMetricsOverride",
                  {"width": width, "height": height, "deviceScaleFactor": 1, "mobile": False}, session=session)
        pipe.send("Page.navigate", {"url": page.resolve().as_uri()}, session=session)
        pipe.wait_event("Page.loadEventFired", timeout=timeout)

        def evaluate(expr: str) -> Any:
            return pipe.send("Runtime.evaluate", {"expression": expr, "returnByValue": True},
                             session=session)["result"].get("value")

        deadline = time.monotonic() + wait_images_attr
        while out.images_attr is None and time.monotonic() < deadline:
            out.images_attr = evaluate("document.body && document.body.getAttribute('data-images')")
            if out.images_attr is None:
                time.sleep(0.2)
        out.images = [tuple(v) for v in evaluate(
            "Array.from(document.images).map(i => [i.complete, i.naturalWidth])") or []]
        out.title = evaluate("document.title") or ""
        out.text = evaluate("document.body ? document.body.innerText : ''") or ""
        shot = pipe.send("Page.captureScreenshot", {"format": "png"}, session=session, timeout=timeout)
        out.screenshot = base64.b64decode(shot["data"])
        for e in pipe.events:
            method, p = e.get("method"), e.get("params", {})
            if method == "Network.requestWillBeSent":
                out.requests.append(p["request"]["url"])
            elif method == "Runtime.exceptionThrown":
                d = p.get("exceptionDetails", {})
                out.errors.append("exception: " + str(d.get("exception", {}).get("description") or d.get("text")))
            elif method == "Runtime.consoleAPICalled" and p.get("type") in ("error", "assert"):
                out.errors.append("console: " + " ".join(str(a.get("value", a.get("description")))
                                                         for a in p.get("args", ())))
            elif method == "Log.entryAdded" and p.get("entry", {}).get("level") == "error":
                out.errors.append("log: " + str(p["entry"].get("text")) + " " + str(p["entry"].get("url", "")))
        try:
            pipe.send("Browser.close", timeout=10)
        except (TimeoutError, RuntimeError, OSError):
            pass
    finally:
        os.close(to_chrome_w)
        os.close(from_chrome_r)
        try:
            proc.wait(timeout=15)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
    return out
