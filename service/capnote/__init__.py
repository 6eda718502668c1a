"""capnote: structured, checked FHIR R4 records of Nd:YAG posterior capsulotomy.

The public face, for code that uses capnote as a library (everything else is internal and
may change without notice):

- ``Note``: the note contract (pydantic; its JSON Schema is schemas/note.schema.json);
- ``Assessor`` and ``Assessment``: the whole job for one payload (``Assessor(load_policy())
  .assess(payload, now)``: findings, derived values, due items and the FHIR R4 Bundle);
- ``load_policy``: the shipped defaults with a site's overrides;
- ``Finding`` and ``Severity``: what a check says;
- ``CapnoteError`` and its subclasses: the one error tree (``capnote.errors``).

Names load when first used, so ``import capnote`` stays cheap for the command line.
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING, Any

__version__ = "0.1.0"

if TYPE_CHECKING:
    from capnote.assess import Assessment, Assessor
    from capnote.errors import (
        CapnoteError,
        ConflictError,
        InputError,
        NotFoundError,
        PolicyError,
        UnavailableError,
    )
    from capnote.findings import Finding, Severity
    from capnote.note import Note
    from capnote.policy import load_policy

_PUBLIC = {
    "Note": "capnote.note",
    "Assessor": "capnote.assess",
    "Assessment": "capnote.assess",
    "load_policy": "capnote.policy",
    "Finding": "capnote.findings",
    "Severity": "capnote.findings",
    "CapnoteError": "capnote.errors",
    "InputError": "capnote.errors",
    "NotFoundError": "capnote.errors",
    "ConflictError": "capnote.errors",
    "PolicyError": "capnote.errors",
    "UnavailableError": "capnote.errors",
}
__all__ = [
    "Assessment",
    "Assessor",
    "CapnoteError",
    "ConflictError",
    "Finding",
    "InputError",
    "NotFoundError",
    "Note",
    "PolicyError",
    "Severity",
    "UnavailableError",
    "__version__",
    "load_policy",
]


def __getattr__(name: str) -> Any:
    module = _PUBLIC.get(name)
    if module is None:
        raise AttributeError(f"module 'capnote' has no attribute {name!r}")
    return getattr(import_module(module), name)
