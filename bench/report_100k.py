"""The analyst's case at full size: `capnote check --report` over 100,000 NDJSON lines.

Writes 100,000 distinct invented notes (every 10th with a warning, every 25th with an error),
runs capnote check with an HTML and a CSV report, and prints wall time, peak memory and the
report's size for each; with --browser, also opens the HTML report in Debian's Chromium and
times how long it takes to show. Not part of the test suite (about a minute per report on two
cores); run it by hand:

    python bench/report_100k.py [--lines N] [--browser] [--keep DIR]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PYTHON = sys.executable
CAPNOTE = [PYTHON, "-c", "from service.cli import main; main()"]
NOW = "2026-12-01T12:00:00+00:00"
MARK = "BENCHMARK-MARK"


def write_ndjson(path: Path, lines: int) -> None:
    """Distinct notes from the routine example; the identifiers are invented, as it is."""
    base = json.loads((ROOT / "examples" / "notes" / "right-routine.json").read_text())
    base["note_id"]["value"] = f"LN-{MARK}"
    base["patient"]["value"] = f"PX{MARK}"
    warn = json.loads(json.dumps(base))
    warn["result"]["iop_after"][0]["value_mmhg"] = 22
    bad = json.loads(json.dumps(base))
    bad["before"]["iop"]["value_mmhg"] = 95
    texts = [json.dumps(base), json.dumps(warn), json.dumps(bad)]
    with path.open("w") as out:
        for i in range(1, lines + 1):
            kind = 2 if i % 25 == 0 else 1 if i % 10 == 0 else 0
            out.write(texts[kind].replace(MARK, f"{i:07d}") + "\n")


def timed(argv: list[str]) -> tuple[float, int, int]:
    """Wall seconds, peak RSS (MiB) and exit code of one process, from the kernel's rusage."""
    began = time.perf_counter()
    with subprocess.Popen(  # noqa: S603 (argv built here from constants)
        argv, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE
    ) as proc:
        _pid, status, usage = os.wait4(proc.pid, 0)
        proc.returncode = os.waitstatus_to_exitcode(status)
        err = proc.stderr.read() if proc.stderr else b""
    if proc.returncode not in (0, 1):
        raise RuntimeError(f"{argv} exited {proc.returncode}: {err.decode()[-2000:]}")
    return time.perf_counter() - began, int(usage.ru_maxrss) // 1024, proc.returncode


def open_in_browser(report: Path) -> float:
    """Seconds until Chromium has loaded the report and shown its last finding."""
    from playwright.sync_api import sync_playwright

    args = ["--no-sandbox", "--disable-gpu", "--disable-background-networking"]
    args += ["--disable-component-update", "--disable-sync", "--no-first-run"]
    with sync_playwright() as playwright:
        browser = playwright.chromium.launch(executable_path="/usr/bin/chromium", args=args)
        page = browser.new_page(java_script_enabled=False)
        began = time.perf_counter()
        page.goto(report.as_uri(), timeout=300_000)
        page.locator("#count-records").wait_for()
        loaded = time.perf_counter() - began
        page.keyboard.press("End")
        page.locator("#problems tbody tr").last.wait_for()
        browser.close()
    return loaded


def main() -> None:
    """Generate, check with each report, and print the figures."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--lines", type=int, default=100_000)
    parser.add_argument("--browser", action="store_true", help="also time Chromium opening it")
    parser.add_argument("--keep", type=Path, help="write the files here and keep them")
    options = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="capnote-report-") as scratch:
        work = options.keep or Path(scratch)
        work.mkdir(parents=True, exist_ok=True)
        source = work / f"notes-{options.lines}.ndjson"
        write_ndjson(source, options.lines)
        size = source.stat().st_size / 2**20
        print(f"{options.lines:,} lines, {size:.0f} MiB of NDJSON")
        base = [*CAPNOTE, "check", str(source), "--now", NOW]
        wall, peak, code = timed(base)
        print(f"  no report: {wall:.1f} s, peak {peak} MiB, exit {code}")
        for fmt in ("html", "csv"):
            report = work / f"report.{fmt}"
            wall, peak, code = timed([*base, "--report", str(report)])
            mib = report.stat().st_size / 2**20
            print(f"  {fmt} report: {wall:.1f} s, peak {peak} MiB, exit {code}, {mib:.1f} MiB")
        if options.browser:
            shown = open_in_browser(work / "report.html")
            print(f"  Chromium shows the HTML report in {shown:.1f} s")


if __name__ == "__main__":
    main()
