"""Serve an ASGI app factory exactly as `capnote serve` does, for every app of the bench.

    python bench/serve_app.py MODULE:FACTORY --host 127.0.0.1 --port 8000 --workers 2

The same code path as `capnote serve` (capnote.serving.run: uvicorn, one listening socket
per worker, info log, no access log), so that capnote, the ceiling and the obvious app
differ only in the app.
"""

from __future__ import annotations

import argparse

from capnote import serving


def main() -> None:
    """Parse the command line and serve until terminated."""
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("factory")
    parser.add_argument("--host", default="127.0.0.1")
    parser.add_argument("--port", type=int, default=8000)
    parser.add_argument("--workers", type=int, default=1)
    # uvicorn's own httptools protocol, without capnote's connection limits: only
    # bench/protocol_cost.py uses it, to measure what the limits cost.
    parser.add_argument("--unbounded", action="store_true")
    args = parser.parse_args()
    if args.unbounded:
        serving.run(args.factory, args.host, args.port, args.workers, protocol="httptools")
    else:
        serving.run(args.factory, args.host, args.port, args.workers)


if __name__ == "__main__":
    main()
