"""The audit's HTML report in a real browser: Debian's Chromium, driven by Playwright, opens
a report made by `capnote audit` over a real SQLite file, from file:// with JavaScript off,
and shows the caution at top and foot, a funnel plot (SVG) per rate and unit with its text
table, counts under 5 marked, and the review visits' figures; and the audit page of the
form, over a real HTTP server, shows the same report to an auditor and to nobody else."""

from __future__ import annotations

from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import orjson
import pytest

from capnote.audit.demo_year import sessions
from capnote.audit.report import CAUTION
from capnote.notes import Principal
from tests.conftest import NOW, sync_notes
from tests.test_cli import capnote
from tests.web_helpers import build_app, in_ci, launched_chromium, live_server, new_token

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


def test_the_audit_page_shows_the_report_to_an_auditor_only(
    tmp_path: Path, browser: Browser
) -> None:
    url = f"sqlite:///{tmp_path / 'capnote.sqlite3'}"

    def load() -> None:
        notes = sync_notes(url)
        try:
            for note in sessions(30, seed=5):
                notes.submit(orjson.dumps(note), Principal("browser test", "submitter"))
        finally:
            notes.close()

    # On a thread of its own: Playwright's sync API holds an event loop on this one.
    with ThreadPoolExecutor(max_workers=1) as pool:
        pool.submit(load).result()
    app = build_app(url, lambda: NOW)
    auditor, clinician = new_token(app, "auditor", NOW), new_token(app, "clinician", NOW)
    with live_server(app) as base:
        page = browser.new_page(viewport={"width": 1400, "height": 900})
        try:
            page.goto(f"{base}/audit-page")
            expect(page.get_by_role("note")).to_contain_text("local governance decides")
            page.get_by_label("From (day included)").fill("2025-12-01")
            page.get_by_label("To (day included)").fill("2026-11-30")
            # A clinician's token is refused in plain words, and no report is shown.
            page.get_by_label("Auditor token").fill(clinician)
            page.get_by_role("button", name="Show the audit").click()
            expect(page.get_by_role("alert")).to_contain_text("auditor role only")
            expect(page.locator("#audit-report")).to_be_hidden()
            page.get_by_label("Auditor token").fill(auditor)
            page.get_by_role("button", name="Show the audit").click()
            expect(page.get_by_role("status")).to_contain_text("2025-12-01 to 2026-11-30")
            report = page.frame_locator("#audit-report")
            expect(report.get_by_role("heading", level=1)).to_contain_text("Clinical audit")
            expect(report.get_by_role("note").first).to_have_text(CAUTION)
            expect(report.locator("svg[role=img]")).to_have_count(4)
            expect(report.get_by_text("booked reviews attended").first).to_be_visible()
            # The report's own style block runs inside the frame (allowed by its hash): the
            # caution has its border.
            border = report.locator("p.caution").first.evaluate(
                "e => getComputedStyle(e).borderTopStyle"
            )
            assert border == "solid"
            with page.expect_download() as download:
                page.get_by_role("button", name="Download as CSV").click()
            saved = tmp_path / "audit.csv"
            download.value.save_as(saved)
            assert saved.read_text().startswith("unit,clinician,measure")
        finally:
            page.close()
