"""A small Chrome DevTools Protocol client: starts Debian's headless Chromium and drives one page.

Only what the browser tests need: navigate, evaluate JavaScript, wait for a condition,
take a screenshot, and collect JavaScript exceptions and console errors. The protocol
runs over a WebSocket (aiohttp's client); Chromium is started with a fresh profile and
everything that would reach out to the internet switched off.
"""

from __future__ import annotations

import asyncio
import base64
import contextlib
import itertools
import json
import shutil
import subprocess
import tempfile
import time
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import aiohttp

CHROMIUM = "/usr/bin/chromium"
FLAGS = (
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
    "--disable-default-apps", "--disable-extensions", "--no-default-browser-check",
    "--remote-debugging-address=127.0.0.1", "--remote-debugging-port=0",
)


class BrowserError(RuntimeError):
    pass


class Page:
    def __init__(self, ws: aiohttp.ClientWebSocketResponse) -> None:
        self.ws = ws
        self._ids = itertools.count(1)
        self._waiting: dict[int, asyncio.Future[dict[str, Any]]] = {}
        self.events: list[dict[str, Any]] = []
        self._reader = asyncio.create_task(self._read())

    async def _read(self) -> None:
        async for msg in self.ws:
            if msg.type != aiohttp.WSMsgType.TEXT:
                continue
            data = json.loads(msg.data)
            fut = self._waiting.pop(data.get("id", -1), None)
            if fut is not None and not fut.done():
                fut.set_result(data)
            elif "method" in data:
                self.events.append(data)

    async def send(self, method: str, params: dict[str, Any] | None = None, timeout_s: float = 30.0) -> dict[str, Any]:
        msg_id = next(self._ids)
        fut: asyncio.Future[dict[str, Any]] = asyncio.get_running_loop().create_future()
        self._waiting[msg_id] = fut
        await self.ws.send_str(json.dumps({"id": msg_id, "method": method, "params": params or {}}))
        reply = await asyncio.wait_for(fut, timeout_s)
        if "error" in reply:
            raise BrowserError(f"{method}: {reply['error']}")
        return reply.get("result", {})

    async def evaluate(self, expression: str, timeout_s: float = 30.0) -> Any:
        result = await self.send("Runtime.evaluate", {
            "expression": expression, "awaitPromise": True, "returnByValue": True,
        }, timeout_s=timeout_s)
        if "exceptionDetails" in result:
            raise BrowserError(f"{expression[:80]!r} threw: {result['exceptionDetails'].get('text')} "
                               f"{result['exceptionDetails'].get('exception', {}).get('description', '')}")
        return result["result"].get("value")

    async def wait_for(self, expression: str, timeout_s: float = 30.0, interval_s: float = 0.1) -> Any:
        deadline = time.monotonic() + timeout_s
        last: Any = None
        while time.monotonic() < deadline:
            last = await self.evaluate(expression)
            if last:
                return last
            await asyncio.sleep(interval_s)
        raise BrowserError(f"timed out after {timeout_s} s waiting for {expression!r} (last value {last!r})")

    async def navigate(self, url: str) -> None:
        await self.send("Page.navigate", {"url": url})
        await self.wait_for("document.readyState === 'complete'")

    async def screenshot(self, path: Path) -> Path:
        shot = await self.send("Page.captureScreenshot", {"format": "png", "captureBeyondViewport": True})
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(base64.b64decode(shot["data"]))
        return path

    def errors(self) -> list[str]:
        out = []
        for ev in self.events:
            if ev["method"] == "Runtime.exceptionThrown":
                d = ev["params"]["exceptionDetails"]
                out.append(f"exception: {d.get('text')} {d.get('exception', {}).get('description', '')}")
            elif ev["method"] == "Log.entryAdded" and ev["params"]["entry"]["level"] == "error":
                e = ev["params"]["entry"]
                out.append(f"console: {e.get('text')} ({e.get('url', '')})")
            elif ev["method"] == "Runtime.consoleAPICalled" and ev["params"]["type"] == "error":
                out.append(f"console.error: {ev['params']['args']}")
        return out

    async def close(self) -> None:
        self._reader.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await self._reader
        await self.ws.close()


@contextlib.asynccontextmanager
async def chromium(width: int = 1400, height: int = 1800) -> AsyncIterator[Page]:
    """Headless Chromium with one page of ``width`` x ``height`` CSS px."""
    exe = shutil.which("chromium") or CHROMIUM
    if not Path(exe).exists():
        raise BrowserError("Debian's chromium is needed for the browser tests (apt-get install chromium; see .ci/run)")
    profile = Path(tempfile.mkdtemp(prefix="phasewatch-chromium-"))
    proc = subprocess.Popen(
        [exe, *FLAGS, f"--user-data-dir={profile}", f"--window-size={width},{height}", "about:blank"],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )
    try:
        port_file = profile / "DevToolsActivePort"
        deadline = time.monotonic() + 30
        while not (port_file.exists() and port_file.read_text().count("\n") >= 1):
            if proc.poll() is not None or time.monotonic() > deadline:
                raise BrowserError("chromium did not start its DevTools endpoint")
            await asyncio.sleep(0.05)
        port = int(port_file.read_text().splitlines()[0])
        async with aiohttp.ClientSession() as http:
            async with http.get(f"http://127.0.0.1:{port}/json/list") as r:
                targets = await r.json()
            page_target = next(t for t in targets if t["type"] == "page")
            ws = await http.ws_connect(page_target["webSocketDebuggerUrl"], max_msg_size=64 * 1024 * 1024)
            page = Page(ws)
            try:
                for domain in ("Page", "Runtime", "Log"):
                    await page.send(f"{domain}.enable")
                await page.send("Emulation.setDeviceMetricsOverride", {
                    "width": width, "height": height, "deviceScaleFactor": 1, "mobile": False})
                yield page
            finally:
                await page.close()
    finally:
        proc.terminate()
        try:
            proc.wait(10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(5)
        shutil.rmtree(profile, ignore_errors=True)
