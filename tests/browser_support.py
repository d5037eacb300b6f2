"""Fixtures for the browser tests: uvicorn on loopback and Debian's chromium through Playwright.

Loaded by ``tests/conftest.py``.  Each test module gets its own server and
data folder (module scope).  The system chromium is driven, never a
downloaded browser; tests skip only when it is not installed (CI installs it).
"""

from __future__ import annotations

import shutil
import socket
import threading
import time
from collections.abc import Iterator

import pytest

CHROMIUM = shutil.which("chromium") or shutil.which("chromium", path="/usr/bin")
CHROMIUM_ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]


def free_port() -> int:
    """A TCP port on 127.0.0.1 that is free right now."""
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def browser_problems(page) -> list[str]:
    """Console errors and warnings of a page (CSP violations are reported there)."""
    return [
        m
        for m in page.console_messages
        if m.startswith(("error", "warning", "pageerror")) or "Content Security Policy" in m
    ]


@pytest.fixture(scope="module")
def base_url(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """The service under uvicorn on 127.0.0.1 with a fresh data folder for this test module."""
    import uvicorn

    from server.web import create_app

    port = free_port()
    app = create_app(tmp_path_factory.mktemp("browser-data"))
    config = uvicorn.Config(
        app, host="127.0.0.1", port=port, log_level="warning", ws="none", lifespan="off"
    )
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.monotonic() + 20
    while not server.started:
        if time.monotonic() > deadline or not thread.is_alive():
            pytest.fail("uvicorn did not start")
        time.sleep(0.05)
    yield f"http://127.0.0.1:{port}"
    server.should_exit = True
    thread.join(timeout=10)


@pytest.fixture(scope="module")
def browser():
    """Headless Debian chromium."""
    if CHROMIUM is None:
        pytest.skip("chromium is not installed (apt-get install chromium); CI installs it")
    from playwright.sync_api import sync_playwright

    with sync_playwright() as playwright:
        browser = playwright.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        yield browser
        browser.close()


@pytest.fixture
def page(browser, base_url):
    """A fresh browser context and page that records its console messages."""
    context = browser.new_context(accept_downloads=True, viewport={"width": 1366, "height": 900})
    page = context.new_page()
    page.console_messages = []  # type: ignore[attr-defined]
    page.on("console", lambda m: page.console_messages.append(f"{m.type}: {m.text}"))
    page.on("pageerror", lambda e: page.console_messages.append(f"pageerror: {e}"))
    yield page
    context.close()
