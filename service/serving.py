"""Running the ASGI app under uvicorn, one process or several sharing one socket."""

from __future__ import annotations

import socket

import uvicorn
from uvicorn.supervisors import Multiprocess


class TcpConfig(uvicorn.Config):
    """uvicorn's Config whose shared socket says it is TCP, so connections get TCP_NODELAY.

    With several workers uvicorn binds the socket itself without a protocol number; asyncio
    then never sets TCP_NODELAY, and each keep-alive answer waits about 40 ms for the
    client's delayed ACK (measured: 18 requests/s on one connection instead of 40-74).
    """

    def bind_socket(self) -> socket.socket:
        """The socket uvicorn binds, re-wrapped with its real protocol number."""
        sock = super().bind_socket()
        if sock.family not in (socket.AF_INET, socket.AF_INET6):
            return sock
        return socket.socket(sock.family, sock.type, socket.IPPROTO_TCP, fileno=sock.detach())


def run(factory: str, host: str, port: int, workers: int) -> None:
    """Serve the app factory until terminated."""
    config = TcpConfig(
        factory,
        factory=True,
        host=host,
        port=port,
        workers=workers,
        log_level="info",
        access_log=False,
    )
    if config.workers > 1:
        Multiprocess(config, sockets=[config.bind_socket()]).run()
    else:
        uvicorn.Server(config).run()
