"""A small DevTools-protocol driver for headless Chromium, used by the report's browser tests.

It starts Debian's ``chromium`` with a fresh user-data folder, opens one page over the DevTools
websocket (websocket-client), records console messages, exceptions, network requests and dialogs,
and can evaluate expressions and take a full-page screenshot.
"""

from __future__ import annotations

import base64
import itertools
import json
import shutil
import subprocess
import tempfile
import time
import urllib.request
from pathlib import Path

import websocket

FLAGS = [
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
    "--remote-debugging-port=0",
    "--remote-allow-origins=*",
]


def find_chromium() -> str | None:
    for name in ("chromium", "chromium-browser"):
        p = shutil.which(name)
        if p:
            return p
    return None


class Browser:
    """One headless Chromium process with one page; use as a context manager."""

    def __init__(self, executable: str, timeout: float = 60.0):
        self.executable = executable
        self.timeout = timeout
        self.events: list[dict] = []
        self._ids = itertools.count(1)

    def __enter__(self):
        self.profile = tempfile.mkdtemp(prefix="bayesdid-chromium-")
        self.proc = subprocess.Popen(
            [self.executable, *FLAGS, f"--user-data-dir={self.profile}", "about:blank"],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        port_file = Path(self.profile) / "DevToolsActivePort"
        t0 = time.monotonic()
        while not port_file.is_file() or not port_file.read_text().strip():
            if self.proc.poll() is not None or time.monotonic() - t0 > self.timeout:
                self.__exit__(None, None, None)
                raise RuntimeError("chromium did not open its DevTools port")
            time.sleep(0.1)
        port = int(port_file.read_text().split()[0])
        req = urllib.request.Request(f"http://127.0.0.1:{port}/json/new?about:blank", method="PUT")
        with urllib.request.urlopen(req, timeout=self.timeout) as r:
            target = json.loads(r.read())
        self.ws = websocket.create_connection(
            target["webSocketDebuggerUrl"], timeout=self.timeout, suppress_origin=True
        )
        for domain in ("Page", "Runtime", "Log", "Network"):
            self.send(f"{domain}.enable")
        return self

    def __exit__(self, *exc):
        try:
            if getattr(self, "ws", None) is not None:
                self.ws.close()
        finally:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
            shutil.rmtree(self.profile, ignore_errors=True)
        return False

    def send(self, method: str, **params) -> dict:
        """Call a DevTools method and return its result; events seen meanwhile are recorded."""
        mid = next(self._ids)
        self.ws.send(json.dumps({"id": mid, "method": method, "params": params}))
        t0 = time.monotonic()
        while time.monotonic() - t0 < self.timeout:
            msg = self._pump()
            if msg.get("id") == mid:
                if "error" in msg:
                    raise RuntimeError(f"{method}: {msg['error']}")
                return msg.get("result", {})
        raise TimeoutError(method)

    def _pump(self) -> dict:
        """Read one message; record events; dismiss any dialog so it cannot block the page."""
        msg = json.loads(self.ws.recv())
        if "method" in msg:
            self.events.append(msg)
            if msg["method"] == "Page.javascriptDialogOpening":
                self.ws.send(
                    json.dumps(
                        {"id": next(self._ids), "method": "Page.handleJavaScriptDialog", "params": {"accept": True}}
                    )
                )
        return msg

    def wait_for(self, method: str, since: int = 0) -> dict:
        """The first event ``method`` recorded at index ``since`` or later (reading more if needed)."""
        t0 = time.monotonic()
        while time.monotonic() - t0 < self.timeout:
            for e in self.events[since:]:
                if e["method"] == method:
                    return e
            self._pump()
        raise TimeoutError(method)

    def open(self, path: Path) -> None:
        since = len(self.events)
        self.send("Page.navigate", url=Path(path).resolve().as_uri())
        self.wait_for("Page.loadEventFired", since)

    def evaluate(self, expression: str):
        r = self.send("Runtime.evaluate", expression=expression, returnByValue=True, awaitPromise=True)
        if "exceptionDetails" in r:
            raise RuntimeError(r["exceptionDetails"])
        return r["result"].get("value")

    def screenshot(self, out: Path, width: int = 1100) -> Path:
        self.send("Emulation.setDeviceMetricsOverride", width=width, height=800, deviceScaleFactor=1, mobile=False)
        h = self.evaluate("Math.ceil(document.documentElement.scrollHeight)")
        self.send("Emulation.setDeviceMetricsOverride", width=width, height=int(h), deviceScaleFactor=1, mobile=False)
        r = self.send("Page.captureScreenshot", format="png", captureBeyondViewport=True)
        out = Path(out)
        out.write_bytes(base64.b64decode(r["data"]))
        return out

    # what the tests read
    def errors(self) -> list[str]:
        out = []
        for e in self.events:
            m, p = e["method"], e.get("params", {})
            if m == "Runtime.exceptionThrown":
                out.append(f"exception: {p.get('exceptionDetails', {}).get('text')}")
            elif m == "Runtime.consoleAPICalled" and p.get("type") in ("error", "assert"):
                out.append(f"console.{p['type']}: {[a.get('value') for a in p.get('args', [])]}")
            elif m == "Log.entryAdded" and p.get("entry", {}).get("level") == "error":
                out.append(f"log: {p['entry'].get('text')} ({p['entry'].get('url', '')})")
        return out

    def requests(self) -> list[str]:
        return [e["params"]["request"]["url"] for e in self.events if e["method"] == "Network.requestWillBeSent"]

    def dialogs(self) -> list[str]:
        return [e["params"].get("message", "") for e in self.events if e["method"] == "Page.javascriptDialogOpening"]
