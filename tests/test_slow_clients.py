"""Slow clients: a connection that never finishes its request headers is closed."""

from __future__ import annotations

import socket
import threading
import time

import pytest
import uvicorn

from server.web import create_app
from server.web.serving import uvicorn_options

WAIT = 20.0  # generous: only reached when the server never closes the connection


@pytest.fixture
def server(tmp_path):
    """The app served by uvicorn as ``serve`` configures it, with a half-second header limit."""
    config = uvicorn.Config(
        create_app(tmp_path),
        host="127.0.0.1",
        port=0,
        log_level="warning",
        **uvicorn_options(header_timeout=0.5),
    )
    running = uvicorn.Server(config)
    thread = threading.Thread(target=running.run, daemon=True)
    thread.start()
    deadline = time.monotonic() + WAIT
    while not running.started:
        assert time.monotonic() < deadline, "the server did not start"
        time.sleep(0.02)
    port = running.servers[0].sockets[0].getsockname()[1]
    yield port
    running.should_exit = True
    thread.join(WAIT)


def read_until_closed(sock: socket.socket) -> bytes:
    """Everything the server sends until it closes; fails if it never does."""
    sock.settimeout(WAIT)
    received = b""
    while True:
        try:
            chunk = sock.recv(65536)
        except TimeoutError:
            pytest.fail("the server kept the slow connection open")
        if not chunk:
            return received
        received += chunk


def test_headers_that_never_end_are_cut_off(server):
    with socket.create_connection(("127.0.0.1", server)) as sock:
        sock.sendall(b"GET / HTTP/1.1\r\nHost: 127.0.0.1\r\n")  # no blank line: never complete
        assert read_until_closed(sock) == b""


def test_a_silent_connection_is_cut_off(server):
    with socket.create_connection(("127.0.0.1", server)) as sock:
        assert read_until_closed(sock) == b""


def test_a_slow_second_request_on_a_kept_alive_connection_is_cut_off(server):
    with socket.create_connection(("127.0.0.1", server)) as sock:
        sock.sendall(b"GET / HTTP/1.1\r\nHost: 127.0.0.1\r\n\r\n")
        sock.settimeout(WAIT)
        first = b""
        while b"</html>" not in first:
            first += sock.recv(65536)
        assert first.startswith(b"HTTP/1.1 200")
        sock.sendall(b"GET /projects HTTP/1.1\r\n")  # the second request stalls
        assert b"HTTP/1.1" not in read_until_closed(sock)


def test_a_prompt_request_is_answered(server):
    with socket.create_connection(("127.0.0.1", server)) as sock:
        sock.sendall(b"GET / HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n")
        assert read_until_closed(sock).startswith(b"HTTP/1.1 200")
