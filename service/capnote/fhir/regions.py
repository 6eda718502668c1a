"""The national codes beside SNOMED CT, by the site policy's region (policy [record].region).

Only codes that /work/shared/reference coding.md or clinical-practice.md give are here, each
with its display and source; a region without a confirmed code emits none rather than a
guess (SNOMED CT and capnote's own codes still carry the meaning).
"""

from __future__ import annotations

from typing import Any, Final

from capnote.fhir.codes import coding
from capnote.policy.model import Region

ICD10CM: Final = "http://hl7.org/fhir/sid/icd-10-cm"
# FHIR's URI for CPT ("Using CPT with FHIR", terminology page of the FHIR specification).
CPT: Final = "http://www.ama-assn.org/go/cpt"

# ICD-10-CM H26.49x "other secondary cataract", by eye: coding.md (the codes are confirmed
# in public code lists; their use for PCO is the usual practice).
_ICD10CM_PCO: Final = {
    "right": coding(ICD10CM, "H26.491", "Other secondary cataract, right eye"),
    "left": coding(ICD10CM, "H26.492", "Other secondary cataract, left eye"),
}
# CPT 66821: clinical-practice.md [pub: AAO coding article 2018].
_CPT_66821: Final = coding(
    CPT, "66821", "Laser discission of secondary membranous cataract, one or more stages"
)

# England: ICD-10 (WHO, 5th edition) for the diagnosis and OPCS-4 for the procedure. Neither
# coding.md nor clinical-practice.md confirms a code for PCO or for the laser capsulotomy,
# so none is emitted until one is added here with its source.
_DIAGNOSIS: Final[dict[Region, dict[str, dict[str, Any]]]] = {
    "england": {},
    "united-states": _ICD10CM_PCO,
}
_PROCEDURE: Final[dict[Region, tuple[dict[str, Any], ...]]] = {
    "england": (),
    "united-states": (_CPT_66821,),
}


def diagnosis_codings(region: Region, eye: str) -> list[dict[str, Any]]:
    """The region's diagnosis codings for PCO of this eye (none where none is confirmed)."""
    found = _DIAGNOSIS[region].get(eye)
    return [] if found is None else [found]


def procedure_codings(region: Region) -> list[dict[str, Any]]:
    """The region's procedure codings for the laser capsulotomy."""
    return list(_PROCEDURE[region])
