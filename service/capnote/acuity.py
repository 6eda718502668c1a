"""Visual acuity notations and their logMAR equivalents.

logMAR = log10(minimum angle of resolution in arc minutes); a Snellen fraction d/D resolves
D/d arc minutes, decimal acuity is its inverse (standard definitions, e.g. ICO Visual Acuity
Measurement Standard 1984). Results are rounded to 0.01, finer than a chart's 0.02 per letter.
"""

from __future__ import annotations

import math
import re
from functools import lru_cache

from capnote.note import AcuityNotation, VisualAcuity

_FRACTION = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*/\s*(\d+(?:\.\d+)?)\s*$")
_NUMBER = re.compile(r"^\s*[+-]?\d+(?:\.\d+)?\s*$")
QUALITATIVE = {
    "CF": "counting fingers",
    "HM": "hand movements",
    "LP": "light perception",
    "NLP": "no light perception",
}
# Snellen notations take any test distance as numerator (3/60 is read at 3 m).
_SNELLEN = ("snellen-metric", "snellen-imperial")


class AcuityError(ValueError):
    """An acuity value that its notation cannot read; the message says what is expected."""


def expected_form(notation: AcuityNotation) -> str:
    """What a value in this notation looks like, for error messages."""
    return {
        "snellen-metric": "a fraction distance/x in metres, e.g. 6/12 or 3/60",
        "snellen-imperial": "a fraction distance/x in feet, e.g. 20/40",
        "decimal": "a number above 0, e.g. 0.5",
        "logmar": "a number, e.g. 0.30",
        "qualitative": "one of " + ", ".join(QUALITATIVE),
    }[notation]


def to_logmar(acuity: VisualAcuity) -> float | None:
    """logMAR for the entered value, or None for qualitative vision (CF, HM, LP, NLP)."""
    return _logmar(acuity.notation, acuity.value)


# The checks and the derived values both read each entry, and charts have few lines: the
# same few dozen values recur on every note.
@lru_cache(maxsize=4096)
def _logmar(notation: AcuityNotation, text: str) -> float | None:
    if notation == "qualitative":
        if text.upper() not in QUALITATIVE:
            raise AcuityError(expected_form(notation))
        return None
    if notation in _SNELLEN:
        match = _FRACTION.match(text)
        if match is None:
            raise AcuityError(expected_form(notation))
        numerator, denominator = float(match[1]), float(match[2])
        if numerator <= 0 or denominator <= 0:
            raise AcuityError(expected_form(notation))
        return _round(math.log10(denominator / numerator))
    if _NUMBER.match(text) is None:
        raise AcuityError(expected_form(notation))
    number = float(text)
    if notation == "decimal":
        if number <= 0:
            raise AcuityError(expected_form(notation))
        return _round(-math.log10(number))
    return _round(number)


def _round(value: float) -> float:
    # + 0.0 turns -0.0 into 0.0 so 6/6 prints as 0.0, not -0.0.
    return round(value, 2) + 0.0
