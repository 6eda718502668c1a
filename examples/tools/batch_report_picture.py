"""Draw docs/batch-report.png: the HTML report of an invented batch, as Chromium shows it.

The batch is invented (bench/mix.py's notes of the invented Harbourside Eye Unit, a FHIR
Procedure with a subject given as a string, a note sent twice with other content, and a file
a folder walk skips). Run from the repository root, with Debian's Chromium and Playwright:

    python examples/tools/batch_report_picture.py
"""

from __future__ import annotations

import json
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from bench.mix import write_mix  # noqa: E402
from tests.web_helpers import CHROMIUM, CHROMIUM_ARGS, browser_env  # noqa: E402

NOW = "2026-12-01T12:00:00+00:00"
OUT = ROOT / "docs" / "batch-report.png"


def batch(folder: Path) -> None:
    """The invented export: two days of NDJSON, one whole note file and a stray text file."""
    folder.mkdir()
    first = write_mix(folder / "2026-11-27.ndjson", 60)
    lines = first.read_text().splitlines()
    changed = json.loads(lines[4])
    changed["result"]["iop_after"][0]["value_mmhg"] = 21  # the same identifier, other content
    bundle = json.loads((ROOT / "examples" / "bundles" / "right-routine.bundle.json").read_text())
    procedure = bundle["entry"][0]["resource"]
    procedure["id"] = "session-0417"
    procedure["subject"] = "Patient/HX-0417"
    with (folder / "2026-11-28.ndjson").open("w") as out:
        out.write(json.dumps(procedure) + "\n")
        out.write(json.dumps(changed) + "\n")
    (folder / "one-note.json").write_text(lines[20])
    (folder / "read-me.txt").write_text("not a note")


def main() -> None:
    """Check the batch with an HTML report and draw the top of the page."""
    from playwright.sync_api import sync_playwright

    with tempfile.TemporaryDirectory(prefix="capnote-picture-") as scratch:
        work = Path(scratch)
        batch(work / "exports")
        run = [sys.executable, "-c", "from capnote.cli import main; main()", "check"]
        subprocess.run(  # noqa: S603 (argv built here from constants)
            [*run, "exports", "--now", NOW, "--report", "exports-check.html"],
            cwd=work,
            check=False,
            capture_output=True,
        )
        with sync_playwright() as playwright:
            browser = playwright.chromium.launch(
                executable_path=str(CHROMIUM), args=CHROMIUM_ARGS, env=browser_env()
            )
            page = browser.new_page(
                viewport={"width": 1280, "height": 1440}, java_script_enabled=False
            )
            page.goto((work / "exports-check.html").as_uri())
            page.screenshot(path=str(OUT))
            browser.close()
    print(f"wrote {OUT.relative_to(ROOT)}")


if __name__ == "__main__":
    main()
