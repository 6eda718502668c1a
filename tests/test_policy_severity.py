"""The policy's [severity] and [risk_reasons] tables, and check_note applying the severity."""

from __future__ import annotations

import json
from datetime import timedelta
from pathlib import Path
from typing import Any

import pytest

from capnote.derive import energy_band, iop_course, risk
from capnote.errors import PolicyError
from capnote.findings import Finding, Severity
from capnote.note import IopReading, RiskFactors, TimedIopReading
from capnote.policy import (
    CLINICAL_FINDING_CODES,
    RISK_REASON_CODES,
    Policy,
    SeverityPolicy,
    load_policy,
)
from capnote.policy.loader import default_policy_data
from capnote.rules import Context, check_payload, graded
from tests.conftest import NOW, routine

# The clinical (never blocking) finding codes of service/capnote/rules/clinical.py and the severity
# each check gives, written out by hand from its warning(...) and information(...) calls.
# An explicit list rather than a scan of the source: reading code as text breaks on the
# first reformatting. When a check is added there, add its code here and to
# service/capnote/policy/model.py CLINICAL_FINDING_CODES and default.toml [severity].
CHECK_SEVERITY: dict[str, str] = {
    "pulse-energy-above-usual": "warning",
    "total-energy-band": "warning",
    "total-energy-highest-band": "warning",
    "glaucoma-total-energy": "warning",
    "wavelength-unusual": "warning",
    "iop-after-missing": "warning",
    "iop-rise-moderate": "warning",
    "iop-rise-severe": "warning",
    "iop-high": "warning",
    "iop-action-unresolved": "warning",
    "glaucoma-not-recorded": "warning",
    "risk-factors-not-recorded": "warning",
    "acuity-correction-not-recorded": "information",
    "optic-diameter-not-recorded": "information",
    "glaucoma-no-prophylaxis": "warning",
    "no-prophylaxis": "information",
    "no-contact-lens": "warning",
    "focus-outside-usual": "warning",
    "opening-larger-than-optic": "warning",
    "opening-small": "warning",
    "opening-off-centre": "warning",
    "soon-after-cataract-surgery": "warning",
    "cme-risk": "warning",
    "rd-warning-not-given": "warning",
    "consent-not-recorded": "warning",
    "iol-pit-on-axis": "warning",
}

# The reason codes service/capnote/derive.py risk() adds, written out by hand from its
# add(...) calls (an explicit list, for the same reason as above).
RISK_CODES = {
    "glaucoma",
    "high-myopia",
    "axial-length",
    "uveitis",
    "diabetic-macular-oedema",
    "retinal-detachment-history",
    "lattice-degeneration",
    "vitreous-loss",
    "iop-spike",
    "iop-high",
    "total-energy",
}


def site(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "site.toml"
    path.write_text(text)
    return path


def findings(data: dict[str, Any], policy: Policy) -> list[Finding]:
    _, found = check_payload(json.dumps(data), Context(policy, NOW))
    return found


def total_45_mj() -> dict[str, Any]:
    # Chawla et al., ESCRS 2014 abstract: 45 mJ lies in the 40-80 mJ band.
    note = routine()
    note["laser"].update(series=[{"energy_mj": 1.5, "pulses": 30}], reported_total_energy_mj=None)
    return note


def one(found: list[Finding], code: str) -> Finding:
    [f] = [f for f in found if f.code == code]
    return f


# --- the table ---------------------------------------------------------------------------


def test_the_table_covers_every_clinical_code() -> None:
    table = default_policy_data()["severity"]
    assert set(table) == set(CHECK_SEVERITY) == CLINICAL_FINDING_CODES


def test_every_default_level_is_the_checks_own_but_the_energy_band() -> None:
    # Chawla et al., ESCRS 2014 bands; Verma & Ahuja, Delhi J Ophthalmol 2020 (mean total
    # 58.6 +/- 34.6 mJ): a total in the 40-80 mJ band alone is information, not a warning.
    levels = {code: entry.level for code, entry in load_policy().severity.items()}
    assert levels["total-energy-band"] == "information"
    changed = {c for c, level in levels.items() if level != CHECK_SEVERITY[c]}
    assert changed == {"total-energy-band"}


def test_every_level_names_its_source() -> None:
    for code, entry in default_policy_data()["severity"].items():
        assert entry["source"].strip(), code
    table = default_policy_data()["severity"]
    not_recorded = "capnote contract: not recorded is not absent"
    for code in ("glaucoma-not-recorded", "risk-factors-not-recorded"):
        assert table[code] == {"level": "warning", "source": not_recorded}
    assert table["iop-action-unresolved"]["source"].startswith("Chawla et al., ESCRS 2014")


# --- a site's own levels -------------------------------------------------------------------


def test_a_site_sets_a_level_with_a_bare_word(tmp_path: Path) -> None:
    policy = load_policy(site(tmp_path, '[severity]\n"total-energy-band" = "warning"\n'))
    entry = policy.severity["total-energy-band"]
    assert entry == SeverityPolicy(level="warning", source="site policy (site.toml)")
    assert policy.severity["no-prophylaxis"].level == "information"  # the others stay


def test_a_site_sets_a_level_with_a_table(tmp_path: Path) -> None:
    text = '[severity."no-prophylaxis"]\nlevel = "warning"\nsource = "our protocol"\n'
    entry = load_policy(site(tmp_path, text)).severity["no-prophylaxis"]
    assert (entry.level, entry.source) == ("warning", "our protocol")


@pytest.mark.parametrize("level", ["error", "fatal", "off", "none", "", "Warning"])
def test_a_policy_can_neither_block_nor_silence_a_finding(tmp_path: Path, level: str) -> None:
    with pytest.raises(PolicyError, match=r"severity\.total-energy-band\.level"):
        load_policy(site(tmp_path, f'[severity]\n"total-energy-band" = "{level}"\n'))


def test_an_unknown_finding_code_is_refused(tmp_path: Path) -> None:
    text = '[severity]\n"total-energy-bnad" = { level = "warning", source = "typo" }\n'
    with pytest.raises(PolicyError, match="unknown clinical finding code: total-energy-bnad"):
        load_policy(site(tmp_path, text))


def test_a_blocking_code_cannot_be_given_a_level(tmp_path: Path) -> None:
    text = '[severity]\n"out-of-range" = { level = "warning", source = "no" }\n'
    with pytest.raises(PolicyError, match="unknown clinical finding code: out-of-range"):
        load_policy(site(tmp_path, text))


# --- check_note applies it -------------------------------------------------------------------


def test_the_energy_band_is_information_by_default(policy: Policy) -> None:
    f = one(findings(total_45_mj(), policy), "total-energy-band")
    assert (f.severity, f.issue_type) == (Severity.INFORMATION, "informational")
    assert f.location == "laser.series"
    assert f.source == policy.thresholds.total_energy_bands_mj.source  # still the threshold's


def test_information_comes_after_the_warnings(policy: Policy) -> None:
    found = findings(total_45_mj(), policy)
    order = [f.severity for f in found]
    assert order == sorted(
        order, key=[Severity.ERROR, Severity.WARNING, Severity.INFORMATION].index
    )


def test_a_site_makes_the_energy_band_a_warning_again(tmp_path: Path) -> None:
    policy = load_policy(site(tmp_path, '[severity]\n"total-energy-band" = "warning"\n'))
    f = one(findings(total_45_mj(), policy), "total-energy-band")
    assert (f.severity, f.issue_type) == (Severity.WARNING, "business-rule")


def test_a_site_raises_information_to_a_warning(tmp_path: Path, policy: Policy) -> None:
    note = routine()
    note["plan"]["prophylaxis"] = []
    before = one(findings(note, policy), "no-prophylaxis")
    assert (before.severity, before.issue_type) == (Severity.INFORMATION, "informational")
    raised = load_policy(site(tmp_path, '[severity]\n"no-prophylaxis" = "warning"\n'))
    after = one(findings(note, raised), "no-prophylaxis")
    assert (after.severity, after.issue_type) == (Severity.WARNING, "business-rule")
    assert not after.blocking


def test_a_site_lowers_a_warning_but_never_blocks_saving(tmp_path: Path) -> None:
    note = routine()
    note["consent"]["given"] = False
    policy = load_policy(site(tmp_path, '[severity]\n"consent-not-recorded" = "information"\n'))
    found = findings(note, policy)
    f = one(found, "consent-not-recorded")
    assert (f.severity, f.issue_type) == (Severity.INFORMATION, "informational")
    assert not any(f.blocking for f in found)


def test_errors_are_never_changed(policy: Policy) -> None:
    note = routine()
    note["before"]["iop"]["value_mmhg"] = 200  # outside the 0-80 mmHg limit
    found = findings(note, policy)
    assert any(f.severity is Severity.ERROR and f.code == "out-of-range" for f in found)
    # Even an error that carried a listed code would stay an error.
    err = Finding(
        severity=Severity.ERROR,
        code="total-energy-band",
        location="laser.series",
        message="m",
        rule="r",
    )
    assert graded(err, Context(policy, NOW)) is err


def test_a_code_the_table_lacks_keeps_its_checks_severity(policy: Policy) -> None:
    ctx = Context(policy, NOW)
    new = Finding(
        severity=Severity.WARNING,
        code="a-code-added-later",
        location="laser",
        message="m",
        rule="r",
    )
    assert graded(new, ctx) is new
    bare = Context(policy.model_copy(update={"severity": {}}), NOW)
    band = Finding(
        severity=Severity.WARNING,
        code="total-energy-band",
        location="laser.series",
        message="m",
        rule="r",
    )
    assert graded(band, bare) is band


def test_a_finding_already_at_its_level_is_left_as_it_is(policy: Policy) -> None:
    f = Finding(
        severity=Severity.WARNING,
        code="consent-not-recorded",
        location="consent.given",
        message="m",
        rule="r",
    )
    assert graded(f, Context(policy, NOW)) is f


# --- risk reasons ----------------------------------------------------------------------------


def test_every_risk_reason_of_derive_has_an_entry() -> None:
    policy = load_policy()
    assert set(policy.risk_reasons) == RISK_CODES == RISK_REASON_CODES
    for code, entry in policy.risk_reasons.items():
        assert entry.text.strip(), code
        assert entry.changes.strip(), code
        assert entry.source.strip(), code


def test_the_reasons_derive_gives_are_all_in_the_table(policy: Policy) -> None:
    # Every factor at once, a severe rise to 35 mmHg and 100 mJ: each add() in risk() fires.
    factors = RiskFactors(
        glaucoma="advanced",
        high_myopia=True,
        axial_length_mm=27.0,
        uveitis=True,
        diabetic_macular_oedema=True,
        retinal_detachment_fellow_eye=True,
        lattice_degeneration=True,
        vitreous_loss_at_cataract_surgery=True,
    )
    t = policy.thresholds
    before = IopReading(value_mmhg=15, method="applanation")
    after = [TimedIopReading(value_mmhg=35, method="applanation", measured_at=NOW)]
    course = iop_course(before, after, NOW - timedelta(hours=1), t)
    result = risk(factors, course, energy_band(100, t.total_energy_bands_mj), policy)
    assert {r.code for r in result.reasons} == RISK_CODES
    assert {r.code for r in result.reasons} <= set(policy.risk_reasons)


def test_what_each_reason_changes_follows_the_schedule(policy: Policy) -> None:
    routine_w, raised_w = policy.schedule.review_routine, policy.schedule.review_raised
    raised = f"review at {raised_w.earliest}-{raised_w.latest} days"
    instead = f"instead of {routine_w.earliest}-{routine_w.latest} days"
    for code in policy.risk_reasons:
        assert policy.risk_changes(code).startswith(f"{raised} {instead}"), code
    # A severe rise or an IOP at the action level also calls for a next-day check
    # (Nesher & Kolker, Trans Am Ophthalmol Soc 1990; capnote.schedule.next_day_reasons).
    for code in ("iop-high", "iop-spike", "glaucoma"):
        assert "next-day IOP check" in policy.risk_reasons[code].changes, code


def test_a_site_rewords_a_reason_and_takes_the_source(tmp_path: Path) -> None:
    text = '[risk_reasons.uveitis]\nchanges = "review at 3 days"\n'
    entry = load_policy(site(tmp_path, text)).risk_reasons["uveitis"]
    assert (entry.text, entry.changes, entry.source) == (
        "uveitis",
        "review at 3 days",
        "site policy (site.toml)",
    )


def test_an_unknown_risk_reason_is_refused(tmp_path: Path) -> None:
    text = '[risk_reasons.myopia]\ntext = "x"\nchanges = "y"\nsource = "z"\n'
    with pytest.raises(PolicyError, match="unknown risk reason code: myopia"):
        load_policy(site(tmp_path, text))


def test_a_reason_without_an_entry_is_refused() -> None:
    data = default_policy_data()
    del data["risk_reasons"]["iop-high"]
    with pytest.raises(ValueError, match="risk reasons without an entry: iop-high"):
        Policy.model_validate(data)
