"""Render a page in headless Chromium through chromedriver's WebDriver HTTP interface.

Plain standard-library HTTP (W3C WebDriver: new session, navigate,
execute script, screenshot, delete session); no browser-automation
package is needed. Used by the report's browser test and to take the
screenshot in ``docs/``.
"""

from __future__ import annotations

import base64
import json
import shutil
import socket
import subprocess
import time
import urllib.request
from pathlib import Path

__all__ = ["browser_paths", "render"]

IMAGES_SCRIPT = ("return Array.from(document.images).map(function (i) { return {file: i.getAttribute('data-file'), "
                 "complete: i.complete, width: i.naturalWidth, height: i.naturalHeight}; });")


def browser_paths() -> tuple[str | None, str | None]:
    """Paths of the chromium and chromedriver programs, or None when absent."""
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    return browser, shutil.which("chromedriver")


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _call(base: str, method: str, path: str, body: dict | None = None, timeout: float = 60.0) -> dict:
    data = None if body is None else json.dumps(body).encode()
    req = urllib.request.Request(base + path, data=data, method=method, headers={"Content-Type": "application/json"})
    with urllib.request.urlopen(req, timeout=timeout) as resp:
        return json.loads(resp.read().decode())


def render(page: Path, screenshot: Path, width: int = 1280, height: int = 1800) -> list[dict]:
    """Open ``page`` in headless Chromium, write a screenshot, and report each image.

    Parameters
    ----------
    page : pathlib.Path
        The HTML file.
    screenshot : pathlib.Path
        PNG written with the browser window's content.
    width, height : int
        Window size, CSS pixels.

    Returns
    -------
    list of dict
        For every ``<img>``: ``file`` (its ``data-file`` attribute),
        ``complete``, ``width``, ``height`` (decoded size, pixels; 0 for an
        image that did not load).
    """
    browser, driver = browser_paths()
    if not (browser and driver):
        raise FileNotFoundError("chromium or chromedriver not found")
    port = _free_port()
    proc = subprocess.Popen([driver, f"--port={port}"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    base = f"http://127.0.0.1:{port}"
    try:
        for _ in range(100):
            try:
                if _call(base, "GET", "/status", timeout=2)["value"].get("ready"):
                    break
            except OSError:
                pass
            time.sleep(0.1)
        caps = {"capabilities": {"alwaysMatch": {"goog:chromeOptions": {
            "binary": browser,
            "args": ["--headless=new", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
                     f"--window-size={width},{height}", "--hide-scrollbars"]}}}}
        session = _call(base, "POST", "/session", caps)["value"]["sessionId"]
        try:
            _call(base, "POST", f"/session/{session}/url", {"url": Path(page).resolve().as_uri()})
            images = _call(base, "POST", f"/session/{session}/execute/sync", {"script": IMAGES_SCRIPT, "args": []})["value"]
            png = _call(base, "GET", f"/session/{session}/screenshot")["value"]
            Path(screenshot).write_bytes(base64.b64decode(png))
        finally:
            _call(base, "DELETE", f"/session/{session}")
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
    return images
