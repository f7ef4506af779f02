"""A headless Chromium driven over the DevTools protocol, standard library only.

Just enough for the report's browser test: start Debian's ``chromium`` with a private
profile, open pages, evaluate script, send real mouse and key events, collect console
errors and take full-page screenshots. The websocket client speaks RFC 6455 text frames
(masked from us, unmasked from the browser, continuation frames joined).
"""

from __future__ import annotations

import base64
import json
import os
import shutil
import socket
import struct
import subprocess
import tempfile
import time
import urllib.request
from pathlib import Path
from typing import Any


def find_chromium() -> str | None:
    """The browser to use: $LOOPVET_CHROMIUM, else chromium (Debian) or chromium-browser."""
    named = os.environ.get("LOOPVET_CHROMIUM")
    if named:
        return named if os.path.exists(named) else shutil.which(named)
    return shutil.which("chromium") or shutil.which("chromium-browser")


class _Socket:
    def __init__(self, url: str, timeout: float):
        assert url.startswith("ws://")
        host_port, _, path = url[5:].partition("/")
        host, _, port = host_port.partition(":")
        self.sock = socket.create_connection((host, int(port)), timeout=timeout)
        key = base64.b64encode(os.urandom(16)).decode()
        self.sock.sendall((f"GET /{path} HTTP/1.1\r\nHost: {host_port}\r\nUpgrade: websocket\r\n"
                           f"Connection: Upgrade\r\nSec-WebSocket-Key: {key}\r\n"
                           "Sec-WebSocket-Version: 13\r\n\r\n").encode())
        head = b""
        while b"\r\n\r\n" not in head:
            chunk = self.sock.recv(4096)
            if not chunk:
                raise ConnectionError("the browser closed the connection")
            head += chunk
        status, _, rest = head.partition(b"\r\n\r\n")
        if b" 101 " not in status.split(b"\r\n", 1)[0]:
            raise ConnectionError(f"websocket upgrade refused: {status[:200]!r}")
        self.buf = bytearray(rest)

    def _exact(self, n: int) -> bytes:
        while len(self.buf) < n:
            chunk = self.sock.recv(max(65536, n - len(self.buf)))
            if not chunk:
                raise ConnectionError("the browser closed the connection")
            self.buf += chunk
        out = bytes(self.buf[:n])
        del self.buf[:n]
        return out

    def _frame(self, opcode: int, payload: bytes) -> None:
        n = len(payload)
        head = bytes([0x80 | opcode])
        if n < 126:
            head += bytes([0x80 | n])
        elif n < 65536:
            head += bytes([0x80 | 126]) + struct.pack(">H", n)
        else:
            head += bytes([0x80 | 127]) + struct.pack(">Q", n)
        mask = os.urandom(4)
        key = int.from_bytes((mask * (n // 4 + 1))[:n], "big") if n else 0
        body = (int.from_bytes(payload, "big") ^ key).to_bytes(n, "big") if n else b""
        self.sock.sendall(head + mask + body)

    def send(self, text: str) -> None:
        self._frame(0x1, text.encode("utf-8"))

    def recv(self) -> str:
        parts = []
        while True:
            b0, b1 = self._exact(2)
            n = b1 & 0x7F
            if n == 126:
                n = struct.unpack(">H", self._exact(2))[0]
            elif n == 127:
                n = struct.unpack(">Q", self._exact(8))[0]
            mask = self._exact(4) if b1 & 0x80 else b""
            data = self._exact(n)
            if mask:
                data = bytes(c ^ mask[i % 4] for i, c in enumerate(data))
            opcode = b0 & 0x0F
            if opcode == 0x9:
                self._frame(0xA, data)
                continue
            if opcode == 0x8:
                raise ConnectionError("the browser closed the websocket")
            if opcode in (0x0, 0x1, 0x2):
                parts.append(data)
                if b0 & 0x80:
                    return b"".join(parts).decode("utf-8")

    def close(self) -> None:
        self.sock.close()


class Browser:
    """One headless Chromium with one page; use as a context manager."""

    def __init__(self, exe: str, width: int = 1366, height: int = 900, timeout: float = 60.0):
        self.timeout = timeout
        self.width, self.height = width, height
        self.profile = tempfile.mkdtemp(prefix="loopvet-chromium-")
        self.proc = subprocess.Popen(
            [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
             "--remote-debugging-port=0", "--remote-allow-origins=*",
             f"--user-data-dir={self.profile}", "--no-first-run", "--no-default-browser-check",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             "--disable-extensions", "--hide-scrollbars", f"--window-size={width},{height}",
             "about:blank"],
            stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        self.events: list[dict[str, Any]] = []
        self._id = 0
        try:
            self.ws = _Socket(self._page_url(), timeout)
            for domain in ("Page", "Runtime", "Log"):
                self.call(f"{domain}.enable")
        except BaseException:
            self.close()
            raise

    def _page_url(self) -> str:
        port_file = Path(self.profile) / "DevToolsActivePort"
        deadline = time.monotonic() + self.timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"chromium exited with status {self.proc.returncode}")
            if port_file.exists() and port_file.read_text().strip():
                port = port_file.read_text().split()[0]
                with urllib.request.urlopen(f"http://127.0.0.1:{port}/json/list",
                                            timeout=10) as r:
                    pages = [t for t in json.load(r) if t.get("type") == "page"]
                if pages:
                    return str(pages[0]["webSocketDebuggerUrl"])
            time.sleep(0.1)
        raise TimeoutError("chromium did not open its DevTools port")

    def __enter__(self) -> Browser:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        if getattr(self, "ws", None) is not None:
            self.ws.close()
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        shutil.rmtree(self.profile, ignore_errors=True)

    def call(self, method: str, **params: Any) -> dict[str, Any]:
        self._id += 1
        me = self._id
        self.ws.send(json.dumps({"id": me, "method": method, "params": params}))
        deadline = time.monotonic() + self.timeout
        while time.monotonic() < deadline:
            msg = json.loads(self.ws.recv())
            if msg.get("id") == me:
                if "error" in msg:
                    raise RuntimeError(f"{method}: {msg['error']}")
                return dict(msg.get("result", {}))
            if "method" in msg:
                self.events.append(msg)
        raise TimeoutError(method)

    def wait_event(self, method: str, since: int = 0) -> dict[str, Any]:
        deadline = time.monotonic() + self.timeout
        while time.monotonic() < deadline:
            for e in self.events[since:]:
                if e["method"] == method:
                    return e
            msg = json.loads(self.ws.recv())
            if "method" in msg:
                self.events.append(msg)
        raise TimeoutError(method)

    def open(self, url: str) -> None:
        self.call("Emulation.setDeviceMetricsOverride", width=self.width, height=self.height,
                  deviceScaleFactor=1, mobile=False)
        mark = len(self.events)
        self.call("Page.navigate", url=url)
        self.wait_event("Page.loadEventFired", since=mark)

    def js(self, expression: str) -> Any:
        r = self.call("Runtime.evaluate", expression=expression, returnByValue=True,
                      awaitPromise=True)
        if "exceptionDetails" in r:
            raise RuntimeError(f"script failed: {r['exceptionDetails']}")
        return r["result"].get("value")

    def click(self, selector: str) -> None:
        """A real mouse click in the middle of the element."""
        box = self.js(f"(() => {{ const e = document.querySelector({json.dumps(selector)});"
                      "e.scrollIntoView({block: 'center'}); const r = e.getBoundingClientRect();"
                      "return [r.x + r.width / 2, r.y + r.height / 2]; })()")
        for kind in ("mouseMoved", "mousePressed", "mouseReleased"):
            self.call("Input.dispatchMouseEvent", type=kind, x=box[0], y=box[1],
                      button="left" if kind != "mouseMoved" else "none", clickCount=1)

    def type_text(self, selector: str, text: str) -> None:
        self.click(selector)
        self.call("Input.insertText", text=text)

    def errors(self) -> list[str]:
        """Console errors, uncaught exceptions and browser log errors seen so far."""
        out = []
        for e in self.events:
            p = e.get("params", {})
            if e["method"] == "Runtime.consoleAPICalled" and p.get("type") in ("error",
                                                                              "assert"):
                out.append(" ".join(str(a.get("value", a.get("description", "")))
                                    for a in p.get("args", [])))
            elif e["method"] == "Runtime.exceptionThrown":
                out.append(str(p.get("exceptionDetails", {}).get("text")))
            elif e["method"] == "Log.entryAdded" and p.get("entry", {}).get("level") == "error":
                out.append(str(p["entry"].get("text")))
        return out

    def screenshot(self, path: Path) -> None:
        """A full-page PNG at the browser's width."""
        height = int(self.js("Math.ceil(document.documentElement.scrollHeight)"))
        self.call("Emulation.setDeviceMetricsOverride", width=self.width,
                  height=max(height, 1), deviceScaleFactor=1, mobile=False)
        shot = self.call("Page.captureScreenshot", format="png")
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(base64.b64decode(shot["data"]))
        self.call("Emulation.setDeviceMetricsOverride", width=self.width, height=self.height,
                  deviceScaleFactor=1, mobile=False)
