"""Running the ASGI app under uvicorn: one process, or several on one port.

Several workers each listen on a socket of their own bound to the same port with
SO_REUSEPORT, so the kernel spreads new connections across them. With uvicorn's own
supervisor they share one listening socket, and each worker's event loop accepts every
connection waiting when it wakes: a client that opens its keep-alive connections at once
(an EHR integration engine's connection pool, a load generator) gets them all on one worker
while the others idle (measured: one worker at 83 % of a core, the other at 20 %).
"""

from __future__ import annotations

import asyncio
import importlib.util
import logging
import multiprocessing
import signal
import socket
import threading
from collections.abc import Sequence
from types import FrameType

import uvicorn
from uvicorn.config import STARTUP_FAILURE
from uvicorn.supervisors import Multiprocess

from capnote.connection_limits import BoundedHttpToolsProtocol, ConnectionLimits
from capnote.logs import LogFormat, LogLevel, logging_config

log = logging.getLogger("uvicorn.error")

# uvloop is not built for Windows: asyncio's own loop serves there.
_UVLOOP = importlib.util.find_spec("uvloop") is not None


class TcpConfig(uvicorn.Config):
    """uvicorn's Config whose socket says it is TCP, so connections get TCP_NODELAY.

    uvicorn binds the socket itself without a protocol number; asyncio then never sets
    TCP_NODELAY, and each keep-alive answer waits about 40 ms for the client's delayed ACK
    (measured: 18 requests/s on one connection instead of 40-74).
    """

    # Read by capnote.connection_limits.BoundedHttpToolsProtocol in every connection.
    connection_limits = ConnectionLimits()

    def bind_socket(self) -> socket.socket:
        """The socket uvicorn binds, re-wrapped with its real protocol number."""
        sock = super().bind_socket()
        if sock.family not in (socket.AF_INET, socket.AF_INET6):
            return sock
        return socket.socket(sock.family, sock.type, socket.IPPROTO_TCP, fileno=sock.detach())


def _port_socket(host: str, port: int) -> socket.socket:
    """A TCP socket bound to host:port with SO_REUSEPORT, not yet listening."""
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    sock = socket.socket(family, socket.SOCK_STREAM, socket.IPPROTO_TCP)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEPORT, 1)
    sock.bind((host, port))
    return sock


def _worker(config: TcpConfig) -> None:
    """One worker process: its own listening socket on the shared port, then serve."""
    config.configure_logging()  # a spawned process starts with logging unconfigured
    sock = _port_socket(config.host, config.port)
    uvicorn.Server(config).run(sockets=[sock])


class Workers:
    """Start config.workers processes, restart one that dies, stop them all on SIGINT or
    SIGTERM. The parent holds the port (bound, never listening, so it takes no
    connections) so that a worker's restart cannot lose it to another program."""

    def __init__(self, config: TcpConfig) -> None:
        self.config = config
        self.stop = threading.Event()
        self._context = multiprocessing.get_context("spawn")

    def _start(self) -> multiprocessing.process.BaseProcess:
        process = self._context.Process(target=_worker, args=(self.config,), daemon=False)
        process.start()
        return process

    def _on_signal(self, _signum: int, _frame: FrameType | None) -> None:
        self.stop.set()

    def run(self) -> None:
        """Serve until a signal says stop."""
        holder = _port_socket(self.config.host, self.config.port)
        # Port 0 asks for any free port: every worker must take the same one.
        self.config.port = holder.getsockname()[1]
        for sig in (signal.SIGINT, signal.SIGTERM):
            signal.signal(sig, self._on_signal)
        processes = [self._start() for _ in range(self.config.workers)]
        log.info("capnote serving on %s:%d with %d workers", *self.address(), len(processes))
        try:
            while not self.stop.wait(0.5):
                for i, process in enumerate(processes):
                    if process.is_alive():
                        continue
                    if process.exitcode == STARTUP_FAILURE:  # it would fail again: give up
                        log.error("a worker failed to start; stopping")
                        self.stop.set()
                        break
                    log.warning("worker %s ended (exit %s); starting another", i, process.exitcode)
                    processes[i] = self._start()
        finally:
            for process in processes:
                if process.is_alive():
                    process.terminate()  # SIGTERM: uvicorn finishes requests in flight
            for process in processes:
                process.join(timeout=30)
                if process.is_alive():
                    process.kill()
                    process.join()
            holder.close()

    def address(self) -> tuple[str, int]:
        """Host and port served."""
        return self.config.host, self.config.port


def run(
    factory: str,
    host: str,
    port: int,
    workers: int,
    limits: ConnectionLimits | None = None,
    idle_timeout_s: float = 5.0,
    trusted_proxies: Sequence[str] = ("127.0.0.1", "::1"),
    protocol: type[asyncio.Protocol] | str = BoundedHttpToolsProtocol,
    log_level: LogLevel = "info",
    log_format: LogFormat = "text",
) -> None:
    """Serve the app factory until terminated, each connection held to limits (protocol:
    uvicorn's own "httptools" only for bench/protocol_cost.py's comparison)."""
    config = TcpConfig(
        factory,
        factory=True,
        host=host,
        port=port,
        workers=workers,
        log_level=log_level,
        log_config=logging_config(log_level, log_format),
        access_log=False,
        # httptools parses HTTP in C (the bounded protocol is uvicorn's with the head's
        # size, field count and time limited); uvloop runs the loop in C where it is
        # available. "auto" would quietly fall back to h11 and asyncio without them.
        http=protocol,
        loop="uvloop" if _UVLOOP else "asyncio",
        # A keep-alive connection with no new request is closed after this (uvicorn's
        # timer, armed after each answer; the head timer covers a fresh connection).
        timeout_keep_alive=idle_timeout_s,  # type: ignore[arg-type]
        # X-Forwarded-For and -Proto are believed only from these peers (the TLS proxy).
        proxy_headers=True,
        forwarded_allow_ips=list(trusted_proxies),
    )
    config.connection_limits = limits or ConnectionLimits()
    if config.workers == 1:
        uvicorn.Server(config).run()
    elif hasattr(socket, "SO_REUSEPORT"):
        Workers(config).run()
    else:  # no SO_REUSEPORT (not Linux or BSD): uvicorn's supervisor, one shared socket
        Multiprocess(config, sockets=[config.bind_socket()]).run()
