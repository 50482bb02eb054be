"""A small driver for headless Chromium over the DevTools protocol (tests only).

Chromium is started with its own fresh profile, no background networking and a DevTools port
chosen by the browser itself (`--remote-debugging-port=0`, read back from DevToolsActivePort). The
only connection made is to that port on 127.0.0.1. websocket-client carries the protocol messages.
"""

from __future__ import annotations

import base64
import json
import os
import shutil
import subprocess
import tempfile
import time
import urllib.request
from pathlib import Path
from typing import Any

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-default-apps", "--disable-extensions", "--mute-audio", "--hide-scrollbars",
         "--remote-debugging-address=127.0.0.1", "--remote-debugging-port=0"]


def find_chromium() -> str | None:
    """The Chromium binary: $PLANRUNNER_CHROMIUM, else the first of the usual names on PATH."""
    override = os.environ.get("PLANRUNNER_CHROMIUM")
    if override:
        return override if Path(override).exists() else None
    for name in ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable"):
        found = shutil.which(name)
        if found:
            return found
    return None


class Browser:
    """One headless Chromium with one page; collects console errors and network requests."""

    def __init__(self, binary: str, timeout: float = 60.0) -> None:
        import websocket  # websocket-client (a test dependency)

        self.timeout = timeout
        self.profile = tempfile.mkdtemp(prefix="planrunner-chromium-")
        self.log = open(Path(self.profile) / "chromium.log", "wb")  # a file, so a chatty browser never blocks
        self.process = subprocess.Popen([binary, *FLAGS, f"--user-data-dir={self.profile}", "about:blank"],
                                        stdin=subprocess.DEVNULL, stdout=self.log, stderr=self.log)
        try:
            port = self._port()
            page = self._page_target(port)
            self.ws = websocket.create_connection(page["webSocketDebuggerUrl"], timeout=timeout,
                                                  suppress_origin=True, http_no_proxy=["127.0.0.1"])
        except BaseException:
            self.close()
            raise
        self.next_id = 0
        self.events: list[dict[str, Any]] = []
        for method in ("Page.enable", "Runtime.enable", "Log.enable", "Network.enable"):
            self.call(method)

    def _port(self) -> int:
        marker = Path(self.profile) / "DevToolsActivePort"
        deadline = time.monotonic() + self.timeout
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                log = (Path(self.profile) / "chromium.log").read_bytes().decode(errors="replace")
                raise RuntimeError(f"Chromium exited with {self.process.returncode}: {log[-2000:]}")
            if marker.exists():
                lines = marker.read_text().split()
                if lines:
                    return int(lines[0])
            time.sleep(0.05)
        raise TimeoutError("Chromium did not open its DevTools port")

    def _page_target(self, port: int) -> dict[str, Any]:
        deadline = time.monotonic() + self.timeout
        while time.monotonic() < deadline:
            # only the browser's own DevTools port on the loopback address
            opener = urllib.request.build_opener(urllib.request.ProxyHandler({}))  # never via a proxy
            with opener.open(f"http://127.0.0.1:{port}/json/list", timeout=5) as response:
                targets = json.load(response)
            pages = [t for t in targets if t.get("type") == "page"]
            if pages:
                return pages[0]
            time.sleep(0.05)
        raise TimeoutError("Chromium shows no page target")

    def call(self, method: str, **params: Any) -> dict[str, Any]:
        """Send one command and wait for its answer; events seen meanwhile are kept."""
        self.next_id += 1
        mine = self.next_id
        self.ws.send(json.dumps({"id": mine, "method": method, "params": params}))
        deadline = time.monotonic() + self.timeout
        while time.monotonic() < deadline:
            message = json.loads(self.ws.recv())
            if message.get("id") == mine:
                if "error" in message:
                    raise RuntimeError(f"{method}: {message['error']}")
                return message.get("result", {})
            if "method" in message:
                self.events.append(message)
        raise TimeoutError(method)

    def wait_for(self, event: str) -> dict[str, Any]:
        for seen in self.events:
            if seen["method"] == event:
                self.events.remove(seen)
                return seen
        deadline = time.monotonic() + self.timeout
        while time.monotonic() < deadline:
            message = json.loads(self.ws.recv())
            if message.get("method") == event:
                return message
            if "method" in message:
                self.events.append(message)
        raise TimeoutError(event)

    def open(self, url: str) -> None:
        self.events.clear()
        self.call("Page.navigate", url=url)
        self.wait_for("Page.loadEventFired")
        self.call("Runtime.evaluate", expression="1", awaitPromise=True)  # let queued events arrive

    def evaluate(self, expression: str) -> Any:
        result = self.call("Runtime.evaluate", expression=expression, returnByValue=True, awaitPromise=True)
        if "exceptionDetails" in result:
            raise RuntimeError(result["exceptionDetails"])
        return result["result"].get("value")

    def problems(self) -> list[str]:
        """Console errors and warnings, uncaught exceptions and log errors seen since `open`."""
        found = []
        for event in self.events:
            params = event.get("params", {})
            if event["method"] == "Runtime.consoleAPICalled" and params.get("type") in ("error", "warning", "assert"):
                found.append(f"console.{params['type']}: {params.get('args')}")
            elif event["method"] == "Runtime.exceptionThrown":
                found.append(f"exception: {params.get('exceptionDetails')}")
            elif event["method"] == "Log.entryAdded" and params.get("entry", {}).get("level") in ("error", "warning"):
                entry = params["entry"]
                found.append(f"log {entry['level']}: {entry.get('text')} {entry.get('url', '')}")
        return found

    def requests(self) -> list[str]:
        return [e["params"]["request"]["url"] for e in self.events if e["method"] == "Network.requestWillBeSent"]

    def screenshot(self, path: Path, width: int = 1100) -> None:
        self.call("Emulation.setDeviceMetricsOverride", width=width, height=900, deviceScaleFactor=1, mobile=False)
        height = int(self.evaluate("document.documentElement.scrollHeight"))
        shot = self.call("Page.captureScreenshot", format="png", captureBeyondViewport=True,
                         clip={"x": 0, "y": 0, "width": width, "height": height, "scale": 1})
        path.write_bytes(base64.b64decode(shot["data"]))

    def pdf(self, width_in: float, height_in: float) -> bytes:
        answer = self.call("Page.printToPDF", paperWidth=width_in, paperHeight=height_in, printBackground=True,
                           preferCSSPageSize=False)
        return base64.b64decode(answer["data"])

    def close(self) -> None:
        ws = getattr(self, "ws", None)
        if ws is not None:
            try:
                ws.close()
            except Exception:
                pass
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(timeout=10)
        self.log.close()
        shutil.rmtree(self.profile, ignore_errors=True)
