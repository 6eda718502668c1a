"""The note contract: one Nd:YAG posterior capsulotomy session, as the sender gives it.

The models check shape and type only (what a value *is*). Ranges that a site may tune, and
every rule that spans several fields, live in capnote.rules so that they can come back as
findings with a source, not as bare parse errors. Field names are plain English or the
trade's own terms; see schemas/README.md for the contract's rules.
"""

from __future__ import annotations

import math
from datetime import date
from typing import Annotated, Any, Literal

from pydantic import (
    AwareDatetime,
    BaseModel,
    ConfigDict,
    Field,
    StringConstraints,
    model_validator,
)

# Control characters (NUL above all) are refused everywhere: databases cannot store some,
# and none belongs in a clinical note.
Text = Annotated[
    str,
    StringConstraints(
        strip_whitespace=True, min_length=1, max_length=200, pattern=r"^[^\x00-\x1f\x7f]+$"
    ),
]
Uri = Annotated[
    str,
    StringConstraints(
        strip_whitespace=True, min_length=3, max_length=255, pattern=r"^[^\s\x00-\x1f\x7f]+$"
    ),
]
IdValue = Annotated[
    str,
    StringConstraints(
        strip_whitespace=True, min_length=1, max_length=64, pattern=r"^[^\s\x00-\x1f\x7f]+$"
    ),
]

# Whole numbers stay inside 32 bits: the site's limits judge the range, and no count in a
# note comes near this, but an unbounded JSON integer would overflow arithmetic later on.
Count = Annotated[int, Field(ge=-(2**31), le=2**31 - 1)]

Eye = Literal["right", "left"]
IopMethod = Literal["applanation", "rebound", "non-contact", "other"]
# "qualitative" takes CF, HM, LP or NLP: recorded as entered, with no logMAR.
AcuityNotation = Literal["snellen-metric", "snellen-imperial", "decimal", "logmar", "qualitative"]
AcuityCorrection = Literal["best-corrected", "habitual", "uncorrected", "pinhole"]
GlaucomaSeverity = Literal["none", "suspect", "mild", "moderate", "advanced"]
IolMaterial = Literal["hydrophobic-acrylic", "hydrophilic-acrylic", "silicone", "pmma", "other"]
IolPosition = Literal["bag", "sulcus"]
FocusMethod = Literal["posterior-offset", "manual-behind-capsule"]
OpeningPattern = Literal["cruciate", "circular", "other"]
Outcome = Literal["complete", "partial", "failed"]
ComplicationKind = Literal[
    "iol-pit",
    "iris-bleeding",
    "bleeding",
    "iop-spike",
    "anterior-uveitis",
    "cystoid-macular-oedema",
    "retinal-detachment",
    "vitreous-in-anterior-chamber",
    "iol-decentration",
    "iol-dislocation",
    "other",
]
Opacification = Literal["fibrous", "pearl", "mixed"]
Symptom = Literal["reduced-vision", "glare", "reduced-contrast", "monocular-diplopia", "other"]
LaserMode = Literal["single-pulse", "burst"]
ConsentKind = Literal["written", "verbal"]
DropTiming = Literal["before", "after", "both"]
NoteStatus = Literal["draft", "final"]


class Contract(BaseModel):
    """Base for every part of the note: unknown fields are refused, not dropped."""

    # strict: "2" is not a number and "yes" is not a boolean; notes are parsed from JSON, where
    # strict mode still reads dates and date-times from their ISO strings.
    model_config = ConfigDict(extra="forbid", frozen=True, strict=True, allow_inf_nan=False)


class Identifier(Contract):
    """A business identifier: the namespace (a URI) and the value inside it."""

    system: Uri
    value: IdValue


class Clinician(Contract):
    """The clinician who performed the laser session."""

    identifier: Identifier
    name: Text


class Location(Contract):
    """Where the session took place."""

    name: Text
    identifier: Identifier | None = None


class Consent(Contract):
    """Whether consent was given, how, and when it was recorded."""

    given: bool
    kind: ConsentKind | None = None
    recorded_at: AwareDatetime | None = None


class PatientDetails(Contract):
    """Who the patient is, for the print only when the sender gives it; never in FHIR output
    (the receiving record holds the patient) and never shown in findings."""

    name: Text
    birth_date: date | None = None


class Indication(Contract):
    """Why the laser: the kind of opacification and what troubles the patient."""

    opacification: Opacification | None = None
    symptoms: Annotated[list[Symptom], Field(max_length=5)] = []
    symptoms_text: Text | None = None


class VisualAcuity(Contract):
    """Visual acuity as entered; logMAR is derived, never asked for twice."""

    notation: AcuityNotation
    value: Annotated[
        str,
        StringConstraints(
            strip_whitespace=True, min_length=1, max_length=16, pattern=r"^[^\x00-\x1f\x7f]+$"
        ),
    ]
    # None: not recorded. No correction is assumed (the LOINC best-corrected codes need one).
    correction: AcuityCorrection | None = None


class IopReading(Contract):
    """One intraocular pressure reading."""

    value_mmhg: float
    method: IopMethod
    measured_at: AwareDatetime | None = None


class TimedIopReading(IopReading):
    """A post-laser IOP reading: its time is required, so the rise can be dated."""

    measured_at: AwareDatetime


class Iol(Contract):
    """The intraocular lens behind the capsule; every item may be left not recorded (None)."""

    optic_diameter_mm: float | None = None
    optic_material: IolMaterial | None = None
    position: IolPosition | None = None


class RiskFactors(Contract):
    """Risk factors for retinal detachment, CME and IOP rise.

    Each is three-valued: true (recorded present), false (recorded absent) or omitted/null
    (not recorded). Not recorded is never read as absent: the checks that need an item say
    that they could not run.
    """

    glaucoma: GlaucomaSeverity | None = None
    high_myopia: bool | None = None
    axial_length_mm: float | None = None
    uveitis: bool | None = None
    diabetic_macular_oedema: bool | None = None
    retinal_detachment_this_eye: bool | None = None
    retinal_detachment_fellow_eye: bool | None = None
    lattice_degeneration: bool | None = None
    vitreous_loss_at_cataract_surgery: bool | None = None


class BeforeLaser(Contract):
    """Findings before the laser."""

    iop: IopReading
    visual_acuity: VisualAcuity | None = None
    pupil_dilated: bool
    iol: Iol = Iol()
    cataract_surgery_date: date | None = None
    risk_factors: RiskFactors = RiskFactors()
    topical_anaesthetic: Text | None = None
    dilating_drops: Annotated[list[Text], Field(max_length=5)] = []


class Series(Contract):
    """One run of pulses at one energy setting."""

    energy_mj: float
    pulses: Count


class Focus(Contract):
    """Where the treatment beam was focused relative to the capsule.

    The distance is stored in millimetres; a sender may give it in micrometres instead, as
    lasers display the posterior offset (distance_um: 150 is stored as distance_mm 0.15).
    """

    method: FocusMethod
    distance_mm: float | None = None
    distance_um: float | None = None

    @model_validator(mode="before")
    @classmethod
    def _one_unit(cls, data: Any) -> Any:
        # Only a bare micrometre number is moved; anything else (both units, a string) is
        # left for the type checks and the rules to name at the field the sender used.
        if not isinstance(data, dict) or "distance_mm" in data:
            return data
        um = data.get("distance_um")
        if isinstance(um, bool) or not isinstance(um, int | float) or not math.isfinite(um):
            return data
        rest = {k: v for k, v in data.items() if k != "distance_um"}
        return {**rest, "distance_mm": round(um / 1000, 6)}


class ContactLens(Contract):
    """Whether a capsulotomy contact lens was used, which one, and its optics if known.

    magnification is the lens's laser-spot magnification factor from the site's lens list:
    it steepens the focal cone, so the idealised spot and fluence follow it when the cone
    angle itself is not given.
    """

    used: bool
    lens: Text | None = None
    magnification: float | None = None
    cone_angle_deg: float | None = None


class LaserSettings(Contract):
    """The laser and how it was used."""

    wavelength_nm: float = 1064.0
    mode: LaserMode | None = None
    pulses_per_burst: Count | None = None
    series: Annotated[list[Series], Field(min_length=1, max_length=50)]
    focus: Focus | None = None
    pattern: OpeningPattern
    pattern_text: Text | None = None
    contact_lens: ContactLens
    reported_total_energy_mj: float | None = None


class Opening(Contract):
    """The capsule opening: one diameter (round) or two axes (horizontal, vertical)."""

    horizontal_mm: float
    # None: a round opening, one diameter measured; the vertical is never invented.
    vertical_mm: float | None = None
    centred: bool | None = None


class PitPosition(Contract):
    """An IOL pit's place on the optic, from its centre (x to the patient's right, y up)."""

    x_mm: float
    y_mm: float


class Complication(Contract):
    """A complication seen during or right after the laser."""

    kind: ComplicationKind
    on_visual_axis: bool | None = None
    positions: Annotated[list[PitPosition], Field(max_length=50)] = []
    text: Text | None = None


class Result(Contract):
    """What came of the laser."""

    outcome: Outcome
    opening: Opening | None = None
    complications: Annotated[list[Complication], Field(max_length=20)] = []
    iop_after: Annotated[list[TimedIopReading], Field(max_length=20)] = []
    visual_acuity_after: VisualAcuity | None = None
    # What was done about a raised IOP after the laser, and when the patient left.
    pressure_treatment: Annotated[list[PressureTreatment], Field(max_length=10)] = []
    discharge: Discharge | None = None


PressureRoute = Literal["topical", "oral", "intravenous"]
DoseUnit = Literal["drop", "mg"]


class PressureTreatment(Contract):
    """A treatment given in clinic for a raised IOP after the laser."""

    agent: Text
    strength_percent: float | None = None
    dose: float
    dose_unit: DoseUnit
    route: PressureRoute
    given_at: AwareDatetime


class Discharge(Contract):
    """The patient leaving clinic after the laser: when, and who cleared it."""

    at: AwareDatetime
    cleared_by: Text
    cleared_by_identifier: Identifier | None = None
    # Why the patient left although the last reading still needed action (for example,
    # admitted or sent to the eye emergency service); required for the pathway to close.
    reason: Text | None = None


class ClinicDrop(Contract):
    """An IOP prophylaxis drop given in clinic."""

    agent: Text
    strength_percent: float | None = None
    timing: DropTiming


class HomeDrop(Contract):
    """Drops the patient takes home."""

    agent: Text
    strength_percent: float | None = None
    times_per_day: Count
    days: Count


class Plan(Contract):
    """What happens next."""

    prophylaxis: Annotated[list[ClinicDrop], Field(max_length=10)] = []
    take_home: Annotated[list[HomeDrop], Field(max_length=10)] = []
    iop_recheck_minutes: Count | None = None
    review_days: Count | None = None
    rd_warning_given: bool
    further_session_planned: bool | None = None


class Note(Contract):
    """One laser session on one eye: the whole note as it comes in."""

    note_id: Identifier
    patient: Identifier
    patient_details: PatientDetails | None = None
    encounter: Identifier | None = None
    performer: Clinician
    assistant: Text | None = None
    location: Location
    started_at: AwareDatetime
    ended_at: AwareDatetime | None = None
    consent: Consent
    eye: Eye
    indication: Indication | None = None
    before: BeforeLaser
    laser: LaserSettings
    result: Result
    plan: Plan
    status: NoteStatus
