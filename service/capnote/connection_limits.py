"""Limits on what one connection may hold, inside uvicorn's httptools protocol.

httptools (llhttp) has no limit of its own on a request's head: it gathers a header of any
size in memory before it hands it over, and uvicorn waits for a head as long as a client
likes (its keep-alive timer starts only after a first answer). A tester's 60 MiB header was
answered 200, six unfinished 50 MiB headers raised the process from 231 to 553 MiB, and
500 silent sockets were held for good. This protocol keeps httptools' speed (the counting
is a few additions per read and per header) and adds:

- the head's size: bytes read since the request began, counted before the parser keeps
  them, so memory never follows a header; over the limit, 431 and the connection closed;
- the number of header fields: over the limit, 431;
- a time limit for the head, armed when a connection opens and when a new request's first
  bytes arrive: a connection that sends nothing, or trickles its head, is closed (408 when
  part of a head came);
- a time limit for a body, armed when a head has arrived and its body has not (most come
  whole in the head's read): a client that trickles a body is answered 408 and closed;
  the time does not run out while capnote itself holds the body back (flow control);
- connections per process: over the limit, a new one is answered 503 with Retry-After and
  closed before anything is read.

The answers are OperationOutcomes with the security headers, like every other answer.
"""

from __future__ import annotations

import asyncio
import logging
from dataclasses import dataclass
from typing import Any

import httptools
import orjson
from uvicorn.config import Config
from uvicorn.protocols.http.httptools_impl import STATUS_LINE, HttpToolsProtocol
from uvicorn.server import ServerState

from capnote.api.headers import SECURITY_HEADERS
from capnote.fhir.outcome import message_outcome

log = logging.getLogger("capnote.connections")


@dataclass(frozen=True)
class ConnectionLimits:
    """What one connection may hold, and how many one process keeps."""

    max_head_bytes: int = 32_768
    max_headers: int = 100
    head_timeout_s: float = 10.0
    body_timeout_s: float = 30.0
    max_connections: int = 1_000


class _HeadLimitError(Exception):
    """Raised from a parser callback: the head broke a limit (the parser stops there)."""

    def __init__(self, diagnostics: str) -> None:
        super().__init__(diagnostics)
        self.diagnostics = diagnostics


def _answer(status: int, diagnostics: str, code: str, extra: bytes = b"") -> bytes:
    """A whole HTTP answer with an OperationOutcome body that closes the connection."""
    issue_type = "too-costly" if status in (431, 503) else "timeout" if status == 408 else "invalid"
    body = orjson.dumps(message_outcome("error", issue_type, diagnostics, code))
    head = [STATUS_LINE[status], b"content-type: application/fhir+json\r\n"]
    head += [name + b": " + value + b"\r\n" for name, value in SECURITY_HEADERS]
    head += [extra, b"content-length: %d\r\nconnection: close\r\n\r\n" % len(body)]
    return b"".join(head) + body


class BoundedHttpToolsProtocol(HttpToolsProtocol):
    """uvicorn's httptools protocol with the head's size, field count and time bounded,
    and the connections of the process counted."""

    def __init__(
        self,
        config: Config,
        server_state: ServerState,
        app_state: dict[str, Any],
        _loop: asyncio.AbstractEventLoop | None = None,
    ) -> None:
        super().__init__(config, server_state, app_state, _loop)
        self.limits: ConnectionLimits = getattr(config, "connection_limits", ConnectionLimits())
        self._in_head = True
        self._head_bytes = 0
        self._head_timer: asyncio.TimerHandle | None = None
        self._body_timer: asyncio.TimerHandle | None = None

    def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
        super().connection_made(transport)
        if len(self.connections) > self.limits.max_connections:
            log.warning("connection refused: %d open", len(self.connections) - 1)
            self._refuse(
                503,
                f"the server holds {self.limits.max_connections} connections, its limit; "
                "try again shortly",
                "too-many-connections",
                b"retry-after: 1\r\n",
            )
            return
        self._arm_head_timer()

    def connection_lost(self, exc: Exception | None) -> None:
        self._cancel_head_timer()
        self._cancel_body_timer()
        super().connection_lost(exc)

    def data_received(self, data: bytes) -> None:
        self._unset_keepalive_if_required()
        if self._in_head:
            # Counted before the parser sees it: the parser keeps an unfinished header whole.
            self._head_bytes += len(data)
        try:
            self.parser.feed_data(data)
        except httptools.HttpParserCallbackError as exc:
            refused = exc.__context__
            if isinstance(refused, _HeadLimitError):
                self._refuse(431, refused.diagnostics, "request-head-too-large")
            else:
                self.send_400_response("Invalid HTTP request received.")
            return
        except httptools.HttpParserError:
            self.logger.warning("Invalid HTTP request received.")
            self.send_400_response("Invalid HTTP request received.")
            return
        except httptools.HttpParserUpgrade:
            if self._should_upgrade():
                self.handle_websocket_upgrade()
            else:
                self._unsupported_upgrade_warning()
            return
        if not self._in_head:
            if self._body_timer is None and self.cycle is not None and self.cycle.more_body:
                # A body left unfinished by the head's read: its time runs from here.
                self._body_timer = self.loop.call_later(
                    self.limits.body_timeout_s, self._body_timed_out
                )
        elif self._head_bytes:
            if self._head_bytes > self.limits.max_head_bytes:
                self._refuse(431, self._too_large(), "request-head-too-large")
            elif self._head_timer is None:
                # A head left unfinished by this read (most arrive whole in one): its time
                # runs from here.
                self._arm_head_timer()

    def _too_large(self) -> str:
        return (
            f"the request line and headers exceed {self.limits.max_head_bytes} bytes; "
            f"allowed: at most {self.limits.max_head_bytes} bytes"
        )

    def send_400_response(self, msg: str) -> None:
        """uvicorn's 400 for a head the parser refuses, as an OperationOutcome."""
        self._refuse(400, f"{msg} (the request line or a header is not HTTP/1.1)", "bad-http")

    # Parser callbacks: a few comparisons per request; the head's exact size is summed only
    # when the read that finished it was large.
    def on_header(self, name: bytes, value: bytes) -> None:
        if len(self.headers) >= self.limits.max_headers:
            raise _HeadLimitError(
                f"the request has more than {self.limits.max_headers} header fields; "
                f"allowed: at most {self.limits.max_headers}"
            )
        # uvicorn's own on_header, written out: this runs for every field of every request.
        name = name.lower()
        value = value.rstrip(b" \t")  # RFC 9110 section 5.5: no trailing whitespace
        if name == b"expect" and value.lower() == b"100-continue":
            self.expect_100_continue = True
        self.headers.append((name, value))

    def on_headers_complete(self) -> None:
        self._in_head = False
        self._cancel_head_timer()
        # _head_bytes counts whole reads, so it may hold some of the body as well: over the
        # limit, the head itself is measured.
        if self._head_bytes > self.limits.max_head_bytes and self._head_size() > (
            self.limits.max_head_bytes
        ):
            raise _HeadLimitError(self._too_large())
        super().on_headers_complete()

    def _head_size(self) -> int:
        """The request line and header fields as sent, give or take their whitespace."""
        return len(self.url) + 16 + sum(len(n) + len(v) + 4 for n, v in self.headers)

    def on_message_complete(self) -> None:
        self._cancel_body_timer()
        super().on_message_complete()
        # What follows on this connection is the next request's head.
        self._in_head = True
        self._head_bytes = 0

    # The head's timer.
    def _arm_head_timer(self) -> None:
        self._cancel_head_timer()
        self._head_timer = self.loop.call_later(self.limits.head_timeout_s, self._head_timed_out)

    def _cancel_head_timer(self) -> None:
        if self._head_timer is not None:
            self._head_timer.cancel()
            self._head_timer = None

    def _head_timed_out(self) -> None:
        self._head_timer = None
        if self.transport.is_closing():
            return
        if self.cycle is not None and not self.cycle.response_complete:
            # An answer is still being sent (the head that timed out is pipelined after
            # it): close once it is out.
            self.cycle.keep_alive = False
            return
        if self._head_bytes == 0:
            self.transport.close()
            return
        self._refuse(
            408,
            f"the request's head did not arrive within {self.limits.head_timeout_s:g} s; "
            f"allowed: at most {self.limits.head_timeout_s:g} s",
            "request-head-timeout",
        )

    # The body's timer.
    def _cancel_body_timer(self) -> None:
        if self._body_timer is not None:
            self._body_timer.cancel()
            self._body_timer = None

    def _body_timed_out(self) -> None:
        self._body_timer = None
        if self.transport.is_closing():
            return
        if self.flow.read_paused:  # capnote is not reading: not the client's delay
            self._body_timer = self.loop.call_later(
                self.limits.body_timeout_s, self._body_timed_out
            )
            return
        if self.cycle is not None and self.cycle.response_started:
            self.transport.close()
            return
        self._refuse(
            408,
            f"the request's body did not arrive within {self.limits.body_timeout_s:g} s; "
            f"allowed: at most {self.limits.body_timeout_s:g} s",
            "request-body-timeout",
        )

    def _refuse(self, status: int, diagnostics: str, code: str, extra: bytes = b"") -> None:
        self._cancel_head_timer()
        if self.transport.is_closing():
            return
        self.transport.write(_answer(status, diagnostics, code, extra))
        self.transport.close()
