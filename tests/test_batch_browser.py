"""The HTML report in a real browser: Debian's Chromium, driven by Playwright, opens a report of
a few thousand NDJSON lines from file://, with JavaScript off and nothing to fetch, and shows
the counts, the summary table, the chart and every finding."""

from __future__ import annotations

import json
from collections.abc import Iterator
from typing import Any

import pytest

from tests.batch_helpers import NOW, by_code, capnote, note, text_findings, text_tally, write_ndjson
from tests.web_helpers import (
    ARTIFACTS,
    AXE,
    in_ci,
    launched_chromium,
    missing,
)

try:
    from playwright.sync_api import Browser, expect
except ImportError:  # pragma: no cover - depends on the machine
    if in_ci():
        raise
    pytest.skip("playwright is not installed", allow_module_level=True)

pytestmark = pytest.mark.browser

LINES = 3_000
SCRIPT = "<script>alert('capnote')</script>"
VIEW = {"width": 1400, "height": 900}


@pytest.fixture(scope="module")
def browser() -> Iterator[Browser]:
    yield from launched_chromium()


@pytest.fixture(scope="module")
def report(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """A report of 3,000 NDJSON lines and a hostile one, and what the text output said."""
    folder = tmp_path_factory.mktemp("report")
    dump = write_ndjson(folder / "dump.ndjson", LINES)
    hostile = note(LINES + 1, "warning")
    hostile[SCRIPT] = 1
    with dump.open("a") as out:
        out.write(json.dumps(hostile) + "\n")
    target = folder / "report.html"
    run = capnote("check", str(dump), "--now", NOW, "--report", str(target))
    assert run.returncode == 1, run.stdout + run.stderr
    found = text_findings(run.stdout)
    return {"path": target, "tally": text_tally(run.stdout), "found": found, "dump": dump}


def test_the_report_opens_offline_and_shows_every_part(
    browser: Browser, report: dict[str, Any]
) -> None:
    # JavaScript off: the page must need none. Every request is recorded: only the file itself.
    context = browser.new_context(
        java_script_enabled=False, viewport={"width": 1400, "height": 900}
    )
    page = context.new_page()
    requests: list[str] = []
    dialogs: list[str] = []
    page.on("request", lambda r: requests.append(r.url))
    page.on("dialog", lambda d: dialogs.append(d.message))
    url = report["path"].as_uri()
    try:
        page.goto(url)
        tally = report["tally"]
        for key in ("records", "passed", "failed", "errors", "warnings", "information"):
            expect(page.locator(f"#count-{key}")).to_have_text(f"{tally[key]:,}")
        assert tally["records"] == LINES + 1
        expect(page.get_by_text("the treating clinician decide").first).to_be_visible()

        counts = by_code(report["found"])
        summary = page.locator("#by-code tbody tr")
        expect(summary).to_have_count(len(counts))
        for (code, severity), count in counts.items():
            row = page.locator(f'#by-code tr[data-code="{code}"][data-severity="{severity}"]')
            expect(row.locator("td").nth(2)).to_have_text(f"{count:,}")

        chart = page.locator("svg.chart")
        expect(chart).to_be_visible()
        bars = chart.locator("g.bar rect")
        expect(bars).to_have_count(min(12, len(counts)))
        widest = bars.first.bounding_box()
        assert widest is not None
        assert widest["width"] > 100  # the most common finding has the longest bar
        top = max(counts.items(), key=lambda kv: kv[1])[0][0]
        expect(chart.locator("g.bar").first).to_contain_text(top)

        rows = page.locator("#problems tbody tr")
        expect(rows).to_have_count(len(report["found"]))
        first = rows.first
        expect(first).to_be_visible()
        expect(first).to_contain_text(f"{report['dump']}")
        # Chunks are laid out only when scrolled to (content-visibility), so the page grows
        # as the reader goes down: End, as a reader presses it, until the page stops growing.
        last = rows.last
        for _ in range(10):
            page.keyboard.press("End")
            page.wait_for_timeout(200)
            box = last.bounding_box()
            if box is not None and box["y"] >= 0 and box["y"] + box["height"] <= VIEW["height"]:
                break
        expect(last).to_be_in_viewport()
        expect(last).to_contain_text(f"{LINES + 1}", use_inner_text=True)
        expect(last).to_contain_text(SCRIPT, use_inner_text=True)
        ARTIFACTS.mkdir(exist_ok=True)
        page.screenshot(path=str(ARTIFACTS / "batch-report-end.png"))
        assert requests == [url]
        assert dialogs == []
    finally:
        context.close()


def test_axe_finds_no_serious_or_critical_violations_in_the_report(
    browser: Browser, report: dict[str, Any]
) -> None:
    if not AXE.exists():
        missing("axe-core is missing (npm install --no-save --prefix tests/.node axe-core@4)")
    # axe is a script, which the report's own CSP refuses: this context only.
    context = browser.new_context(bypass_csp=True)
    page = context.new_page()
    try:
        page.goto(report["path"].as_uri())
        page.add_script_tag(path=str(AXE))
        result = page.evaluate(
            """async () => await axe.run(document, {
                runOnly: {type: 'tag', values: ['wcag2a', 'wcag2aa', 'wcag21a', 'wcag21aa']}})"""
        )
        serious = [v for v in result["violations"] if v["impact"] in ("serious", "critical")]
        assert serious == [], [(v["id"], v["help"], len(v["nodes"])) for v in serious]
    finally:
        context.close()
