"""Serve an ASGI app factory with uvicorn as `capnote serve` does, for every app of the bench.

    python bench/serve_app.py MODULE:FACTORY --host 127.0.0.1 --port 8000 --workers 2

The same uvicorn settings as `capnote serve` (factory, workers, info log, no access log), so
that capnote, the ceiling and the obvious app differ only in the app. One difference, on
purpose: with more than one worker uvicorn binds the shared socket without a protocol
number, asyncio then never sets TCP_NODELAY on its connections, and every keep-alive answer
whose head and body go out as two writes waits ~40 ms for the client's delayed ACK. Here the
socket carries IPPROTO_TCP, so two workers are measured for their work, not for that stall
(bench/run.py also measures `capnote serve --workers 2` as shipped, to show it).
"""

from __future__ import annotations

import argparse

import uvicorn
from uvicorn.supervisors import Multiprocess

from service.serving import TcpConfig


def main() -> None:
    """Parse the command line and serve until terminated."""
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("factory")
    parser.add_argument("--host", default="127.0.0.1")
    parser.add_argument("--port", type=int, default=8000)
    parser.add_argument("--workers", type=int, default=1)
    args = parser.parse_args()
    config = TcpConfig(
        args.factory,
        factory=True,
        host=args.host,
        port=args.port,
        workers=args.workers,
        log_level="info",
        access_log=False,
    )
    server = uvicorn.Server(config)
    if config.workers > 1:
        Multiprocess(config, sockets=[config.bind_socket()]).run()
    else:
        server.run()


if __name__ == "__main__":
    main()
