"""What capnote's connection limits cost: the ceiling route served with uvicorn's own
httptools protocol and with capnote's bounded one (capnote.connection_limits), in turn.

    python bench/protocol_cost.py            # about 2 minutes; --rounds, --seconds

Both serve the same app the same way (bench/serve_app.py, one worker); wrk (or
bench/loadgen.py) posts a note to the ceiling route, which answers with the body, at 1 and
32 connections. The two are measured round after round, each keeping its best, since this
machine's speed drifts by a third from minute to minute (see README, "Performance").
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path
from typing import Any

if __package__ in (None, ""):  # run as `python bench/protocol_cost.py`: the repository is the root
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bench.harness import PYTHON, ROOT, load, note_template, served

CONNECTIONS = (1, 32)


def job(port: int, conns: int, seconds: float, tag: str) -> dict[str, Any]:
    """A load run of POSTs to the ceiling route."""
    return {
        "host": "127.0.0.1",
        "port": port,
        "connections": conns,
        "requests": 100_000,
        "seconds": seconds,
        "items": [["POST", "/bench/echo", note_template()]],
        "headers": {"Content-Type": "application/json"},
        "vary": "__N__",
        "tag": tag,
    }


def main() -> None:
    """Measure both protocols in turn and print the best of each."""
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--rounds", type=int, default=4)
    parser.add_argument("--seconds", type=float, default=4.0)
    args = parser.parse_args()
    best: dict[tuple[str, int], dict[str, Any]] = {}
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        env = {"CAPNOTE_DATABASE_URL": f"sqlite:///{work / 'ceiling.sqlite3'}"}
        sides = [("uvicorn httptools", ["--unbounded"]), ("bounded", [])]
        for round_no in range(args.rounds):
            # Each side goes first in every other round: a machine slowing within a round
            # then weighs on both alike.
            for name, extra in sides if round_no % 2 == 0 else sides[::-1]:
                argv = [PYTHON, str(ROOT / "bench" / "serve_app.py"), "bench.ceiling_app:create"]
                with served([*argv, *extra], env, work, 1, name.split()[0]) as port:
                    for conns in CONNECTIONS:
                        r = load(job(port, conns, args.seconds, f"{name[0]}{round_no}{conns}-"))
                        key = (name, conns)
                        if key not in best or r["rps"] > best[key]["rps"]:
                            best[key] = r
    print(f"best of {args.rounds} rounds, {args.seconds:g} s each, 1 worker")
    print("| protocol | connections | req/s | p50 ms | p99 ms |")
    print("| --- | ---: | ---: | ---: | ---: |")
    for (name, conns), r in sorted(best.items(), key=lambda kv: (kv[0][1], kv[0][0])):
        print(f"| {name} | {conns} | {r['rps']:,.0f} | {r['p50_ms']:.2f} | {r['p99_ms']:.2f} |")
    for conns in CONNECTIONS:
        ratio = best[("bounded", conns)]["rps"] / best[("uvicorn httptools", conns)]["rps"]
        print(f"bounded / uvicorn's own at {conns} connection(s): {ratio:.3f}")


if __name__ == "__main__":
    main()
