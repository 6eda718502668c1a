"""The site policy as typed data: limits (errors), thresholds (warnings), schedule and calendar.

Every value carries its source so that a finding can say where its threshold came from.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from datetime import date, time
from functools import cached_property
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

Weekday = Literal["mon", "tue", "wed", "thu", "fri", "sat", "sun"]
WEEKDAYS: tuple[Weekday, ...] = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")


class PolicyPart(BaseModel):
    """Base of every policy table: unknown keys are refused so typos cannot pass silently,
    and so is a number that is not finite (NaN would make every comparison false and so
    silence the check that reads it)."""

    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


# UCUM codes that read badly in a sentence, and what people write instead.
_SPOKEN_UNITS = {
    "mm[Hg]": "mmHg",
    "{pulses}": "pulses",
    "{logMAR}": "logMAR",
    "/d": "per day",
    "1": "times",
}


def spoken_unit(ucum: str) -> str:
    """A UCUM code as people write it."""
    return _SPOKEN_UNITS.get(ucum, ucum)


class Range(PolicyPart):
    """An allowed range; ``above`` is an exclusive lower bound (for "must be more than 0")."""

    min: float | None = None
    above: float | None = None
    max: float | None = None
    unit: str
    source: str

    @cached_property
    def bounds(self) -> tuple[float, float, float]:
        """(lowest allowed, exclusive lower bound, highest allowed), open ends infinite: the
        checks compare every number of every note against these, so they are worked out once."""
        return (
            -math.inf if self.min is None else self.min,
            -math.inf if self.above is None else self.above,
            math.inf if self.max is None else self.max,
        )

    def contains(self, value: float) -> bool:
        """True when value lies inside the range."""
        low, above, high = self.bounds
        return low <= value <= high and value > above

    def describe(self) -> str:
        """The range in words, with its unit, for findings."""
        parts: list[str] = []
        if self.min is not None:
            parts.append(f">= {self.min:g}")
        if self.above is not None:
            parts.append(f"> {self.above:g}")
        if self.max is not None:
            parts.append(f"<= {self.max:g}")
        return " and ".join(parts) + f" {spoken_unit(self.unit)}"


class Number(PolicyPart):
    """One threshold value."""

    value: float
    unit: str
    source: str


class Bands(PolicyPart):
    """Ascending cut points that split a scale into bands."""

    values: list[float] = Field(min_length=1)
    unit: str
    source: str

    @model_validator(mode="after")
    def _ascending(self) -> Bands:
        if sorted(self.values) != self.values:
            raise ValueError("band cut points must ascend")
        return self


class Choice(PolicyPart):
    """A set of codes a rule treats alike."""

    values: list[str]
    source: str


class Tolerance(PolicyPart):
    """How far a reported figure may stray from the computed one: the larger of the two."""

    percent: float = Field(ge=0)
    mj: float = Field(ge=0)
    source: str


class Limits(PolicyPart):
    """Hard limits: a value outside is an error."""

    iop_mmhg: Range
    pulse_energy_mj: Range
    pulses_per_series: Range
    wavelength_nm: Range
    focus_distance_mm: Range
    lens_magnification: Range
    pulses_per_burst: Range
    cone_angle_deg: Range
    opening_mm: Range
    iol_optic_mm: Range
    axial_length_mm: Range
    logmar: Range
    drop_strength_percent: Range
    drop_times_per_day: Range
    drop_days: Range
    iop_recheck_minutes: Range
    review_days: Range
    future_tolerance_minutes: Number
    total_energy_tolerance: Tolerance


class Thresholds(PolicyPart):
    """Clinical thresholds: crossing one is a warning."""

    wavelength_nm: Number
    usual_pulse_energy_max_mj: Number
    total_energy_bands_mj: Bands
    glaucoma_total_energy_mj: Number
    iop_rise_moderate_mmhg: Number
    iop_rise_severe_mmhg: Number
    iop_high_mmhg: Number
    iop_normal_max_mmhg: Number
    opening_min_mm: Number
    posterior_offset_mm: Range
    manual_focus_mm: Range
    days_after_cataract_surgery: Number
    rd_axial_length_mm: Number
    cone_angle_without_lens_deg: Number
    cone_angle_with_lens_deg: Number
    glaucoma_severities: Choice


class Window(PolicyPart):
    """A due item's window, as offsets from the end of the session."""

    def span(self) -> str:
        """The window in words: "5-10 days"."""
        unit = {"min": "minutes", "h": "hours", "d": "days"}[self.unit]
        return f"{self.earliest}-{self.latest} {unit}"

    unit: Literal["min", "h", "d"]
    earliest: int = Field(ge=0)
    target: int = Field(ge=0)
    latest: int = Field(ge=0)
    source: str

    @model_validator(mode="after")
    def _ordered(self) -> Window:
        if not self.earliest <= self.target <= self.latest:
            raise ValueError("a window needs earliest <= target <= latest")
        return self


class NextDayWindow(Window):
    """The next-day IOP check, with the glaucoma severities that call for it."""

    glaucoma_severities: list[str]


class Schedule(PolicyPart):
    """Follow-up windows."""

    iop_recheck: Window
    next_day_iop: NextDayWindow
    review_routine: Window
    review_raised: Window


class CalendarPolicy(PolicyPart):
    """The clinic's open days and hours."""

    timezone: str
    holiday_country: str | None
    holiday_subdivision: str | None = None
    working_days: list[Weekday] = Field(min_length=1)
    opens: time
    closes: time
    closures: list[date] = []
    source: str

    @model_validator(mode="after")
    def _hours(self) -> CalendarPolicy:
        if self.opens >= self.closes:
            raise ValueError("the clinic must open before it closes")
        return self


# The codes of the clinical (never blocking) findings of capnote.rules.clinical whose
# severity a site may set. A code that is not here cannot be named in [severity] (a typo
# fails loudly); a code a check emits that has no entry keeps the severity its check gave.
CLINICAL_FINDING_CODES: frozenset[str] = frozenset(
    {
        "acuity-correction-not-recorded",
        "cme-risk",
        "consent-not-recorded",
        "focus-outside-usual",
        "glaucoma-no-prophylaxis",
        "glaucoma-not-recorded",
        "glaucoma-total-energy",
        "iol-pit-on-axis",
        "iop-action-unresolved",
        "iop-after-missing",
        "iop-high",
        "iop-rise-moderate",
        "iop-rise-severe",
        "no-contact-lens",
        "no-prophylaxis",
        "opening-larger-than-optic",
        "opening-off-centre",
        "opening-small",
        "optic-diameter-not-recorded",
        "pulse-energy-above-usual",
        "rd-warning-not-given",
        "risk-factors-not-recorded",
        "soon-after-cataract-surgery",
        "total-energy-band",
        "total-energy-highest-band",
        "wavelength-unusual",
    }
)

# The reason codes capnote.derive.risk() gives for a raised risk level.
RISK_REASON_CODES: frozenset[str] = frozenset(
    {
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
)

# The levels a site may give a clinical finding: never "error" (a policy cannot make a
# clinical question block saving) and never "off" (nor silence it).
SeverityLevel = Literal["warning", "information"]


class SeverityPolicy(PolicyPart):
    """How much one clinical finding matters at this site."""

    level: SeverityLevel
    source: str


class RiskReasonPolicy(PolicyPart):
    """One reason that raises the risk level: what it is, what it changes, and why."""

    text: str = Field(min_length=1)
    changes: str = Field(min_length=1)
    source: str


class ContactLensPolicy(PolicyPart):
    """One capsulotomy contact lens the site keeps: the name the form offers and its
    laser-spot magnification, which steepens the focal cone (capnote.derive)."""

    name: str = Field(min_length=1, max_length=100)
    magnification: float | None = None
    source: str


Region = Literal["england", "united-states"]
ReferenceMode = Literal["identifier", "conditional", "literal"]


class RecordPolicy(PolicyPart):
    """How the emitted FHIR record is coded and linked at this site.

    region picks the national code systems beside SNOMED CT (capnote.fhir.regions);
    references picks how patient, encounter and performer are referred to
    (capnote.fhir.common.References): by identifier only, by a conditional reference the
    receiver resolves inside the transaction, or by a literal reference under
    reference_base."""

    region: Region
    references: ReferenceMode = "identifier"
    reference_base: str | None = None
    # CPT 66821's global period in days, for United States sites; unset, none is stated
    # (sources disagree: clinical-practice.md).
    cpt_global_period_days: int | None = Field(default=None, ge=0, le=365)
    source: str

    @model_validator(mode="after")
    def _base_for_literal(self) -> RecordPolicy:
        base = self.reference_base
        if base is not None and not base.startswith(("https://", "http://")):
            raise ValueError(f"reference_base {base!r} must be an http(s) URL")
        if self.references == "literal" and base is None:
            raise ValueError("references = 'literal' needs reference_base, the receiver's base")
        return self


def _unknown(found: Iterable[str], known: frozenset[str], what: str) -> None:
    unknown = sorted(set(found) - known)
    if unknown:
        raise ValueError(f"unknown {what}: {', '.join(unknown)}")


class Policy(PolicyPart):
    """The whole site policy."""

    policy_name: str
    limits: Limits
    thresholds: Thresholds
    schedule: Schedule
    calendar: CalendarPolicy
    record: RecordPolicy
    # Finding code -> level. Absent codes keep the severity their check gives.
    severity: dict[str, SeverityPolicy] = {}
    # Risk reason code -> what it means and changes; every code of derive.risk() is here.
    risk_reasons: dict[str, RiskReasonPolicy]
    # The site's capsulotomy contact lenses, as the form offers them; a site file's list
    # replaces this one.
    contact_lenses: list[ContactLensPolicy] = []

    @field_validator("severity")
    @classmethod
    def _known_findings(cls, value: dict[str, SeverityPolicy]) -> dict[str, SeverityPolicy]:
        _unknown(value, CLINICAL_FINDING_CODES, "clinical finding code")
        return value

    @field_validator("risk_reasons")
    @classmethod
    def _known_reasons(cls, value: dict[str, RiskReasonPolicy]) -> dict[str, RiskReasonPolicy]:
        _unknown(value, RISK_REASON_CODES, "risk reason code")
        missing = sorted(RISK_REASON_CODES - set(value))
        if missing:
            raise ValueError(f"risk reasons without an entry: {', '.join(missing)}")
        return value

    @model_validator(mode="after")
    def _risk_texts_fill_in(self) -> Policy:
        for code in self.risk_reasons:
            try:
                self.risk_changes(code)
            except (KeyError, IndexError, ValueError) as exc:
                raise ValueError(
                    f"risk_reasons.{code}.changes: only {{review_raised}} and "
                    f"{{review_routine}} may stand in braces ({exc!r})"
                ) from exc
        return self

    @model_validator(mode="after")
    def _lenses_in_limits(self) -> Policy:
        bounds = self.limits.lens_magnification
        for lens in self.contact_lenses:
            if lens.magnification is not None and not bounds.contains(lens.magnification):
                raise ValueError(
                    f"contact lens {lens.name!r}: magnification {lens.magnification:g} is "
                    f"outside limits.lens_magnification ({bounds.describe()})"
                )
        return self

    def risk_changes(self, code: str) -> str:
        """What a risk reason changes in the follow-up, with this policy's own windows."""
        return self.risk_reasons[code].changes.format(
            review_raised=self.schedule.review_raised.span(),
            review_routine=self.schedule.review_routine.span(),
        )

    def level_of(self, code: str) -> SeverityLevel | None:
        """The site's level for a clinical finding code, or None when the policy has none."""
        entry = self.severity.get(code)
        return None if entry is None else entry.level
