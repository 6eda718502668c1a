"""How fast capnote's R4 validator judges a resource, beside the R4B models it replaced.

    python bench/validate_rate.py [--seconds 5]

Times capnote.fhir.validate.validate_resource and fhir.resources' R4B Bundle.model_validate
over the example Bundles (examples/bundles), in turn, each keeping its best round (the
machine drifts; see README, "Performance"), and prints both. Not run by the suite's timing:
speed is this script's business.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "service"))

from fhir.resources.R4B.bundle import Bundle  # noqa: E402

from capnote.fhir.validate import validate_resource  # noqa: E402


def _rate(
    work: Callable[[dict[str, Any]], object], bundles: list[dict[str, Any]], seconds: float
) -> float:
    done = 0
    start = time.perf_counter()
    while time.perf_counter() - start < seconds:
        for bundle in bundles:
            work(bundle)
        done += len(bundles)
    return done / (time.perf_counter() - start)


def main() -> None:
    """Print Bundles per second for each judge."""
    parser = argparse.ArgumentParser()
    parser.add_argument("--seconds", type=float, default=5.0)
    parser.add_argument("--rounds", type=int, default=3)
    args = parser.parse_args()
    paths = sorted((ROOT / "examples" / "bundles").glob("*.bundle.json"))
    bundles = [json.loads(p.read_text()) for p in paths]
    entries = sum(len(b["entry"]) for b in bundles) / len(bundles)
    validate_resource(bundles[0])  # load the R4 table once, outside the timing
    Bundle.model_validate(bundles[0])
    best = {"capnote R4 validator": 0.0, "R4B Bundle.model_validate": 0.0}
    for _ in range(args.rounds):
        best["capnote R4 validator"] = max(
            best["capnote R4 validator"], _rate(validate_resource, bundles, args.seconds)
        )
        best["R4B Bundle.model_validate"] = max(
            best["R4B Bundle.model_validate"],
            _rate(Bundle.model_validate, bundles, args.seconds),
        )
    print(f"{len(bundles)} example Bundles, {entries:.0f} entries each on average")
    for name, rate in best.items():
        print(f"{name:28} {rate:8.1f} Bundles/s  {1000 / rate:6.2f} ms per Bundle")


if __name__ == "__main__":
    main()
