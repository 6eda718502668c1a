"""The analyst's case at full size: `capnote check --report` over 100,000 NDJSON lines.

Writes 100,000 distinct invented notes, runs capnote check with an HTML and a CSV report,
and prints wall time, peak memory and the report's size for each; with --browser, also opens
the HTML report in Debian's Chromium and times how long it takes to show. The default mix is
the analyst's (bench/mix.py: 5% of records with an error, about two findings per record);
--mix light is the earlier one (every 10th with a warning, every 25th with an error). Not
part of the test suite (about a minute per report on two cores); run it by hand:

    python bench/report_100k.py [--lines N] [--mix analyst|light] [--browser] [--keep DIR]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:  # run as `python bench/report_100k.py`
    sys.path.insert(0, str(ROOT))

from bench.harness import CAPNOTE_ENTRY, NOW_TEXT, timed, write_ndjson  # noqa: E402
from bench.mix import write_mix  # noqa: E402


def open_in_browser(report: Path) -> tuple[float, float]:
    """Seconds until Chromium has loaded the whole report (its load event) and shown its
    counts, and until it has also shown the last row at the foot of the page."""
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
        page.locator("#codes tbody tr").last.wait_for()
        ended = time.perf_counter() - began
        browser.close()
    return loaded, ended


def main() -> None:
    """Generate, check with each report, and print the figures."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--lines", type=int, default=100_000)
    parser.add_argument("--mix", choices=("analyst", "light"), default="analyst")
    parser.add_argument("--browser", action="store_true", help="also time Chromium opening it")
    parser.add_argument("--keep", type=Path, help="write the files here and keep them")
    options = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="capnote-report-") as scratch:
        work = options.keep or Path(scratch)
        work.mkdir(parents=True, exist_ok=True)
        source = work / f"notes-{options.lines}.ndjson"
        (write_mix if options.mix == "analyst" else write_ndjson)(source, options.lines)
        size = source.stat().st_size / 2**20
        print(f"{options.lines:,} lines ({options.mix} mix), {size:.0f} MiB of NDJSON")
        base = (CAPNOTE_ENTRY, "check", str(source), "--now", NOW_TEXT)
        run = timed(*base)
        print(f"  no report: {run.wall:.1f} s, peak {run.peak_mib} MiB, exit {run.code}")
        for fmt in ("html", "csv"):
            report = work / f"report.{fmt}"
            run = timed(*base, "--report", str(report))
            mib = report.stat().st_size / 2**20
            print(
                f"  {fmt} report: {run.wall:.1f} s, peak {run.peak_mib} MiB, exit {run.code}, "
                f"{mib:.1f} MiB"
            )
        if options.browser:
            shown, foot = open_in_browser(work / "report.html")
            print(
                f"  Chromium shows the HTML report in {shown:.2f} s (its last row, after End, "
                f"at {foot:.2f} s)"
            )


if __name__ == "__main__":
    main()
