"""Plain-text reports of findings and due items, for the terminal and for files."""

from __future__ import annotations

import re
from collections import Counter
from collections.abc import Iterable, Sequence

from capnote.derive import Derived
from capnote.findings import Finding, Severity
from capnote.schedule import DueItem

CAUTION = (
    "Thresholds are literature defaults, overridable per site; local protocol and the "
    "treating clinician decide. capnote is not a certified medical device."
)


# C0 and C1 controls, DEL, and the bidirectional overrides and isolates: a key name or a
# file name holding them could move the cursor, erase the error line and print a fake "ok",
# or reorder what a terminal shows.
_UNPRINTABLE = re.compile("[\x00-\x1f\x7f-\x9f\u061c\u200e\u200f\u202a-\u202e\u2066-\u2069]")


def printable(text: str) -> str:
    """Text safe for a terminal or a text file: every control character as a visible escape."""
    return _UNPRINTABLE.sub(lambda m: f"\\u{ord(m[0]):04x}", text)


def finding_line(f: Finding) -> str:
    """One finding on one line: severity, location, code, message and where the rule is from."""
    where = f.location or "(payload)"
    text = f"  {f.severity.value:<11} {where}  [{f.code}] {f.message}"
    if f.allowed:
        text += f"; allowed: {f.allowed}"
    if f.source:
        text += f" (source: {f.source})"
    return printable(text)


def due_line(item: DueItem) -> str:
    """One due item: what, when, and whether it moved."""
    fmt = "%a %d %b %Y" if item.all_day else "%a %d %b %Y %H:%M %Z"
    text = f"  {item.title}: {item.target.strftime(fmt)}"
    text += f" (window {item.earliest.strftime(fmt)} to {item.latest.strftime(fmt)})"
    moved = item.moved_text(lambda m: m.strftime(fmt))
    if moved is not None:
        text += f"; {moved}"
    starts = item.earliest_text(lambda m: m.strftime(fmt))
    if starts is not None:
        text += f"; {starts}"
    if item.flag:
        text += f"; {item.flag}"
    if item.done_by_reading is not None:
        text += "; done (reading in this note)"
    return text


def derived_lines(d: Derived) -> list[str]:
    """The derived values a clinician reads first."""
    lines = [
        f"  energy: {d.total_energy_mj:g} mJ in {d.total_pulses} pulses "
        f"(mean {d.mean_pulse_energy_mj:g}, highest {d.highest_pulse_energy_mj:g} mJ; "
        f"band {d.energy_band.label}); this eye so far: {d.cumulative.cumulative_energy_mj:g} mJ "
        f"over {d.cumulative.session_number} session(s)",
    ]
    if d.opening is not None:
        shape = " (round: one diameter measured)" if d.opening.round_assumed else ""
        ratio = (
            f", widest diameter {d.opening.ratio_to_optic:g} of the optic diameter"
            if d.opening.ratio_to_optic is not None
            else ", optic diameter not recorded"
        )
        lines.append(f"  opening: {d.opening.area_mm2:g} mm2{shape}{ratio}")
    if d.iop.highest is not None:
        lines.append(
            f"  IOP: highest change {d.iop.highest.change_mmhg:+g} mmHg "
            f"at {d.iop.highest.minutes_after:g} min (spike grade {d.iop.spike_grade})"
        )
    if d.acuity.change_logmar is not None:
        lines.append(f"  acuity: logMAR {d.acuity.before_logmar:g} -> {d.acuity.after_logmar:g}")
    spot = d.focal_spot
    lines.append(
        f"  idealised focus: {spot.airy_diameter_um:.1f} um spot, peak fluence "
        f"{spot.peak_fluence_j_cm2:.3g} J/cm2 at {spot.pulse_energy_mj:g} mJ "
        f"(estimate, not a measurement)"
    )
    reasons = ", ".join(r.text for r in d.risk.reasons)
    lines.append(f"  risk: {d.risk.level}" + (f" ({reasons})" if reasons else ""))
    return lines


def counts(findings: Iterable[Finding]) -> Counter[Severity]:
    """How many findings of each severity."""
    return Counter(f.severity for f in findings)


def summary(per_file: Sequence[Sequence[Finding]]) -> str:
    """The closing line of a multi-file check."""
    total: Counter[Severity] = Counter()
    failed = 0
    for findings in per_file:
        c = counts(findings)
        total += c
        failed += 1 if c[Severity.ERROR] else 0
    return (
        f"{len(per_file)} file(s): {len(per_file) - failed} without errors, {failed} with errors; "
        f"{total[Severity.ERROR]} error(s), {total[Severity.WARNING]} warning(s), "
        f"{total[Severity.INFORMATION]} information"
    )
