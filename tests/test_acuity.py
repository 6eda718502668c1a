"""logMAR from every notation. logMAR = log10(MAR in arc minutes); a Snellen fraction d/D has
MAR = D/d and decimal acuity is 1/MAR (standard definitions: ICO Visual Acuity Measurement
Standard, 1984)."""

from __future__ import annotations

import pytest

from capnote.acuity import AcuityError, to_logmar
from capnote.note import VisualAcuity


@pytest.mark.parametrize(
    ("notation", "value", "logmar"),
    [
        ("snellen-metric", "6/12", 0.30),  # issue check value; log10(2) = 0.301
        ("snellen-imperial", "20/40", 0.30),  # issue check value
        ("snellen-metric", "6/60", 1.0),  # issue check value
        ("snellen-metric", "6/6", 0.0),  # standard definition: MAR 1
        ("snellen-imperial", "20/200", 1.0),  # standard definition
        ("snellen-metric", "3/60", 1.30),  # 3 m chart: MAR 20, log10(20) = 1.301
        ("snellen-metric", "6/5", -0.08),  # log10(5/6) = -0.079
        ("decimal", "0.5", 0.30),  # decimal = 1/MAR
        ("decimal", "1.0", 0.0),
        ("logmar", "0.48", 0.48),
        ("logmar", "-0.1", -0.1),
    ],
)
def test_logmar_from_notation(notation: str, value: str, logmar: float) -> None:
    entry = VisualAcuity.model_validate({"notation": notation, "value": value})
    assert to_logmar(entry) == pytest.approx(logmar, abs=0.005)


def test_qualitative_vision_has_no_logmar() -> None:
    assert to_logmar(VisualAcuity(notation="qualitative", value="CF")) is None


@pytest.mark.parametrize(
    ("notation", "value"),
    [
        ("snellen-metric", "6-12"),
        ("snellen-metric", "0/12"),
        ("snellen-imperial", "20/"),
        ("decimal", "0"),
        ("decimal", "-0.5"),
        ("decimal", "6/12"),
        ("logmar", "abc"),
        ("qualitative", "blurry"),
    ],
)
def test_unreadable_values_are_refused(notation: str, value: str) -> None:
    with pytest.raises(AcuityError):
        to_logmar(VisualAcuity.model_validate({"notation": notation, "value": value}))
