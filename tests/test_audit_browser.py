"""The audit's HTML report in a real browser: Debian's Chromium, driven by Playwright, opens
a report made by `capnote audit` over a real SQLite file, from file:// with JavaScript off,
and shows the caution at top and foot, a funnel plot (SVG) per rate and unit with its text
table, counts under 5 marked, and the review items as not yet recorded."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import orjson
import pytest

from capnote.audit.demo_year import sessions
from capnote.audit.report import CAUTION
from capnote.notes import Principal
from tests.conftest import sync_notes
from tests.test_cli import capnote
from tests.web_helpers import in_ci, launched_chromium

try:
    from playwright.sync_api import Browser, expect
except ImportError:  # pragma: no cover - depends on the machine
    if in_ci():
        raise
    pytest.skip("playwright is not installed", allow_module_level=True)

pytestmark = pytest.mark.browser


@pytest.fixture(scope="module")
def browser() -> Iterator[Browser]:
    yield from launched_chromium()


@pytest.fixture(scope="module")
def report(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("audit")
    url = f"sqlite:///{folder / 'capnote.sqlite3'}"
    notes = sync_notes(url)
    try:
        # Few sessions, so that some counts are under 5 and must show marked.
        for note in sessions(60, seed=3):
            notes.submit(orjson.dumps(note), Principal("browser test", "submitter"))
    finally:
        notes.close()
    target = folder / "audit.html"
    args = ("audit", "--from", "2025-12-01", "--to", "2026-11-30", "--report", str(target))
    run = capnote(*args, env={"CAPNOTE_DATABASE_URL": url})
    assert run.returncode == 0, run.stderr
    return target


def test_the_report_shows_caution_funnels_tables_and_marks(report: Path, browser: Browser) -> None:
    # report first: it runs the service in an event loop, which must end before Playwright's.
    page = browser.new_page(java_script_enabled=False, viewport={"width": 1400, "height": 900})
    try:
        page.goto(report.as_uri())
        cautions = page.get_by_role("note")
        expect(cautions).to_have_count(2)
        expect(cautions.first).to_have_text(CAUTION)
        expect(cautions.first).to_be_in_viewport()
        # Two units, two rates each: four charts, each with one point per clinician.
        charts = page.locator("svg[role=img]")
        expect(charts).to_have_count(4)
        expect(charts.first).to_be_visible()
        expect(charts.first.locator("circle")).to_have_count(2)
        tables = page.locator("div.pair table")
        expect(tables).to_have_count(4)
        expect(tables.first.locator("tr")).to_have_count(3)
        expect(page.locator(".small").first).to_contain_text("[under 5]")
        expect(page.get_by_role("heading", name="Review visits", exact=True)).to_have_count(2)
        cautions.last.scroll_into_view_if_needed()
        expect(cautions.last).to_be_in_viewport()
    finally:
        page.close()
