"""The clinician's form in a real browser: Debian's Chromium driven by Playwright against the
real service (uvicorn on 127.0.0.1, a fresh SQLite file per test, the clock fixed on
1 December 2026). The browser itself runs in another time zone (Pacific/Auckland), so every
date the page shows must come from the clinic's zone, not the browser's."""

from __future__ import annotations

import json
import re
import shutil
import subprocess
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, get_args

import httpx
import pytest

from capnote.note import ComplicationKind, Note
from tests.conftest import EXAMPLES, VALID, load
from tests.web_helpers import (
    ARTIFACTS,
    AXE,
    build_app,
    in_ci,
    launched_chromium,
    live_server,
    missing,
    new_token,
)

try:
    from playwright.sync_api import Browser, Dialog, Locator, Page, Request, expect
except ImportError:  # pragma: no cover - depends on the machine
    if in_ci():
        raise
    pytest.skip("playwright is not installed", allow_module_level=True)

pytestmark = pytest.mark.browser

NOW = datetime(2026, 12, 1, 12, 0, tzinfo=UTC)
ROUTINE = load(EXAMPLES / "notes" / "right-routine.json")
CAUTION = (
    "Thresholds are literature defaults; local protocol and the treating clinician decide. "
    "capnote is not a certified medical device."
)


@pytest.fixture(scope="module")
def browser() -> Iterator[Browser]:
    yield from launched_chromium()


@dataclass
class Clinic:
    """The service, a clinician token and one browser page on the form."""

    base: str
    app: Any
    token: str
    page: Page
    problems: list[str]
    checks: list[Request] = field(default_factory=list)
    pending: set[Request] = field(default_factory=set)

    def api(self) -> httpx.Client:
        return httpx.Client(
            base_url=self.base, headers={"authorization": f"Bearer {self.token}"}, timeout=10
        )

    def settle(self) -> None:
        """Wait until typing has stopped long enough for the debounced check to have run."""
        deadline = time.monotonic() + 15
        while time.monotonic() < deadline:
            before = len(self.checks)
            self.page.wait_for_timeout(600)
            if not self.pending and len(self.checks) == before:
                return
        raise AssertionError("the form kept checking")

    def last_check(self) -> dict[str, Any]:
        self.settle()
        body = self.checks[-1].post_data_json
        assert isinstance(body, dict)
        return body


def open_form(browser: Browser, base: str, *, bypass_csp: bool = False) -> tuple[Any, Page]:
    context = browser.new_context(
        locale="en-GB",
        timezone_id="Pacific/Auckland",
        viewport={"width": 1400, "height": 1000},
        bypass_csp=bypass_csp,
    )
    page = context.new_page()
    page.set_default_timeout(10_000)
    return context, page


@pytest.fixture
def clinic(browser: Browser, tmp_path: Path) -> Iterator[Clinic]:
    app = build_app(f"sqlite:///{tmp_path / 'capnote.sqlite3'}", lambda: NOW)
    token = new_token(app, "clinician", NOW)
    with live_server(app) as base:
        context, page = open_form(browser, base)
        problems: list[str] = []
        clinic = Clinic(base, app, token, page, problems)

        def console(message: Any) -> None:
            # Refused requests (401, 422, an aborted network) are logged by Chromium as
            # "Failed to load resource"; anything else (a CSP refusal, a script error) is a bug.
            if message.type == "error" and "Failed to load resource" not in message.text:
                problems.append(message.text)

        def started(request: Request) -> None:
            if request.url.endswith("/notes/check") and request.method == "POST":
                clinic.checks.append(request)
                clinic.pending.add(request)

        page.on("console", console)
        page.on("pageerror", lambda error: problems.append(str(error)))
        page.on("request", started)
        page.on("requestfinished", lambda r: clinic.pending.discard(r))
        page.on("requestfailed", lambda r: clinic.pending.discard(r))
        page.goto(f"{base}/")
        expect(page.locator("body")).to_have_attribute("data-ready", "true")
        try:
            yield clinic
        finally:
            context.close()
    assert problems == [], problems


def artifact(name: str) -> Path:
    ARTIFACTS.mkdir(exist_ok=True)
    return ARTIFACTS / name


# --- typing, as a person at the keyboard does -----------------------------------------------


def key_in(page: Page, field: Locator, text: str, *, replace: bool = False) -> None:
    field.focus()
    if replace:
        page.keyboard.press("Control+A")
    page.keyboard.type(text)


def type_label(page: Page, label: str, text: str, *, exact: bool = False) -> None:
    key_in(page, page.get_by_label(label, exact=exact), text)


def choose(page: Page, label: str, option: str, *, exact: bool = False) -> None:
    """Pick an option of a closed <select> by typing its first letters, as the keyboard does."""
    select = page.get_by_label(label, exact=exact)
    select.focus()
    page.keyboard.type(option)
    expect(select.locator("option:checked")).to_have_text(re.compile(f"^{re.escape(option)}"))


def pick(page: Page, group: str, option: str) -> None:
    """A radio button in a named group: focus it and press Space."""
    radio = page.get_by_role("group", name=group).get_by_label(option, exact=True)
    radio.focus()
    page.keyboard.press("Space")
    expect(radio).to_be_checked()


def tick(page: Page, label: str) -> None:
    """A checkbox: focus it and press Space."""
    box = page.get_by_label(label, exact=True)
    box.focus()
    page.keyboard.press("Space")
    expect(box).to_be_checked()


def press(page: Page, button: str) -> None:
    page.get_by_role("button", name=button, exact=True).focus()
    page.keyboard.press("Enter")


def sign_in(page: Page, token: str) -> None:
    type_label(page, "Clinician token", token)
    page.keyboard.press("Enter")
    expect(page.locator("#signin")).to_be_hidden()


# The risk factors' groups on the form, by their legends (each Yes / No / Not recorded).
RISK_FACTORS = (
    "High myopia",
    "Uveitis",
    "Diabetic macular oedema",
    "Retinal detachment before, this eye",
    "Retinal detachment, other eye",
    "Lattice degeneration",
    "Vitreous loss at cataract surgery",
)


def fill_routine(page: Page, *, patient: bool = True) -> None:
    """The routine right-eye session of examples/notes/right-routine.json, typed in."""
    if patient:
        type_label(page, "Patient ID", "HX100234", exact=True)
    type_label(page, "Visit number", "V-0417")
    pick(page, "Eye treated", "Right eye")
    type_label(page, "Session date", "27112026")
    type_label(page, "Laser started", "1005")
    type_label(page, "Laser finished", "1015")
    pick(page, "Consent given", "Yes")
    type_label(page, "Consent time", "0950")
    type_label(page, "Treating clinician", "Dr Ilona Marsh")
    type_label(page, "Clinician staff ID", "S-0042")
    type_label(page, "Place (unit and room)", "Harbourside Eye Unit, laser room 2")
    # The numbering systems are the site's (tests.web_helpers.SYSTEMS): nobody types them.

    type_label(page, "IOP before the laser", "15")
    choose(page, "Tonometry", "Applanation", exact=True)
    type_label(page, "IOP measured at", "0940")
    type_label(page, "Visual acuity before", "6/18")
    choose(page, "Acuity notation", "Snellen, metres", exact=True)
    choose(page, "Acuity measured", "Best corrected", exact=True)
    pick(page, "Pupil dilated", "Yes")
    type_label(page, "IOL optic diameter", "6")
    choose(page, "IOL optic material", "Hydrophobic acrylic")
    choose(page, "IOL position", "In the capsular bag")
    type_label(page, "Cataract surgery date", "12032025")
    # Nothing is assumed: each risk factor is recorded, here as absent.
    choose(page, "Glaucoma", "None", exact=True)
    for factor in RISK_FACTORS:
        pick(page, factor, "No")

    choose(page, "Pattern", "Cruciate", exact=True)
    choose(page, "Focus", "Posterior offset", exact=True)
    type_label(page, "Offset or focus depth", "150")  # µm, as the laser shows it
    pick(page, "Capsulotomy contact lens", "Used")
    type_label(page, "Setting 1: Energy per pulse", "1.6")
    type_label(page, "Setting 1: Pulses", "18")
    type_label(page, "Total energy on the laser's counter", "28.6")

    choose(page, "Outcome", "Complete opening")
    type_label(page, "Opening, horizontal diameter", "4.5")
    pick(page, "Opening centred on the visual axis", "Yes")
    press(page, "Add an IOP reading")
    type_label(page, "Reading 1: IOP", "17")
    choose(page, "Reading 1: Tonometry", "Applanation")
    type_label(page, "Reading 1: Measured at", "1115")
    type_label(page, "Visual acuity after", "6/9")
    choose(page, "Acuity notation, after", "Snellen, metres")
    choose(page, "Acuity measured, after", "Best corrected")

    press(page, "Add a drop given")
    type_label(page, "Drop given 1: Drop", "apraclonidine")
    type_label(page, "Drop given 1: Strength", "1")
    choose(page, "Drop given 1: Given", "Before and after")
    press(page, "Add drops to take home")
    type_label(page, "Drops to take home 1: Drops", "prednisolone acetate")
    type_label(page, "Drops to take home 1: Strength", "1")
    type_label(page, "Drops to take home 1: Times a day", "4")
    type_label(page, "Drops to take home 1: For", "7")
    pick(page, "Warning signs of retinal detachment explained", "Yes")
    pick(page, "Further laser session planned", "No")


def same_note(sent: dict[str, Any], expected: dict[str, Any]) -> None:
    """Both through the contract (strict JSON mode), so defaults and 15 vs 15.0 compare equal."""
    assert Note.model_validate_json(json.dumps(sent)) == Note.model_validate_json(
        json.dumps(expected)
    )


def finding_beside(clinic: Clinic, label: str, code: str, *, exact: bool = False) -> Locator:
    """The finding with this code for the labelled control, checked to be tied to it: named
    in its aria-describedby and placed in its own field or row."""
    clinic.settle()
    control = clinic.page.get_by_label(label, exact=exact)
    path = control.evaluate("c => c.dataset.bind || c.dataset.path")
    box = clinic.page.locator(f'.finding-inline[data-code="{code}"][data-location="{path}"]')
    expect(box).to_be_visible()
    assert box.get_attribute("id") in (control.get_attribute("aria-describedby") or "").split()
    assert box.evaluate("(b, c) => b.parentElement.contains(c)", control.element_handle())
    return box


# --- the tests ---------------------------------------------------------------------------------


def test_a_whole_note_typed_by_label_is_the_note_the_contract_expects(clinic: Clinic) -> None:
    page = clinic.page
    sign_in(page, clinic.token)
    fill_routine(page)
    sent = clinic.last_check()
    # The times were typed as clinic time (London, GMT in November) in a browser set to
    # Auckland: the note must carry +00:00, not the browser's +13:00.
    assert sent["started_at"] == "2026-11-27T10:05:00+00:00"
    same_note(sent, {**ROUTINE, "note_id": sent["note_id"], "status": "draft"})
    assert sent["note_id"]["system"] == "urn:ietf:rfc:3986"
    assert re.fullmatch(r"urn:uuid:[0-9a-f-]{36}", sent["note_id"]["value"])
    expect(page.locator("#findings-list > li")).to_have_count(0)
    expect(page.locator("#check-status")).to_contain_text("0 errors, 0 warnings")
    page.screenshot(path=artifact("form-filled.png"), full_page=True)


def test_review_on_christmas_day_moves_to_the_next_open_day(clinic: Clinic) -> None:
    # 27 Nov 2026 + 28 days (the routine review) is Fri 25 Dec 2026. England's bank holidays
    # (GOV.UK "UK bank holidays", England and Wales, 2026): Christmas Day Fri 25 Dec, Boxing
    # Day Sat 26 Dec with the substitute day Mon 28 Dec; Sun 27 Dec is a weekend day. So the
    # first open day is Tue 29 Dec 2026.
    page = clinic.page
    sign_in(page, clinic.token)
    fill_routine(page)
    review = page.locator("#due-list li[data-kind=review]")
    expect(review.locator(".due-when")).to_have_text("Tue 29 Dec 2026")
    moved = review.locator(".due-moved")
    expect(moved).to_contain_text("Moved later from Fri 25 Dec 2026")
    expect(moved).to_contain_text("Fri 25 Dec (Christmas Day)")
    expect(moved).to_contain_text("Sat 26 Dec (Boxing Day)")
    expect(moved).to_contain_text("Mon 28 Dec")
    # The same-day recheck is shown in clinic time (GMT), not the browser's Auckland time.
    recheck = page.locator("#due-list li[data-kind=iop-recheck] .due-when")
    expect(recheck).to_have_text("Fri 27 Nov 2026, 11:15 GMT")
    expect(page.locator("[data-derived=total-energy] dd")).to_contain_text("28.8 mJ in 18 pulses")
    expect(page.locator("[data-derived=fluence] dt")).to_have_text("Focal spot (idealised)")
    expect(page.locator("[data-derived=fluence] dd")).to_contain_text(
        "idealised diffraction-limited estimate, not a measurement"
    )
    expect(page.locator("[data-derived=cumulative] dd")).to_contain_text("28.8 mJ over 1 session")
    expect(page.locator("[data-derived=risk] dd")).to_contain_text("routine")
    expect(page.locator("[data-derived=opening] dd")).to_contain_text("15.9 mm²")
    page.locator("aside.panel").screenshot(path=artifact("panel-christmas.png"))


def rows_total(page: Page) -> tuple[int, float]:
    """The sum of energy x pulses over the rows, read from the inputs themselves."""
    pulses, energy = 0, 0.0
    for row in page.locator("#series-rows > li").all():
        e = float(row.locator("[data-sub=energy_mj]").input_value())
        n = int(row.locator("[data-sub=pulses]").input_value())
        pulses += n
        energy += e * n
    return pulses, energy


def shown_total(page: Page) -> tuple[int, float]:
    text = page.locator("#laser-total").inner_text()
    m = re.fullmatch(r"([\d,]+) pulses · ([\d,.]+) mJ", text.strip())
    assert m, text
    return int(m[1].replace(",", "")), float(m[2].replace(",", ""))


def assert_total(page: Page, pulses: int, energy: float) -> None:
    shown_pulses, shown_energy = shown_total(page)
    assert shown_pulses == pulses
    assert shown_energy == pytest.approx(energy)


def test_high_pulse_energy_is_flagged_beside_its_field_and_totals_follow_the_rows(
    clinic: Clinic,
) -> None:
    page = clinic.page
    sign_in(page, clinic.token)
    fill_routine(page)
    energy = page.get_by_label("Setting 1: Energy per pulse")
    key_in(page, energy, "8", replace=True)
    # The usual pulse energy is at most 3 mJ (policy default, "from memory": usually 1-3 mJ).
    beside = finding_beside(clinic, "Setting 1: Energy per pulse", "pulse-energy-above-usual")
    expect(beside).to_contain_text("pulse energy 8 mJ is above the usual 3 mJ")
    expect(beside).to_contain_text("Source:")
    expect(beside).to_contain_text("Rule:")
    # The counter (28.6 mJ) now disagrees with 8 x 18 = 144 mJ: an error at its own field.
    finding_beside(clinic, "Total energy on the laser's counter", "total-energy-mismatch")
    key_in(page, page.get_by_label("Total energy on the laser's counter"), "", replace=True)
    page.keyboard.press("Delete")

    press(page, "Add an energy setting")
    type_label(page, "Setting 2: Energy per pulse", "2.2")
    type_label(page, "Setting 2: Pulses", "10")
    assert_total(page, 28, 8 * 18 + 2.2 * 10)
    assert_total(page, *rows_total(page))
    expect(page.locator("[data-derived=total-energy] dd")).to_contain_text("166 mJ in 28 pulses")
    page.screenshot(path=artifact("form-energy-warning.png"), full_page=True)

    press(page, "Remove setting 1")
    expect(page.locator("#series-rows > li")).to_have_count(1)
    assert_total(page, 10, 2.2 * 10)
    # After renumbering, the old finding is gone and row 1 is the former row 2.
    expect(page.get_by_label("Setting 1: Energy per pulse")).to_have_value("2.2")
    expect(page.locator("[data-derived=total-energy] dd")).to_contain_text("22 mJ in 10 pulses")
    expect(page.locator(".finding-inline[data-code=pulse-energy-above-usual]")).to_have_count(0)


def test_iop_rise_of_12_is_a_severe_spike_with_a_next_day_check(clinic: Clinic) -> None:
    # A rise of 10 mmHg or more is a severe IOP spike (Chawla et al., ESCRS 2014; Unal et al.,
    # J Cataract Refract Surg 2006), and a severe spike calls for a next-day IOP check
    # (Simsek et al. 1998: 24 h recheck).
    page = clinic.page
    sign_in(page, clinic.token)
    fill_routine(page)
    key_in(page, page.get_by_label("Reading 1: IOP"), "27", replace=True)
    expect(page.locator("[data-derived=spike] dd")).to_contain_text("+12 mmHg")
    expect(page.locator("[data-derived=spike] dd")).to_contain_text("spike grade: severe")
    finding_beside(clinic, "Reading 1: IOP", "iop-rise-severe")
    next_day = page.locator("#due-list li[data-kind=next-day-iop]")
    expect(next_day.locator(".due-title")).to_have_text("Next-day IOP check")
    # 18-48 h after the session (Fri 27 Nov 10:15 GMT) is Sat 04:15 to Sun 10:15: the clinic
    # is shut at weekends for the whole window, so the check keeps its target and is flagged
    # to be booked by hand.
    expect(next_day.locator(".due-when")).to_have_text("Sat 28 Nov 2026, 10:15 GMT")
    expect(next_day).to_contain_text("The clinic is shut for the whole window: book this by hand")
    expect(page.locator("[data-derived=risk] dd")).to_contain_text("raised")
    page.screenshot(path=artifact("form-iop-spike.png"), full_page=True)


def test_sign_final_then_amend_and_void_with_reasons(clinic: Clinic) -> None:
    page = clinic.page
    sign_in(page, clinic.token)
    fill_routine(page)
    clinic.settle()
    press(page, "Sign as final…")
    dialog = page.get_by_role("dialog", name="Sign this note as final?")
    expect(dialog).to_be_visible()
    expect(dialog).to_contain_text("no errors")
    page.screenshot(path=artifact("sign-dialog.png"))
    dialog.get_by_role("button", name="Sign as final").focus()
    page.keyboard.press("Enter")
    expect(page.locator("#notice")).to_contain_text("Signed as final: version 1")
    page.emulate_media(media="print")  # the print says who signed, and when
    expect(page.locator("#print-summary .p-signed")).to_contain_text(
        "Signed by form test clinician at"
    )
    page.emulate_media(media="screen")
    key = page.locator("#record-id").inner_text().strip()
    with clinic.api() as api:
        stored = api.get(f"/notes/{key}")
        assert stored.status_code == 200
        assert stored.json()["status"] == "final"
        assert stored.headers["etag"] == 'W/"1"'
        same_note(stored.json()["note"], {**ROUTINE, "note_id": stored.json()["note"]["note_id"]})

    # A signed note changes only with a reason: without one the server refuses and says so
    # beside the reason field, and what was typed stays.
    key_in(page, page.get_by_label("Opening, horizontal diameter"), "4", replace=True)
    press(page, "Save the amendment")
    expect(page.locator("#notice")).to_contain_text("the server refused the note")
    expect(finding_beside(clinic, "Reason for the change", "missing-field")).to_contain_text(
        "Enter the reason for the change: a signed note is changed only with a reason"
    )
    expect(page.get_by_label("Opening, horizontal diameter")).to_have_value("4")
    type_label(page, "Reason for the change", "opening re-measured")
    press(page, "Save the amendment")
    expect(page.locator("#notice")).to_contain_text("Amendment saved: version 2")
    press(page, "Show versions")
    expect(page.locator("#versions-list > li")).to_have_count(2)
    expect(page.locator("#versions-list > li").nth(1)).to_contain_text("opening re-measured")
    with clinic.api() as api:
        versions = api.get(f"/notes/{key}/versions").json()["versions"]
        assert [(v["version"], v["status"], v["reason"]) for v in versions] == [
            (1, "final", None),
            (2, "final", "opening re-measured"),
        ]
        assert api.get(f"/notes/{key}").json()["note"]["result"]["opening"]["horizontal_mm"] == 4

    press(page, "Void (entered in error)…")
    void = page.get_by_role("dialog", name="Void this note?")
    void.get_by_role("button", name="Void the note").click()
    expect(void.locator("#void-message")).to_contain_text("Give the reason")
    void.get_by_label("Reason for voiding").fill("wrong eye recorded")
    void.get_by_role("button", name="Void the note").click()
    expect(page.locator("#notice")).to_contain_text("Voided: version 3")
    expect(page.get_by_label("Patient ID", exact=True)).to_be_disabled()
    # A void is unmistakable on the form and on every printed page, and books nothing
    # (issue 14: a note voided for the wrong patient must not get that patient booked).
    expect(page.locator("#void-banner")).to_be_visible()
    expect(page.locator("#void-banner")).to_contain_text("ENTERED IN ERROR — NOT FOR CLINICAL USE")
    page.emulate_media(media="print")
    summary = page.locator("#print-summary")
    expect(summary.locator(".p-void")).to_have_text("ENTERED IN ERROR — NOT FOR CLINICAL USE")
    expect(summary.locator(".p-void-page")).to_be_visible()
    expect(summary).to_contain_text("Nothing to book: this note was entered in error.")
    expect(summary).not_to_contain_text("Review visit")
    expect(summary.locator(".p-signed")).to_contain_text("version 3: voided, reason: wrong eye")
    pdf = page.pdf(format="A4", print_background=True, prefer_css_page_size=True)
    artifact("void-summary.pdf").write_bytes(pdf)
    page.emulate_media(media="screen")
    with clinic.api() as api:
        latest = api.get(f"/notes/{key}").json()
        assert (latest["status"], latest["reason"]) == ("void", "wrong eye recorded")


@pytest.mark.parametrize("path", VALID, ids=lambda p: p.stem)
def test_a_stored_note_opens_by_id_and_comes_back_unchanged(clinic: Clinic, path: Path) -> None:
    note = load(path)
    with clinic.api() as api:
        stored = api.post("/notes", json=note)
        assert stored.status_code == 201, stored.text
        key = stored.json()["id"]
        derived = stored.json()["derived"]
    page = clinic.page
    sign_in(page, clinic.token)
    type_label(page, "Open a stored note by record id", key)
    page.keyboard.press("Enter")
    expect(page.locator("#record-id")).to_have_text(key)
    # What the form would send now is the stored note, field for field.
    same_note(clinic.last_check(), note)
    expect(page.get_by_label("Right eye" if note["eye"] == "right" else "Left eye")).to_be_checked()
    assert_total(page, derived["total_pulses"], derived["total_energy_mj"])
    pits = [p for c in note["result"]["complications"] for p in c.get("positions", [])]
    expect(page.locator("#drawing .d-pit")).to_have_count(len(pits))
    expect(page.locator("#versions-list > li")).to_have_count(1)


def test_the_drawing_is_to_scale(clinic: Clinic) -> None:
    page = clinic.page
    sign_in(page, clinic.token)
    key_in(page, page.get_by_label("IOL optic diameter"), "6", replace=True)
    type_label(page, "Opening, horizontal diameter", "4.5")
    type_label(page, "Opening, vertical diameter", "3.5")
    press(page, "Add a complication")
    choose(page, "Complication 1: Kind", "IOL pits or marks")
    press(page, "Add a pit position (complication 1)")
    type_label(page, "Pit 1: x, to patient's right", "1")
    type_label(page, "Pit 1: y, upwards", "0.5")
    press(page, "Add a pit position (complication 1)")
    type_label(page, "Pit 2: x, to patient's right", "-2.5")
    type_label(page, "Pit 2: y, upwards", "-1")
    svg = page.locator("#drawing")
    # One user unit is one millimetre: radii are half the diameters typed.
    expect(svg.locator(".d-optic")).to_have_attribute("r", "3")
    expect(svg.locator(".d-opening")).to_have_attribute("rx", "2.25")
    expect(svg.locator(".d-opening")).to_have_attribute("ry", "1.75")
    # Seen facing the patient: the patient's right (x > 0) is drawn on the left, up is up.
    first = svg.locator(".d-pit circle").first
    expect(first).to_have_attribute("cx", "-1")
    expect(first).to_have_attribute("cy", "-0.5")
    desc = svg.locator("desc")
    expect(desc).to_contain_text(
        "Pit 1: 1 mm to the patient's right, 0.5 mm up, inside the opening"
    )
    expect(desc).to_contain_text(
        "Pit 2: 2.5 mm to the patient's left, 1 mm down, outside the opening"
    )
    box = svg.bounding_box()
    assert box is not None
    assert box["width"] == pytest.approx(box["height"], abs=1)
    page.locator("#drawing-figure").screenshot(path=artifact("drawing.png"))


def test_refusals_and_failures_are_explained_and_keep_what_was_typed(clinic: Clinic) -> None:
    page = clinic.page
    # A wrong token and a token of a role that may not check are both explained.
    type_label(page, "Clinician token", "cap_not-a-real-token")
    page.keyboard.press("Enter")
    expect(page.locator("#signin-message")).to_contain_text("not accepted")
    auditor = new_token(clinic.app, "auditor", NOW)
    key_in(page, page.get_by_label("Clinician token"), auditor, replace=True)
    page.keyboard.press("Enter")
    expect(page.locator("#signin-message")).to_contain_text("role")
    key_in(page, page.get_by_label("Clinician token"), clinic.token, replace=True)
    page.keyboard.press("Enter")
    expect(page.locator("#signin")).to_be_hidden()

    # A draft that does not say which eye and when is refused: the errors show beside their
    # fields (even those not reached yet) and what was typed stays.
    type_label(page, "Patient ID", "HX100234", exact=True)
    press(page, "Save as draft")
    expect(page.locator("#notice")).to_contain_text("Saving the draft failed")
    expect(page.locator("#notice")).to_contain_text("Everything typed is still in the form")
    eye = page.locator("fieldset[data-path=eye] .finding-inline[data-code=missing-field]")
    expect(eye).to_be_visible()
    expect(page.get_by_label("Patient ID", exact=True)).to_have_value("HX100234")

    # A whole note with an impossible value: a draft is kept with the range beside the
    # field; signing it is refused.
    fill_routine(page, patient=False)
    key_in(page, page.get_by_label("IOP before the laser"), "95", replace=True)
    press(page, "Save as draft")
    expect(page.locator("#notice")).to_contain_text("Saved as draft: version 1")
    expect(page.locator("#notice")).to_contain_text(
        "1 entry needs attention before it can be signed"
    )
    expect(finding_beside(clinic, "IOP before the laser", "out-of-range")).to_contain_text(
        "outside >= 0 and <= 80 mmHg"
    )
    expect(page.get_by_label("IOP before the laser")).to_have_value("95")
    expect(page.locator("#record-state")).to_have_text("draft, version 1")
    press(page, "Sign as final…")
    page.get_by_role("dialog").get_by_role("button", name="Sign as final").click()
    expect(page.locator("#notice")).to_contain_text("Signing failed")
    expect(page.locator("#record-state")).to_have_text("draft, version 1")

    # The network fails: a plain message, nothing lost.
    saving = re.compile(r".*/notes(/[0-9a-f-]{36})?$")
    page.route(saving, lambda route: route.abort())
    key_in(page, page.get_by_label("IOP before the laser"), "19", replace=True)
    press(page, "Save as draft")
    expect(page.locator("#notice")).to_contain_text("could not be reached")
    expect(page.get_by_label("Patient ID", exact=True)).to_have_value("HX100234")
    page.unroute(saving)

    # The token is revoked meanwhile (401 on the next check): sign-in comes back, text stays.
    page.evaluate("sessionStorage.setItem('capnote-token', 'cap_revoked')")
    key_in(page, page.get_by_label("Treating clinician"), "Dr Ilona Marsh", replace=True)
    expect(page.locator("#signin")).to_be_visible()
    expect(page.locator("#signin-message")).to_contain_text("Sign in again")
    expect(page.get_by_label("Treating clinician")).to_have_value("Dr Ilona Marsh")

    # Nothing of the note is kept in the browser: only the token, in sessionStorage.
    stored = page.evaluate(
        """async () => ({
            local: localStorage.length,
            session: Object.keys(sessionStorage),
            idb: indexedDB.databases ? (await indexedDB.databases()).length : 0,
        })"""
    )
    assert stored == {"local": 0, "session": [], "idb": 0}
    sign_in(page, clinic.token)
    assert page.evaluate("Object.keys(sessionStorage)") == ["capnote-token"]


def test_leaving_with_unsaved_changes_asks_first(clinic: Clinic) -> None:
    page = clinic.page
    asked: list[str] = []

    def answer(dialog: Dialog) -> None:
        asked.append(dialog.type)
        dialog.accept()

    page.on("dialog", answer)
    page.goto(f"{clinic.base}/")  # nothing typed yet: leaving asks nothing
    expect(page.locator("body")).to_have_attribute("data-ready", "true")
    assert asked == []
    type_label(page, "Patient ID", "HX100234", exact=True)
    with page.expect_event("close"):
        page.close(run_before_unload=True)
    assert asked == ["beforeunload"]


def tabbables(page: Page) -> list[str]:
    """Every element the Tab key should reach, in document order (one stop per radio group)."""
    keys: list[str] = page.evaluate(
        """() => {
            const all = [...document.querySelectorAll(
                'a[href], button, input, select, textarea, summary, [tabindex]')];
            all.forEach((el, i) => { el.dataset.tabkey = String(i); });
            const seen = new Set();
            const out = [];
            all.forEach((el, i) => {
                if (el.disabled || el.tabIndex < 0 || !el.checkVisibility()) return;
                if (el.closest('dialog:not([open]), template')) return;
                if (el.type === 'radio') {
                    // A group is one stop: its checked radio, else its first.
                    if (seen.has(el.name)) return;
                    seen.add(el.name);
                    const on = all.find(
                        (r) => r.type === 'radio' && r.name === el.name && r.checked);
                    if (on) { out.push(on.dataset.tabkey); return; }
                }
                out.push(String(i));
            });
            return out;
        }"""
    )
    return keys


def test_tab_goes_through_the_page_top_to_bottom_with_visible_focus(clinic: Clinic) -> None:
    page = clinic.page
    sign_in(page, clinic.token)
    clinic.settle()
    # Leaving a required field empty shows its error (and a "Go to" button in the summary),
    # so a first pass over the page settles what is there; the second pass is checked.
    page.locator(".skip").focus()
    for _ in range(len(tabbables(page)) * 3):
        page.keyboard.press("Tab")
        if page.evaluate("document.activeElement === document.body"):
            break
    clinic.settle()
    expected = tabbables(page)
    # Start where a keyboard user starts: the first stop of the page (the skip link).
    page.locator(".skip").focus()
    visited = [page.evaluate("document.activeElement.dataset.tabkey")]
    for _ in range(len(expected) * 5):
        page.keyboard.press("Tab")
        key, outline = page.evaluate(
            """() => { const el = document.activeElement;
                       const s = getComputedStyle(el);
                       return [el.dataset.tabkey || el.tagName,
                               s.outlineStyle + ' ' + s.outlineWidth]; }"""
        )
        if visited[-1] != key:
            visited.append(key)
            # Every stop shows where the focus is: a solid outline of 2 px or more.
            assert outline.startswith("solid"), (key, outline)
            assert float(outline.split()[1].removesuffix("px")) >= 2, (key, outline)
        if key == expected[-1]:
            break
    assert visited == expected


def run_axe(page: Page) -> list[dict[str, Any]]:
    """axe-core's WCAG 2.1 A and AA rules and its best practices (one h1, every part in a
    landmark: the rules page-has-heading-one and region); moderate findings count too."""
    page.add_script_tag(path=str(AXE))
    result = page.evaluate(
        """async () => await axe.run(document, {
            runOnly: {type: 'tag', values: ['wcag2a', 'wcag2aa', 'wcag21a', 'wcag21aa',
                                            'best-practice']}})"""
    )
    violations: list[dict[str, Any]] = result["violations"]
    return [v for v in violations if v["impact"] in ("moderate", "serious", "critical")]


def test_axe_finds_no_moderate_serious_or_critical_violations(
    browser: Browser, tmp_path: Path
) -> None:
    if not AXE.exists():
        missing("axe-core is missing (npm install --no-save --prefix tests/.node axe-core@4)")
    app = build_app(f"sqlite:///{tmp_path / 'capnote.sqlite3'}", lambda: NOW)
    token = new_token(app, "clinician", NOW)
    with live_server(app) as base:
        # axe is injected as a script, which the page's CSP would refuse: this context only.
        context, page = open_form(browser, base, bypass_csp=True)
        try:
            page.goto(f"{base}/")
            expect(page.locator("body")).to_have_attribute("data-ready", "true")
            states = {"signed out": run_axe(page)}
            sign_in(page, token)
            fill_routine(page)
            key_in(page, page.get_by_label("Setting 1: Energy per pulse"), "8", replace=True)
            choose(page, "Pulse mode", "Burst")
            type_label(page, "Pulses per burst", "2")
            choose(page, "Which contact lens", "Another lens")
            type_label(page, "Lens name", "wide-view lens")
            tick(page, "Glare")
            press(page, "Add a dilating drop")
            type_label(page, "Dilating drop 1: Drop and strength", "tropicamide 1 %")
            pick(page, "High myopia", "Yes")
            press(page, "Add a complication")
            choose(page, "Complication 1: Kind", "IOL pits or marks")
            press(page, "Add a pit position (complication 1)")
            type_label(page, "Pit 1: x, to patient's right", "0.4")
            type_label(page, "Pit 1: y, upwards", "0.2")
            expect(
                page.locator(".finding-inline[data-code=pulse-energy-above-usual]")
            ).to_be_visible()
            page.wait_for_timeout(800)
            states["note with findings"] = run_axe(page)
            press(page, "Sign as final…")
            expect(page.get_by_role("dialog")).to_be_visible()
            states["sign dialog"] = run_axe(page)
        finally:
            context.close()
    summary = {
        state: [(v["id"], v["impact"], [n["target"] for n in v["nodes"]][:3]) for v in found]
        for state, found in states.items()
        if found
    }
    assert summary == {}


def pdf_pages(data: bytes) -> int:
    return len(re.findall(rb"/Type\s*/Page(?![a-zA-Z])", data))


def test_print_view_is_one_page_with_findings_due_items_and_the_caution(clinic: Clinic) -> None:
    page = clinic.page
    sign_in(page, clinic.token)
    fill_routine(page)
    # 4 mJ x 18 = 72 mJ: above the usual pulse energy, but not in the highest band, so the
    # risk stays routine and the review stays four weeks out (moved past Christmas).
    key_in(page, page.get_by_label("Setting 1: Energy per pulse"), "4", replace=True)
    key_in(page, page.get_by_label("Total energy on the laser's counter"), "72", replace=True)
    expect(page.locator(".finding-inline[data-code=pulse-energy-above-usual]")).to_be_visible()
    clinic.settle()
    expect(page.locator("#caution")).to_have_text(CAUTION)  # on screen too
    page.emulate_media(media="print")
    summary = page.locator("#print-summary")
    expect(summary).to_be_visible()
    expect(page.locator("#note-form")).to_be_hidden()
    expect(summary).to_contain_text("pulse energy 4 mJ is above the usual 3 mJ")
    expect(summary).to_contain_text("Review visit: Tue 29 Dec 2026")
    expect(summary).to_contain_text("Christmas Day")
    expect(summary.locator(".p-caution")).to_have_text(CAUTION)
    expect(summary).to_contain_text("HX100234")
    page.screenshot(path=artifact("print.png"), full_page=True)
    pdf = page.pdf(format="A4", print_background=True, prefer_css_page_size=True)
    artifact("summary.pdf").write_bytes(pdf)
    assert pdf.startswith(b"%PDF")
    assert pdf_pages(pdf) == 1
    page.emulate_media(media="screen")
    expect(page.locator("#note-form")).to_be_visible()
    page.screenshot(path=artifact("form.png"))
    page.locator("#step-laser").scroll_into_view_if_needed()
    page.evaluate("document.getElementById('step-laser').scrollIntoView({block: 'start'})")
    page.screenshot(path=artifact("form-laser.png"))
    if shutil.which("pdftotext"):
        # poppler's text extraction, when present, reads the caution off the printed page.
        text = subprocess.run(
            ["pdftotext", str(artifact("summary.pdf")), "-"],
            capture_output=True,
            text=True,
            check=True,
        ).stdout
        assert "not a certified medical device" in " ".join(text.split())


# --- unknown is not "no", decimal commas, the pressure pathway ------------------------------

# Keys that say something about the patient only when someone recorded them: an untouched
# form leaves every one of them out (the contract reads a missing key as "not recorded").
NOT_RECORDED_KEYS = {
    "before.risk_factors": [
        "glaucoma",
        "high_myopia",
        "uveitis",
        "diabetic_macular_oedema",
        "retinal_detachment_this_eye",
        "retinal_detachment_fellow_eye",
        "lattice_degeneration",
        "vitreous_loss_at_cataract_surgery",
    ],
    "before.iol": ["optic_diameter_mm", "position"],
    "plan": ["further_session_planned"],
    "result": ["pressure_treatment", "discharge", "opening", "visual_acuity_after"],
    "": ["patient_details", "assistant", "indication"],
    "before": ["topical_anaesthetic", "dilating_drops"],
    "consent": ["kind"],
    "laser": ["mode", "pulses_per_burst", "focus"],
    "laser.contact_lens": ["lens", "magnification"],
}


def part(note: dict[str, Any], path: str) -> dict[str, Any]:
    for key in filter(None, path.split(".")):
        note = note.get(key) or {}
    return note


def test_an_untouched_form_records_nothing_it_was_not_told(clinic: Clinic) -> None:
    page = clinic.page
    sign_in(page, clinic.token)
    sent = clinic.last_check()
    for path, keys in NOT_RECORDED_KEYS.items():
        assert [k for k in keys if k in part(sent, path)] == [], path
    assert "visual_acuity" not in sent["before"]
    # Every three-way item starts on "Not recorded" (the radios are built at start-up; their
    # ids stay NAME-yes / NAME-no / NAME-not-recorded).
    for factor in RISK_FACTORS:
        group = page.get_by_role("group", name=factor)
        expect(group.get_by_label("Not recorded", exact=True)).to_be_checked()
        expect(group.get_by_role("radio")).to_have_count(3)
    expect(page.locator("#rf-myopia-not-recorded")).to_be_checked()
    expect(page.get_by_label("Glaucoma", exact=True)).to_have_value("")
    expect(page.get_by_label("IOL position")).to_have_value("")
    expect(page.get_by_label("IOL optic diameter")).to_have_value("")
    # The new controls start unanswered too: nothing ticked, every list on "Not recorded",
    # every text empty, and the controls that depend on another answer not shown yet.
    for label in ("Kind of opacification", "Pulse mode", "Consent taken as"):
        expect(page.get_by_label(label)).to_have_value("")
        expect(page.get_by_label(label).locator("option:checked")).to_have_text("Not recorded")
    symptoms = page.get_by_role("group", name="Symptoms reported").get_by_role("checkbox")
    expect(symptoms).to_have_count(5)
    for box in symptoms.all():
        expect(box).not_to_be_checked()
    for label in (
        "Patient name",
        "Date of birth",
        "Assistant or nurse present",
        "Symptoms in words",
        "Topical anaesthetic",
        "Offset or focus depth",
    ):
        expect(page.get_by_label(label)).to_have_value("")
    expect(page.locator("#dilating-rows > li")).to_have_count(0)
    expect(page.get_by_label("Pulses per burst")).to_be_hidden()
    expect(page.get_by_label("Which contact lens")).to_be_hidden()
    expect(page.get_by_label("Lens name")).to_be_hidden()
    # Saying that a lens was used asks which, and still sends no lens until one is chosen.
    pick(page, "Capsulotomy contact lens", "Used")
    expect(page.get_by_label("Which contact lens")).to_be_visible()
    expect(page.get_by_label("Which contact lens")).to_have_value("")
    expect(page.get_by_label("Lens name")).to_be_hidden()
    assert clinic.last_check()["laser"]["contact_lens"] == {"used": True}
    # An opening and an acuity, typed with nothing else: no centring, no correction, no
    # vertical diameter is invented for them.
    type_label(page, "Opening, horizontal diameter", "4.5")
    type_label(page, "Visual acuity before", "6/18")
    choose(page, "Acuity notation", "Snellen, metres", exact=True)
    sent = clinic.last_check()
    assert sent["result"]["opening"] == {"horizontal_mm": 4.5}
    assert sent["before"]["visual_acuity"] == {"notation": "snellen-metric", "value": "6/18"}
    # Recorded "No" is sent as false; "Not recorded" again leaves the key out.
    pick(page, "Uveitis", "No")
    pick(page, "Opening centred on the visual axis", "No")
    sent = clinic.last_check()
    assert sent["before"]["risk_factors"] == {"uveitis": False}
    assert sent["result"]["opening"] == {"horizontal_mm": 4.5, "centred": False}
    pick(page, "Uveitis", "Not recorded")
    assert "uveitis" not in clinic.last_check()["before"]["risk_factors"]


def test_a_decimal_comma_is_read_as_a_decimal_and_ambiguous_numbers_are_refused(
    clinic: Clinic,
) -> None:
    # Common practice: continental European locales write a decimal comma ("0,8" = 0.8).
    page = clinic.page
    sign_in(page, clinic.token)
    energy = page.get_by_label("Setting 1: Energy per pulse")
    key_in(page, energy, "0,8")
    type_label(page, "Setting 1: Pulses", "20")
    type_label(page, "IOL optic diameter", "5,5")
    page.keyboard.press("Tab")
    sent = clinic.last_check()
    assert sent["laser"]["series"][0] == {"energy_mj": 0.8, "pulses": 20}
    assert sent["before"]["iol"]["optic_diameter_mm"] == 5.5
    # Read once the field is left, it is shown with a point.
    expect(energy).to_have_value("0.8")
    expect(page.get_by_label("IOL optic diameter")).to_have_value("5.5")
    assert_total(page, 20, 16)

    for typed in ("1.000,5", "1,2,3", "1,000"):
        key_in(page, energy, typed, replace=True)
        page.keyboard.press("Tab")
        problem = page.locator("#series-0-energy-mj-number-problem")
        expect(problem).to_be_visible()
        expect(problem).to_contain_text(typed)
        assert (
            "series-0-energy-mj-number-problem"
            in (energy.get_attribute("aria-describedby") or "").split()
        )
        expect(energy).to_have_attribute("aria-invalid", "true")
        expect(energy).to_have_value(typed)  # left as typed, never turned into another number
        # The text goes to the server as text, which refuses it at that field.
        assert clinic.last_check()["laser"]["series"][0]["energy_mj"] == typed
    key_in(page, energy, "1.5", replace=True)
    page.keyboard.press("Tab")
    expect(page.locator("#series-0-energy-mj-number-problem")).to_have_count(0)
    assert clinic.last_check()["laser"]["series"][0]["energy_mj"] == 1.5


def test_treatment_for_a_raised_iop_and_the_discharge_go_into_the_note(clinic: Clinic) -> None:
    # A rise of 10 mmHg or more is a severe spike (Chawla et al., ESCRS 2014) and needs action
    # before the patient leaves; 15 -> 32 mmHg is a rise of 17 and over 30 mmHg (policy
    # default, from memory).
    page = clinic.page
    sign_in(page, clinic.token)
    fill_routine(page)
    key_in(page, page.get_by_label("Reading 1: IOP"), "32", replace=True)
    # Reading 2 is entered second but was taken earlier (10:45, a safe 18 mmHg): reading 1
    # (11:15) is the last one and still needs action; its finding sits beside reading 1.
    press(page, "Add an IOP reading")
    type_label(page, "Reading 2: IOP", "18")
    choose(page, "Reading 2: Tonometry", "Applanation")
    type_label(page, "Reading 2: Measured at", "1045")
    box = finding_beside(clinic, "Reading 1: IOP", "iop-action-unresolved")
    expect(box).to_contain_text("32 mmHg")
    expect(
        page.locator("#iop-rows > li").nth(1).locator("[data-code=iop-action-unresolved]")
    ).to_have_count(0)

    press(page, "Add a treatment given")
    type_label(page, "Treatment 1: Medicine", "acetazolamide")
    type_label(page, "Treatment 1: Dose", "500", exact=True)
    choose(page, "Treatment 1: Dose unit", "mg")
    choose(page, "Treatment 1: Route", "By mouth")
    type_label(page, "Treatment 1: Given at", "1125")
    press(page, "Add a treatment given")
    type_label(page, "Treatment 2: Medicine", "apraclonidine")
    type_label(page, "Treatment 2: Strength", "0,5")
    type_label(page, "Treatment 2: Dose", "1", exact=True)
    choose(page, "Treatment 2: Dose unit", "Drops")
    choose(page, "Treatment 2: Route", "Eye drop")
    type_label(page, "Treatment 2: Given at", "1126")
    type_label(page, "Discharged at", "1230")
    type_label(page, "Discharge cleared by", "Dr Ilona Marsh")
    type_label(page, "Reason for leaving with the IOP still to act on", "sent to eye casualty")
    sent = clinic.last_check()
    assert sent["result"]["pressure_treatment"] == [
        {
            "agent": "acetazolamide",
            "dose": 500,
            "dose_unit": "mg",
            "route": "oral",
            "given_at": "2026-11-27T11:25:00+00:00",
        },
        {
            "agent": "apraclonidine",
            "strength_percent": 0.5,
            "dose": 1,
            "dose_unit": "drop",
            "route": "topical",
            "given_at": "2026-11-27T11:26:00+00:00",
        },
    ]
    assert sent["result"]["discharge"] == {
        "at": "2026-11-27T12:30:00+00:00",
        "cleared_by": "Dr Ilona Marsh",
        "reason": "sent to eye casualty",
    }
    # With a discharge reason the pathway is closed.
    expect(page.locator(".finding-inline[data-code=iop-action-unresolved]")).to_have_count(0)

    # Without it, the print lists the open finding with the reading it concerns.
    key_in(
        page,
        page.get_by_label("Reason for leaving with the IOP still to act on"),
        "",
        replace=True,
    )
    page.keyboard.press("Delete")
    finding_beside(clinic, "Reading 1: IOP", "iop-action-unresolved")
    page.emulate_media(media="print")
    summary = page.locator("#print-summary")
    printed = summary.locator("li[data-code=iop-action-unresolved]")
    expect(printed).to_contain_text("IOP reading 1 after the laser")
    expect(summary).to_contain_text("acetazolamide 500 mg, by mouth at 11:25")
    expect(summary).to_contain_text("12:30, cleared by Dr Ilona Marsh")
    page.emulate_media(media="screen")


def test_a_stored_draft_keeps_not_recorded_apart_from_no(clinic: Clinic) -> None:
    note = json.loads(json.dumps(ROUTINE))
    note["status"] = "draft"
    factors = note["before"]["risk_factors"]
    del factors["glaucoma"], factors["uveitis"], factors["lattice_degeneration"]
    factors["high_myopia"] = True
    del note["before"]["iol"]["optic_diameter_mm"], note["before"]["iol"]["position"]
    del note["before"]["visual_acuity"]["correction"]
    del note["result"]["opening"]["centred"]
    del note["plan"]["further_session_planned"]
    with clinic.api() as api:
        stored = api.post("/notes", json=note)
        assert stored.status_code == 201, stored.text
        key = stored.json()["id"]
        # The diameter ratio needs the optic's diameter: not worked out without it.
        assert stored.json()["derived"]["opening"]["ratio_to_optic"] is None
    page = clinic.page
    sign_in(page, clinic.token)
    type_label(page, "Open a stored note by record id", key)
    page.keyboard.press("Enter")
    expect(page.locator("#record-id")).to_have_text(key)
    sent = clinic.last_check()
    same_note(sent, note)
    assert "glaucoma" not in sent["before"]["risk_factors"]
    assert sent["before"]["risk_factors"]["retinal_detachment_this_eye"] is False
    assert "centred" not in sent["result"]["opening"]
    for factor, shown in (
        ("Uveitis", "Not recorded"),
        ("Lattice degeneration", "Not recorded"),
        ("High myopia", "Yes"),
        ("Diabetic macular oedema", "No"),
    ):
        expect(
            page.get_by_role("group", name=factor).get_by_label(shown, exact=True)
        ).to_be_checked()
    expect(
        page.get_by_role("group", name="Opening centred on the visual axis").get_by_label(
            "Not recorded", exact=True
        )
    ).to_be_checked()
    expect(
        page.get_by_role("group", name="Further laser session planned").get_by_label(
            "Not recorded", exact=True
        )
    ).to_be_checked()
    expect(page.get_by_label("Glaucoma", exact=True)).to_have_value("")
    expect(page.get_by_label("Acuity measured", exact=True)).to_have_value("")
    # The server says which checks could not run, beside the items concerned.
    finding_beside(clinic, "Glaucoma", "glaucoma-not-recorded", exact=True)
    finding_beside(clinic, "Acuity measured", "acuity-correction-not-recorded", exact=True)
    risk = page.locator(
        'fieldset[data-path="before.risk_factors"] > '
        '.finding-inline[data-code="risk-factors-not-recorded"]'
    )
    expect(risk).to_contain_text("uveitis, lattice degeneration")
    expect(page.locator("[data-derived=opening] dd")).to_contain_text(
        "diameter ratio not worked out: the optic diameter is not recorded"
    )
    page.emulate_media(media="print")
    summary = page.locator("#print-summary")
    expect(summary).to_contain_text("optic diameter not recorded")
    expect(summary).to_contain_text("glaucoma, uveitis, lattice degeneration")
    expect(summary).to_contain_text("centring not recorded")
    page.emulate_media(media="screen")
    # Recording the optic's diameter brings the ratio back, labelled as a diameter ratio.
    type_label(page, "IOL optic diameter", "6")
    clinic.settle()
    expect(page.locator("[data-derived=opening] dd")).to_contain_text(
        "diameter ratio 0.75 of the optic diameter"
    )


# The site's lens list as /web/defaults gives it (service/capnote/policy/default.toml, a
# placeholder).
LISTED_LENS = "Capsulotomy lens (example, 1.6x)"
LISTED_HINT = "Magnification 1.6\N{MULTIPLICATION SIGN} (site lens list)."


def with_new_fields(lens: dict[str, Any]) -> dict[str, Any]:
    """The routine note as a draft with every part that the form gained a control for."""
    note = json.loads(json.dumps(ROUTINE))
    note["status"] = "draft"
    note["patient_details"] = {"name": "Mereana Holt", "birth_date": "1950-03-12"}
    note["assistant"] = "Nurse Tam Rivers"
    note["consent"]["kind"] = "verbal"
    note["indication"] = {
        "opacification": "pearl",
        "symptoms": ["reduced-vision", "glare", "other"],
        "symptoms_text": "haloes round lights at night",
    }
    note["before"]["topical_anaesthetic"] = "proxymetacaine 0.5 %"
    note["before"]["dilating_drops"] = ["tropicamide 1 %", "phenylephrine 2,5 %"]
    note["laser"]["mode"] = "burst"
    note["laser"]["pulses_per_burst"] = 2
    note["laser"]["contact_lens"] = {"used": True, **lens}
    note["result"]["complications"] = [{"kind": "anterior-uveitis", "text": "mild flare"}]
    # Still without a control of its own: kept from the stored note.
    note["result"]["discharge"] = {
        "at": "2026-11-27T12:30:00+00:00",
        "cleared_by": "Dr Ilona Marsh",
        "cleared_by_identifier": {
            "system": "https://harbourside-eye.example/fhir/sid/staff",
            "value": "S-0042",
        },
    }
    return note


@pytest.mark.parametrize(
    ("lens", "shown"),
    [
        ({"lens": LISTED_LENS, "magnification": 1.6}, LISTED_LENS),
        # Not on the site's list (or listed with other figures): shown as another lens.
        ({"lens": "site lens A", "magnification": 1.5}, "Another lens (type it in)"),
        ({"lens": LISTED_LENS, "magnification": 1.4}, "Another lens (type it in)"),
    ],
    ids=["listed", "not-listed", "listed-name-other-figures"],
)
def test_opening_a_note_shows_the_new_fields_and_saves_them_back_unchanged(
    clinic: Clinic, lens: dict[str, Any], shown: str
) -> None:
    note = with_new_fields(lens)
    with clinic.api() as api:
        stored = api.post("/notes", json=note)
        assert stored.status_code == 201, stored.text
        key = stored.json()["id"]
    page = clinic.page
    sign_in(page, clinic.token)
    type_label(page, "Open a stored note by record id", key)
    page.keyboard.press("Enter")
    expect(page.locator("#record-id")).to_have_text(key)
    same_note(clinic.last_check(), note)
    # Each part is in its own control.
    expect(page.get_by_label("Patient name")).to_have_value("Mereana Holt")
    expect(page.get_by_label("Date of birth")).to_have_value("1950-03-12")
    expect(page.get_by_label("Assistant or nurse present")).to_have_value("Nurse Tam Rivers")
    expect(page.get_by_label("Consent taken as")).to_have_value("verbal")
    expect(page.get_by_label("Kind of opacification")).to_have_value("pearl")
    for label, ticked in (
        ("Reduced vision", True),
        ("Glare", True),
        ("Reduced contrast", False),
        ("Double vision in this eye alone", False),
        ("Other symptom", True),
    ):
        box = page.get_by_label(label, exact=True)
        expect(box).to_be_checked() if ticked else expect(box).not_to_be_checked()
    expect(page.get_by_label("Symptoms in words")).to_have_value("haloes round lights at night")
    expect(page.get_by_label("Topical anaesthetic")).to_have_value("proxymetacaine 0.5 %")
    expect(page.get_by_label("Dilating drop 2: Drop and strength")).to_have_value(
        "phenylephrine 2,5 %"
    )
    expect(page.get_by_label("Pulse mode")).to_have_value("burst")
    expect(page.get_by_label("Pulses per burst")).to_have_value("2")
    expect(page.get_by_label("Offset or focus depth")).to_have_value("150")  # 0.15 mm
    expect(page.get_by_label("Complication 1: Kind")).to_have_value("anterior-uveitis")
    lens_list = page.get_by_label("Which contact lens")
    expect(lens_list.locator("option:checked")).to_have_text(shown)
    if shown == LISTED_LENS:
        expect(page.get_by_label("Lens name")).to_be_hidden()
        expect(page.locator("#lens-hint")).to_have_text(LISTED_HINT)
    else:
        expect(page.get_by_label("Lens name")).to_have_value(lens["lens"])
        expect(page.get_by_label("Lens magnification")).to_have_value(str(lens["magnification"]))
    # Changed elsewhere and saved from the form, the new version keeps all of it.
    key_in(page, page.get_by_label("Place (unit and room)"), "laser room 3", replace=True)
    press(page, "Save as draft")
    expect(page.locator("#notice")).to_contain_text("Saved as draft: version 2")
    with clinic.api() as api:
        again = api.get(f"/notes/{key}").json()["note"]
    same_note(again, {**note, "location": {"name": "laser room 3"}})
    assert again["laser"]["contact_lens"] == {"used": True, **lens}
    assert again["result"]["discharge"]["cleared_by_identifier"]["value"] == "S-0042"


# --- the controls for the rest of the contract ------------------------------------------------


def fill_new_fields(page: Page) -> None:
    """Every control the form gained, typed and picked by its label."""
    type_label(page, "Patient name", "Mereana Holt")
    type_label(page, "Date of birth", "12031950")
    type_label(page, "Assistant or nurse present", "Nurse Tam Rivers")
    choose(page, "Consent taken as", "Verbal")
    choose(page, "Kind of opacification", "Pearls")
    tick(page, "Reduced vision")
    tick(page, "Glare")
    tick(page, "Other symptom")
    type_label(page, "Symptoms in words", "haloes round lights at night")
    type_label(page, "Topical anaesthetic", "proxymetacaine 0.5 %")
    press(page, "Add a dilating drop")
    type_label(page, "Dilating drop 1: Drop and strength", "tropicamide 1 %")
    press(page, "Add a dilating drop")
    # A decimal comma inside a drop's name is the clinic's text, kept as typed.
    type_label(page, "Dilating drop 2: Drop and strength", "phenylephrine 2,5 %")
    choose(page, "Pulse mode", "Burst")
    type_label(page, "Pulses per burst", "2")
    choose(page, "Which contact lens", LISTED_LENS)
    press(page, "Add a complication")
    choose(page, "Complication 1: Kind", "Anterior uveitis")
    type_label(page, "Complication 1: Details", "mild flare")


def test_the_new_controls_typed_by_label_are_the_note_the_server_stores(clinic: Clinic) -> None:
    page = clinic.page
    sign_in(page, clinic.token)
    fill_routine(page)
    fill_new_fields(page)
    sent = clinic.last_check()
    # The parts as sent, key for key (nothing added that was not entered).
    assert sent["patient_details"] == {"name": "Mereana Holt", "birth_date": "1950-03-12"}
    assert sent["assistant"] == "Nurse Tam Rivers"
    assert sent["consent"]["kind"] == "verbal"
    assert sent["indication"] == {
        "opacification": "pearl",
        "symptoms": ["reduced-vision", "glare", "other"],
        "symptoms_text": "haloes round lights at night",
    }
    assert sent["before"]["topical_anaesthetic"] == "proxymetacaine 0.5 %"
    assert sent["before"]["dilating_drops"] == ["tropicamide 1 %", "phenylephrine 2,5 %"]
    assert (sent["laser"]["mode"], sent["laser"]["pulses_per_burst"]) == ("burst", 2)
    # A listed lens brings the site list's name and magnification.
    assert sent["laser"]["contact_lens"] == {
        "used": True,
        "lens": LISTED_LENS,
        "magnification": 1.6,
    }
    expect(page.locator("#lens-hint")).to_have_text(LISTED_HINT)
    press(page, "Save as draft")
    expect(page.locator("#notice")).to_contain_text("Saved as draft: version 1")
    key = page.locator("#record-id").inner_text().strip()
    with clinic.api() as api:
        stored = api.get(f"/notes/{key}").json()["note"]
    expected = with_new_fields({"lens": LISTED_LENS, "magnification": 1.6})
    del expected["result"]["discharge"]  # only the stored note of the other test has one
    same_note(stored, {**expected, "note_id": stored["note_id"]})


def test_burst_size_and_lens_fields_follow_the_choice_they_depend_on(clinic: Clinic) -> None:
    page = clinic.page
    sign_in(page, clinic.token)
    fill_routine(page)
    burst = page.get_by_label("Pulses per burst")
    choose(page, "Pulse mode", "Burst")
    expect(burst).to_be_visible()
    # Burst mode without its size: the server asks for it beside the field.
    burst.focus()
    page.keyboard.press("Tab")
    finding_beside(clinic, "Pulses per burst", "missing-field")
    type_label(page, "Pulses per burst", "3")
    assert clinic.last_check()["laser"]["pulses_per_burst"] == 3
    # Single pulse: the burst size is not shown and never sent.
    choose(page, "Pulse mode", "Single pulse")
    expect(burst).to_be_hidden()
    sent = clinic.last_check()
    assert sent["laser"]["mode"] == "single-pulse"
    assert "pulses_per_burst" not in sent["laser"]

    # Another lens: its own name and magnification (a decimal comma read as a decimal).
    choose(page, "Which contact lens", "Another lens")
    expect(page.get_by_label("Lens name")).to_have_value("")
    assert clinic.last_check()["laser"]["contact_lens"] == {"used": True}
    type_label(page, "Lens name", "wide-view lens, clinic stock")
    type_label(page, "Lens magnification", "1,4")
    assert clinic.last_check()["laser"]["contact_lens"] == {
        "used": True,
        "lens": "wide-view lens, clinic stock",
        "magnification": 1.4,
    }
    # A magnification outside the site's limits is refused at its own field.
    key_in(page, page.get_by_label("Lens magnification"), "7", replace=True)
    finding_beside(clinic, "Lens magnification", "out-of-range")
    # No lens used: which lens is neither asked nor sent.
    pick(page, "Capsulotomy contact lens", "Not used")
    expect(page.get_by_label("Which contact lens")).to_be_hidden()
    expect(page.get_by_label("Lens name")).to_be_hidden()
    assert clinic.last_check()["laser"]["contact_lens"] == {"used": False}

    # Up to five dilating drops (the contract's limit): the add button goes at five.
    for n in range(1, 6):
        press(page, "Add a dilating drop")
        type_label(page, f"Dilating drop {n}: Drop and strength", f"drop {n}")
    expect(page.get_by_role("button", name="Add a dilating drop")).to_be_hidden()
    press(page, "Remove dilating drop 2")
    expect(page.get_by_role("button", name="Add a dilating drop")).to_be_visible()
    assert clinic.last_check()["before"]["dilating_drops"] == [
        "drop 1",
        "drop 3",
        "drop 4",
        "drop 5",
    ]


def test_every_complication_kind_of_the_contract_is_offered(clinic: Clinic) -> None:
    page = clinic.page
    sign_in(page, clinic.token)
    fill_routine(page)
    press(page, "Add a complication")
    kind = page.get_by_label("Complication 1: Kind")
    values = kind.locator("option").evaluate_all("os => os.map((o) => o.value)")
    assert values == ["", *get_args(ComplicationKind)]
    # Each one can be picked from the keyboard by the first letters of its words.
    labels = kind.locator("option").all_inner_texts()[1:]
    assert len(set(labels)) == len(labels)
    for value, label in zip(get_args(ComplicationKind), labels, strict=True):
        page.wait_for_timeout(1100)  # the select's type-ahead starts afresh after a pause
        choose(page, "Complication 1: Kind", label)
        expect(kind).to_have_value(value)
    assert clinic.last_check()["result"]["complications"] == [{"kind": "other"}]
    # "Other" needs its description (the contract's rule), asked for beside the details
    # once the clinician has been there.
    page.get_by_label("Complication 1: Details").focus()
    page.keyboard.press("Tab")
    finding_beside(clinic, "Complication 1: Details", "missing-field")


def test_the_focus_offset_is_typed_in_micrometres_and_stored_in_millimetres(
    clinic: Clinic,
) -> None:
    # 1 mm = 1000 µm (SI prefixes, BIPM SI Brochure, 9th edition, table 7).
    page = clinic.page
    sign_in(page, clinic.token)
    fill_routine(page)  # types 150 (µm)
    offset = page.get_by_label("Offset or focus depth")
    assert clinic.last_check()["laser"]["focus"] == {
        "method": "posterior-offset",
        "distance_mm": 0.15,
    }
    expect(page.locator("label[for=focus-distance] .unit-said")).to_have_text(" (µm)")
    for typed, mm in (("87,5", 0.0875), ("1500", 1.5), ("0.1", 0.0001), ("250", 0.25)):
        key_in(page, offset, typed, replace=True)
        page.keyboard.press("Tab")
        assert clinic.last_check()["laser"]["focus"]["distance_mm"] == mm, typed
    expect(offset).to_have_value("250")
    # Findings about the distance (kept in mm by the contract) still sit beside this field:
    # 5000 µm is 5 mm, over the site's 3 mm limit.
    key_in(page, offset, "5000", replace=True)
    expect(finding_beside(clinic, "Offset or focus depth", "out-of-range")).to_contain_text("5")
    key_in(page, offset, "150", replace=True)
    page.keyboard.press("Tab")
    clinic.settle()
    page.emulate_media(media="print")
    expect(page.locator("#print-summary")).to_contain_text("posterior offset, 150 µm")
    page.emulate_media(media="screen")

    # A stored 0.2 mm shows as 200 µm and goes back as 0.2 mm.
    note = json.loads(json.dumps(ROUTINE))
    note["status"] = "draft"
    note["note_id"] = {**note["note_id"], "value": "LN-2026-0418"}
    note["laser"]["focus"]["distance_mm"] = 0.2
    with clinic.api() as api:
        stored = api.post("/notes", json=note)
        assert stored.status_code == 201, stored.text
        key = stored.json()["id"]
    type_label(page, "Open a stored note by record id", key)
    page.on("dialog", lambda dialog: dialog.accept())  # leave the unsaved note in the form
    page.keyboard.press("Enter")
    expect(page.locator("#record-id")).to_have_text(key)
    expect(offset).to_have_value("200")
    assert clinic.last_check()["laser"]["focus"]["distance_mm"] == 0.2


def test_the_print_names_the_patient_and_shows_the_treated_eye_large(clinic: Clinic) -> None:
    page = clinic.page
    sign_in(page, clinic.token)
    fill_routine(page)
    clinic.settle()
    page.emulate_media(media="print")
    summary = page.locator("#print-summary")
    # No name given: none printed (the patient ID still is).
    expect(summary.locator(".p-patient")).to_have_count(0)
    page.emulate_media(media="screen")
    type_label(page, "Patient name", "Mereana Holt")
    type_label(page, "Date of birth", "12031950")
    clinic.settle()
    page.emulate_media(media="print")
    eye = summary.locator(".p-head .p-eye")
    expect(eye).to_have_text("RIGHT EYE")
    expect(summary.locator(".p-head .p-patient")).to_have_text(
        "Mereana Holt, born 12 Mar 1950 · patient ID HX100234"
    )
    expect(summary).to_contain_text("Date of birth12 Mar 1950")
    # Prominent: at least twice the size of the summary's text, and above everything else.
    size = eye.evaluate("e => parseFloat(getComputedStyle(e).fontSize)")
    body = summary.evaluate("e => parseFloat(getComputedStyle(e).fontSize)")
    assert size >= 2 * body, (size, body)
    eye_box, grid_box = eye.bounding_box(), summary.locator(".p-grid").bounding_box()
    assert eye_box is not None
    assert grid_box is not None
    assert eye_box["y"] + eye_box["height"] <= grid_box["y"]
    pdf = page.pdf(format="A4", print_background=True, prefer_css_page_size=True)
    artifact("summary-patient.pdf").write_bytes(pdf)
    assert pdf_pages(pdf) == 1
    page.emulate_media(media="screen")
    # The left eye is printed as such.
    pick(page, "Eye treated", "Left eye")
    clinic.settle()
    page.emulate_media(media="print")
    expect(eye).to_have_text("LEFT EYE")
    page.emulate_media(media="screen")


def test_a_raised_risk_says_beside_the_due_dates_what_it_changes(clinic: Clinic) -> None:
    page = clinic.page
    sign_in(page, clinic.token)
    fill_routine(page)
    why = page.locator("#risk-why-list")
    # Routine: nothing recorded raises the risk, and the panel says so beside the dates.
    expect(why).to_contain_text("Routine risk")
    expect(why.locator(".risk-why-item")).to_have_count(0)
    # High myopia is a risk factor for retinal detachment after capsulotomy (AAO Preferred
    # Practice Pattern, Cataract in the Adult Eye), which brings the review forward.
    pick(page, "High myopia", "Yes")
    item = why.locator("li[data-code=high-myopia]")
    expect(item).to_contain_text("high myopia: review at 5-10 days instead of 21-42 days")
    expect(item.locator(".due-source")).to_contain_text("AAO Preferred Practice Pattern")
    # What the panel shows is the server's answer, word for word.
    with clinic.api() as api:
        answer = api.post("/notes/check", json=clinic.last_check()).json()
    reasons = answer["derived"]["risk"]["reasons"]
    assert [r["code"] for r in reasons] == ["high-myopia"]
    expect(item.locator(".risk-why-text")).to_have_text(
        f"{reasons[0]['text']}: {reasons[0]['changes']}"
    )
    # The raised review: 27 Nov 2026 + 7 days (the policy's raised-risk review) is Fri 4 Dec.
    expect(page.locator("#due-list li[data-kind=review] .due-when")).to_have_text("Fri 04 Dec 2026")
    page.locator("aside.panel").screenshot(path=artifact("panel-raised-risk.png"))
    page.emulate_media(media="print")
    printed = page.locator("#print-summary .p-why li[data-code=high-myopia]")
    expect(printed).to_contain_text("high myopia: review at 5-10 days instead of 21-42 days")
    expect(printed.locator(".p-src")).to_contain_text("AAO Preferred Practice Pattern")
    page.emulate_media(media="screen")
    # Back to not recorded: no reason is left (not recorded is never read as present).
    pick(page, "High myopia", "Not recorded")
    expect(why.locator(".risk-why-item")).to_have_count(0)
