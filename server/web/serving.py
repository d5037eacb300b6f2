"""How ``python -m server serve`` runs uvicorn: time limits for slow clients.

uvicorn (0.55) closes an idle keep-alive connection after ``timeout_keep_alive``
seconds, but has no limit on how long a client may take to send a request's
headers: a client that opens connections and sends a header line now and then
holds each one for ever.  ``HeaderTimeoutProtocol`` closes a connection whose
request headers are not complete within ``HEADER_TIMEOUT`` seconds of its first
byte (or of the connection, for one that sends nothing).  The request body is not
covered: a slow upload is bounded by the upload size limit, and a reverse proxy's
``client_body_timeout`` bounds it in time (docs/security.md).
"""

from __future__ import annotations

import asyncio
from typing import Any

from uvicorn.protocols.http.h11_impl import H11Protocol

#: Seconds a client has to send complete request headers.
HEADER_TIMEOUT = 10.0
#: Seconds an idle keep-alive connection is kept open after a response.
KEEP_ALIVE_TIMEOUT = 5
#: Largest request head (request line and headers) read, in bytes.
MAX_HEADER_BYTES = 16 * 1024


class HeaderTimeoutProtocol(H11Protocol):
    """uvicorn's h11 protocol, closing connections whose headers arrive too slowly."""

    header_timeout: float = HEADER_TIMEOUT

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self._header_timer: asyncio.TimerHandle | None = None

    def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
        super().connection_made(transport)
        self._start_header_timer()

    def data_received(self, data: bytes) -> None:
        if self._between_requests():
            self._start_header_timer()
        super().data_received(data)
        if not self._between_requests():
            self._stop_header_timer()  # the headers are complete: a request is being served

    def connection_lost(self, exc: Exception | None) -> None:
        self._stop_header_timer()
        super().connection_lost(exc)

    def _between_requests(self) -> bool:
        return self.cycle is None or self.cycle.response_complete

    def _start_header_timer(self) -> None:
        if self._header_timer is None:
            self._header_timer = self.loop.call_later(self.header_timeout, self._headers_too_slow)

    def _stop_header_timer(self) -> None:
        if self._header_timer is not None:
            self._header_timer.cancel()
            self._header_timer = None

    def _headers_too_slow(self) -> None:
        self._header_timer = None
        if self._between_requests() and not self.transport.is_closing():
            self.transport.close()


def uvicorn_options(header_timeout: float = HEADER_TIMEOUT) -> dict[str, Any]:
    """The keyword arguments ``serve`` gives ``uvicorn.run`` for slow or oversized clients."""
    protocol = type("ServeProtocol", (HeaderTimeoutProtocol,), {"header_timeout": header_timeout})
    return {
        "http": protocol,
        "timeout_keep_alive": KEEP_ALIVE_TIMEOUT,
        "h11_max_incomplete_event_size": MAX_HEADER_BYTES,
    }
