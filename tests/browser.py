"""Open an HTML file in headless Chromium (the system package) and report what a reader would see.

Speaks the DevTools protocol over a pipe (``--remote-debugging-pipe``: JSON messages separated by NUL bytes on
file descriptors 3 and 4), so no extra Python package is needed. Used by tests/test_report_browser.py and by
``python tests/browser.py page.html shot.png`` to look at a report by hand.
"""

from __future__ import annotations

import base64
import json
import os
import select
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

__all__ = ["find_chromium", "inspect_page", "MISSING_CHROMIUM"]

MISSING_CHROMIUM = ("chromium not found: install the system package `chromium` (e.g. apt-get install -y chromium); "
                    "the report test renders the page in a real headless browser")

_CHECK_IMAGES = """(() => {
  const imgs = Array.from(document.images);
  return JSON.stringify({ready: document.readyState, title: document.title,
    images: imgs.map(i => ({alt: i.alt, complete: i.complete, w: i.naturalWidth, h: i.naturalHeight})),
    height: document.documentElement.scrollHeight,
    text: document.body ? document.body.innerText.slice(0, 20000) : ""});
})()"""


def find_chromium() -> str | None:
    """Path of the Chromium binary of the system package, or None."""
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    return None


class _Pipe:
    def __init__(self, proc, to_browser: int, from_browser: int):
        self.proc, self.w, self.r = proc, to_browser, from_browser
        self.buf = b""
        self.next_id = 0
        self.events: list[dict] = []

    def send(self, method: str, params: dict | None = None, session: str | None = None) -> int:
        self.next_id += 1
        msg = {"id": self.next_id, "method": method, "params": params or {}}
        if session:
            msg["sessionId"] = session
        os.write(self.w, json.dumps(msg).encode() + b"\0")
        return self.next_id

    def _read_one(self, deadline: float) -> dict:
        while b"\0" not in self.buf:
            left = deadline - time.monotonic()
            if left <= 0:
                raise TimeoutError("no answer from chromium")
            ready, _, _ = select.select([self.r], [], [], left)
            if ready:
                chunk = os.read(self.r, 1 << 20)
                if not chunk:
                    raise RuntimeError("chromium closed the pipe")
                self.buf += chunk
        raw, self.buf = self.buf.split(b"\0", 1)
        return json.loads(raw)

    def call(self, method: str, params: dict | None = None, session: str | None = None,
             timeout_s: float = 60.0) -> dict:
        mid = self.send(method, params, session)
        deadline = time.monotonic() + timeout_s
        while True:
            msg = self._read_one(deadline)
            if msg.get("id") == mid:
                if "error" in msg:
                    raise RuntimeError(f"{method}: {msg['error']}")
                return msg.get("result", {})
            self.events.append(msg)

    def wait_event(self, method: str, timeout_s: float = 60.0) -> dict:
        for k, ev in enumerate(self.events):
            if ev.get("method") == method:
                return self.events.pop(k)
        deadline = time.monotonic() + timeout_s
        while True:
            msg = self._read_one(deadline)
            if msg.get("method") == method:
                return msg
            self.events.append(msg)


def inspect_page(html_path, screenshot_path, *, width: int = 1280, height: int = 900,
                 timeout_s: float = 90.0) -> dict:
    """Load ``html_path`` in headless Chromium; return what loaded and what the console said.

    Returns
    -------
    dict
        ``images`` (alt, complete, natural width and height of each image), ``title``, ``text`` (the visible
        text), ``console_errors`` (console messages of level error, uncaught exceptions, failed loads),
        ``screenshot`` (path of the full-page PNG written).
    """
    exe = find_chromium()
    if exe is None:
        raise FileNotFoundError(MISSING_CHROMIUM)
    url = Path(html_path).resolve().as_uri()
    with tempfile.TemporaryDirectory(prefix="metalay-chromium-") as profile:
        to_r, to_w = os.pipe()      # we write, chromium reads (its fd 3)
        from_r, from_w = os.pipe()  # chromium writes (its fd 4), we read

        def child_fds():  # in the child: the pipe ends become fds 3 and 4 (copied high first: no clobbering)
            a, b = os.dup(to_r), os.dup(from_w)
            a, b = os.dup2(a, 100), os.dup2(b, 101)
            os.dup2(a, 3)
            os.dup2(b, 4)

        args = [exe, "--headless=new", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
                "--remote-debugging-pipe", "--no-first-run", "--no-default-browser-check",
                f"--user-data-dir={profile}", f"--window-size={width},{height}", "about:blank"]
        proc = subprocess.Popen(args, preexec_fn=child_fds, close_fds=False, stdout=subprocess.DEVNULL,
                                stderr=subprocess.DEVNULL)
        os.close(to_r)
        os.close(from_w)
        pipe = _Pipe(proc, to_w, from_r)
        try:
            return _drive(pipe, url, screenshot_path, width, height, timeout_s)
        finally:
            try:
                pipe.send("Browser.close")
            except OSError:
                pass
            try:
                proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()
            os.close(to_w)
            os.close(from_r)


def _drive(pipe: _Pipe, url: str, screenshot_path, width: int, height: int, timeout_s: float) -> dict:
    target = pipe.call("Target.createTarget", {"url": "about:blank"})["targetId"]
    session = pipe.call("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]
    for domain in ("Page", "Runtime", "Log", "Network"):
        pipe.call(f"{domain}.enable", session=session)
    pipe.call("Emulation.setDeviceMetricsOverride", {"width": width, "height": height, "deviceScaleFactor": 1,
                                                     "mobile": False}, session=session)
    pipe.call("Page.navigate", {"url": url}, session=session)
    pipe.wait_event("Page.loadEventFired", timeout_s)
    res = pipe.call("Runtime.evaluate", {"expression": _CHECK_IMAGES, "returnByValue": True}, session=session)
    page = json.loads(res["result"]["value"])
    full_h = max(height, min(int(page["height"]), 30000))
    pipe.call("Emulation.setDeviceMetricsOverride", {"width": width, "height": full_h, "deviceScaleFactor": 1,
                                                     "mobile": False}, session=session)
    shot = pipe.call("Page.captureScreenshot", {"format": "png", "captureBeyondViewport": True}, session=session)
    Path(screenshot_path).write_bytes(base64.b64decode(shot["data"]))
    errors = []
    for ev in pipe.events:
        m, p = ev.get("method"), ev.get("params", {})
        if m == "Runtime.consoleAPICalled" and p.get("type") in ("error", "assert"):
            errors.append("console: " + " ".join(str(a.get("value", a.get("description", ""))) for a in p["args"]))
        elif m == "Runtime.exceptionThrown":
            errors.append("exception: " + str(p.get("exceptionDetails", {}).get("text")))
        elif m == "Log.entryAdded" and p.get("entry", {}).get("level") == "error":
            errors.append("log: " + str(p["entry"].get("text")) + " " + str(p["entry"].get("url", "")))
        elif m == "Network.loadingFailed":
            errors.append("load failed: " + str(p.get("errorText")))
    return dict(page, console_errors=errors, screenshot=str(screenshot_path))


if __name__ == "__main__":
    info = inspect_page(sys.argv[1], sys.argv[2] if len(sys.argv) > 2 else "page.png")
    print(json.dumps({k: v for k, v in info.items() if k != "text"}, indent=1))
