"""Draw docs/audit-report.png: the audit of the invented demo year, as Chromium shows it:
the review visits' figures against Steinberg 1991, then the first unit's table and its
funnel plot of IOP rises.

The year is `capnote demo-data` (invented units, clinicians and patients, with reviews).
Run from the repository root, with Debian's Chromium and Playwright:

    python examples/tools/audit_report_picture.py
"""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from tests.web_helpers import CHROMIUM, CHROMIUM_ARGS, browser_env  # noqa: E402

OUT = ROOT / "docs" / "audit-report.png"


def capnote(*args: str, env: dict[str, str]) -> None:
    run = [sys.executable, "-c", "from capnote.cli import main; main()", *args]
    subprocess.run(run, env=env, check=True, capture_output=True)  # noqa: S603 (constants)


def main() -> None:
    """Load the demo year, write its audit and draw the review section and the first unit."""
    from playwright.sync_api import sync_playwright

    with tempfile.TemporaryDirectory(prefix="capnote-picture-") as scratch:
        work = Path(scratch)
        env = {**os.environ, "CAPNOTE_DATABASE_URL": f"sqlite:///{work / 'demo.sqlite3'}"}
        capnote("demo-data", env=env)
        report = work / "audit.html"
        capnote(
            "audit", "--from", "2025-12-01", "--to", "2026-11-30", "--report", str(report), env=env
        )
        with sync_playwright() as playwright:
            browser = playwright.chromium.launch(
                executable_path=str(CHROMIUM), args=CHROMIUM_ARGS, env=browser_env()
            )
            page = browser.new_page(
                viewport={"width": 1400, "height": 1500}, java_script_enabled=False
            )
            page.goto(report.as_uri())
            page.get_by_role("heading", name="After the session").scroll_into_view_if_needed()
            top = page.get_by_role("heading", name="After the session").bounding_box()
            assert top is not None
            page.screenshot(
                path=str(OUT),
                full_page=True,
                clip={"x": 0, "y": top["y"] - 10, "width": 1400, "height": 1500},
            )
            browser.close()
    print(f"wrote {OUT.relative_to(ROOT)}")


if __name__ == "__main__":
    main()
