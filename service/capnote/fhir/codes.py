"""Code systems and codes the emitted record uses.

Standard codes come from ../shared/reference/coding.md and carry only verified meanings; a
code marked "from memory" there is not emitted. What has no standard code lives in the
project's own CodeSystem (CAPNOTE_CS, published as schemas/capnote-codesystem.json).
"""

from __future__ import annotations

from typing import Any, Final

SNOMED: Final = "http://snomed.info/sct"
LOINC: Final = "http://loinc.org"
UCUM: Final = "http://unitsofmeasure.org"
OBS_CATEGORY: Final = "http://terminology.hl7.org/CodeSystem/observation-category"

CANONICAL: Final = "https://capnote.org/fhir"
CAPNOTE_CS: Final = f"{CANONICAL}/CodeSystem/capnote"
RESOURCE_KEY: Final = f"{CANONICAL}/sid/resource-key"
FINDING_CS: Final = f"{CANONICAL}/CodeSystem/finding"
CONDITION_CATEGORY: Final = "http://terminology.hl7.org/CodeSystem/condition-category"
CONDITION_CLINICAL: Final = "http://terminology.hl7.org/CodeSystem/condition-clinical"
CONDITION_VERIFICATION: Final = "http://terminology.hl7.org/CodeSystem/condition-ver-status"

# SNOMED CT, all [confirmed] in coding.md.
EYE_STRUCTURE: Final = {"right": "18944008", "left": "8966001"}
EYE_DISPLAY: Final = {"right": "Right eye structure", "left": "Left eye structure"}
DISCISSION_SECONDARY_MEMBRANE: Final = "9137006"
DISCISSION_DISPLAY: Final = "Discission of membranous cataract, secondary"
IOP_OBSERVABLE: Final = "41633001"
IOP_OBSERVABLE_DISPLAY: Final = "Intraocular pressure"
OUTCOME: Final = {
    "complete": ("385669000", "Successful"),
    "partial": ("385670004", "Partially successful"),
    "failed": ("385671000", "Unsuccessful"),
}

# LOINC, [confirmed]; right is 79892-6 (one public file swaps them; a test pins it).
IOP_BY_EYE: Final = {"right": "79892-6", "left": "79893-4"}
BCVA_SNELLEN_BY_EYE: Final = {"right": "79880-1", "left": "79881-9"}
# Displays: coding.md's meaning of each code.
IOP_BY_EYE_DISPLAY: Final = {
    "right": "Right eye intraocular pressure",
    "left": "Left eye intraocular pressure",
}
BCVA_SNELLEN_DISPLAY: Final = {
    "right": "Best corrected visual acuity, right eye (Snellen)",
    "left": "Best corrected visual acuity, left eye (Snellen)",
}
# The displays of the observation-category CodeSystem (terminology.hl7.org).
OBS_CATEGORY_DISPLAY: Final = {"exam": "Exam", "procedure": "Procedure"}

# The project's own CodeSystem: code -> (display, definition).
CONCEPTS: Final[dict[str, tuple[str, str]]] = {
    "yag-posterior-capsulotomy": (
        "Nd:YAG laser posterior capsulotomy",
        "Opening of an opacified posterior lens capsule by Nd:YAG photodisruption.",
    ),
    "posterior-capsule-opacification": (
        "Posterior capsule opacification",
        "Opacification of the posterior lens capsule after cataract surgery.",
    ),
    "nd-yag-laser": ("Nd:YAG photodisruption laser", "A Q-switched Nd:YAG ophthalmic laser."),
    "capsulotomy-contact-lens": (
        "Capsulotomy contact lens",
        "A converging contact lens placed on the eye for the laser.",
    ),
    "laser-series": (
        "Laser series",
        "One run of pulses at one energy setting; components give energy and count.",
    ),
    "pulse-energy": ("Energy per pulse", "Set energy of each pulse in a series."),
    "pulse-count": ("Number of pulses", "Pulses delivered in a series."),
    "total-energy": ("Total laser energy", "Sum of energy times pulses over all series."),
    "total-pulses": ("Total number of pulses", "Pulses delivered over all series."),
    "opening-size": (
        "Capsule opening size",
        "Size of the capsule opening; components give the horizontal and vertical diameters.",
    ),
    "opening-diameter-horizontal": ("Opening diameter, horizontal", "Horizontal diameter."),
    "opening-diameter-vertical": ("Opening diameter, vertical", "Vertical diameter."),
    "opening-area": ("Capsule opening area", "Area of a round or elliptical opening."),
    "iop-change": (
        "IOP change after laser",
        "Highest post-laser IOP minus the pre-laser IOP; a component gives the spike grade.",
    ),
    "iop-spike-grade": ("IOP spike grade", "Grade of the highest IOP rise."),
    "spike-none": ("No IOP rise", "The IOP did not rise."),
    "spike-mild": ("Mild IOP rise", "A rise below the moderate threshold."),
    "spike-moderate": ("Moderate IOP rise", "A rise at or above the moderate threshold."),
    "spike-severe": ("Severe IOP rise", "A rise at or above the severe threshold."),
    "focal-fluence-idealised": (
        "Idealised peak focal fluence",
        "Diffraction-limited estimate for the highest pulse energy; not a measurement.",
    ),
    "focal-spot-diameter-idealised": (
        "Idealised focal spot diameter",
        "Airy disk diameter 1.22 lambda / NA; not a measurement.",
    ),
    "visual-acuity": ("Visual acuity", "Visual acuity as entered, with its logMAR."),
    "logmar": ("logMAR acuity", "Visual acuity as log10 of the minimum angle of resolution."),
    "cumulative-energy": (
        "Cumulative laser energy, this eye",
        "Total energy of this and all earlier sessions on the same eye.",
    ),
    "session-number": ("Session number, this eye", "Which session on this eye this is."),
    "days-since-last-session": ("Days since last session", "Days since the previous session."),
    "iol-pit-visual-axis": ("IOL pit on the visual axis", "Laser pit in the IOL optic, central."),
    "iol-pit-peripheral": (
        "IOL pit off the visual axis",
        "Laser pit in the IOL optic, peripheral.",
    ),
    "iris-bleeding": ("Iris bleeding", "Bleeding from the iris during the laser."),
    "iop-spike": ("IOP spike", "A rise of intraocular pressure after the laser."),
    "vitreous-in-anterior-chamber": (
        "Vitreous in the anterior chamber",
        "Vitreous came forward through the opening.",
    ),
    "other-complication": ("Other complication", "A complication described in text."),
    "bleeding": ("Bleeding", "Bleeding seen during or after the laser."),
    "anterior-uveitis": ("Anterior uveitis", "Inflammation in the anterior chamber."),
    "cystoid-macular-oedema": ("Cystoid macular oedema", "Cystoid macular oedema."),
    "retinal-detachment": ("Retinal detachment", "Retinal detachment."),
    "iol-decentration": ("IOL decentration", "The IOL moved off centre."),
    "iol-dislocation": ("IOL dislocation", "The IOL moved out of its place."),
    "opacification-fibrous": ("Fibrous opacification", "Fibrous posterior capsule opacification."),
    "opacification-pearl": ("Pearl-type opacification", "Pearl-type (Elschnig) opacification."),
    "opacification-mixed": ("Mixed opacification", "Fibrous and pearl-type opacification."),
    "laser-single-pulse": ("Single-pulse mode", "One pulse per shot."),
    "laser-burst": ("Burst mode", "Several pulses per shot; a component gives the count."),
    "opening-optic-diameter-ratio": (
        "Opening to optic diameter ratio",
        "Widest opening diameter divided by the IOL optic diameter (a ratio of diameters, "
        "not of areas).",
    ),
    "iop-treatment": (
        "Treatment of raised IOP after laser",
        "A drug given in clinic for a raised IOP after the laser.",
    ),
    "discharge-after-laser": (
        "Discharge after laser",
        "The patient left clinic after the laser; who cleared it and the IOP then.",
    ),
    "iop-recheck": ("IOP recheck after laser", "Same-day IOP measurement after the laser."),
    "next-day-iop-check": ("Next-day IOP check", "IOP measurement the day after the laser."),
    "capsulotomy-review": ("Review after capsulotomy", "Clinic review after the laser."),
    # The review visit (capnote.review).
    "review-attendance": (
        "Attendance at the review after capsulotomy",
        "Whether the patient came to the booked review; the value says which.",
    ),
    "review-attended": ("Attended the review", "The patient was seen at the review."),
    "review-did-not-attend": (
        "Did not attend the review",
        "The patient did not come to the booked review.",
    ),
    "opening-at-review": (
        "Capsule opening at review",
        "The opening as seen at the review; components say whether it is patent and adequate.",
    ),
    "opening-patent": (
        "Opening patent",
        "The opening is clear on the visual axis (not closed by regrowth or leaflets).",
    ),
    "opening-adequate": (
        "Opening adequate",
        "The opening is large enough and well placed for vision and the view of the fundus.",
    ),
    "symptoms-relieved": (
        "Symptoms relieved after capsulotomy",
        "The symptoms that led to the laser are relieved.",
    ),
    "retreatment-needed": (
        "Further laser needed",
        "Another laser session on this eye is needed.",
    ),
    "review-outcome": (
        "Outcome of the review after capsulotomy",
        "What was decided at the review; a component gives the follow-up interval.",
    ),
    "review-discharged": ("Discharged after review", "The capsulotomy pathway ends."),
    "review-further-follow-up": (
        "Further follow-up after review",
        "The patient is to be seen again.",
    ),
    "follow-up-interval": ("Follow-up interval", "Days until the patient is seen again."),
    "iop-change-from-pre-laser": (
        "IOP at review minus pre-laser IOP",
        "The review IOP minus the IOP measured before the laser session.",
    ),
    "review-other-finding": ("Other finding at review", "Anything else found, in words."),
    "iol-pits": ("IOL pits", "Laser pits in the IOL optic."),
    "raised-iop-needing-treatment": (
        "Raised IOP needing treatment",
        "An intraocular pressure raised enough to need treatment.",
    ),
}

# Condition statuses (terminology.hl7.org, bound required in R4 Condition).
CONDITION_ENTERED_IN_ERROR: Final = {
    "coding": [
        {
            "system": CONDITION_VERIFICATION,
            "code": "entered-in-error",
            "display": "Entered in Error",
        }
    ]
}


def coding(system: str, code: str, display: str | None = None) -> dict[str, Any]:
    """A FHIR Coding."""
    out: dict[str, Any] = {"system": system, "code": code}
    if display is not None:
        out["display"] = display
    return out


# One Coding per concept, built once: a Bundle holds dozens. Shared between resources, so
# never mutated (tests/test_fhir_bundle.py checks that emitting leaves them as they were).
_OWN: Final = {code: coding(CAPNOTE_CS, code, display) for code, (display, _d) in CONCEPTS.items()}


def own(code: str) -> dict[str, Any]:
    """A Coding from the project's CodeSystem, with its display."""
    return _OWN[code]


def concept(*codings: dict[str, Any], text: str | None = None) -> dict[str, Any]:
    """A FHIR CodeableConcept."""
    out: dict[str, Any] = {}
    if codings:
        out["coding"] = list(codings)
    if text is not None:
        out["text"] = text
    return out


def quantity(value: float, unit: str, code: str) -> dict[str, Any]:
    """A UCUM Quantity; unit is what people read, code is the UCUM code."""
    return {"value": value, "unit": unit, "system": UCUM, "code": code}


def code_system_resource() -> dict[str, Any]:
    """The project's CodeSystem as a FHIR R4 resource."""
    return {
        "resourceType": "CodeSystem",
        "id": "capnote",
        "url": CAPNOTE_CS,
        "version": "1",
        "name": "CapnoteCodes",
        "title": "capnote codes for Nd:YAG posterior capsulotomy records",
        "status": "active",
        "experimental": False,
        "publisher": "capnote",
        "description": "Concepts for which no SNOMED CT or LOINC code was found; standard "
        "codes are carried beside them wherever one exists.",
        "caseSensitive": True,
        "content": "complete",
        "count": len(CONCEPTS),
        "concept": [
            {"code": code, "display": display, "definition": definition}
            for code, (display, definition) in CONCEPTS.items()
        ],
    }
