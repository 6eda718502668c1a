"""No input, however malformed, makes the checks raise: they answer with findings."""

from __future__ import annotations

import json
from typing import Any

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from capnote.assess import Assessor
from capnote.fhir.outcome import outcome
from capnote.fhir.validate import validate_resource
from tests.conftest import NOW, routine

JSON = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False) | st.text(max_size=20),
    lambda inner: (
        st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=12), inner, max_size=4)
    ),
    max_leaves=20,
)
FIELD_VALUES = (
    st.none()
    | st.booleans()
    | st.integers()
    | st.sampled_from([10**400, -(10**400)])
    | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(max_size=30)
    | st.sampled_from(
        [
            "",
            "right",
            "left",
            "2026-02-30",
            "2026-11-27T10:05:00",
            "6/0",
            "20/20",
            "CF",
            "-0",
            "1e999",
            "cruciate",
            "other",
            "draft",
            "final",
        ]
    )
    | st.lists(st.integers(), max_size=3)
    | st.just({})
)
PROFILE = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def leaves(node: Any, path: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    if isinstance(node, dict):
        return [p for k, v in node.items() for p in leaves(v, (*path, k))] or [path]
    if isinstance(node, list):
        return [p for i, v in enumerate(node) for p in leaves(v, (*path, i))] or [path]
    return [path]


PATHS = leaves(routine())


def replace(data: Any, path: tuple[Any, ...], value: Any) -> Any:
    if not path:
        return value
    head, *rest = path
    data[head] = replace(data[head], tuple(rest), value)
    return data


def assert_clean(assessor: Assessor, payload: bytes | str) -> None:
    result = assessor.assess(payload, NOW)
    report = outcome(result.findings)
    assert report["resourceType"] == "OperationOutcome"
    if result.accepted:
        assert result.bundle is not None
        assert result.derived is not None
    else:
        assert result.bundle is None
        assert any(f.blocking for f in result.findings)


@PROFILE
@given(JSON)
def test_any_json_gets_findings_not_exceptions(assessor: Assessor, value: Any) -> None:
    assert_clean(assessor, json.dumps(value))


@PROFILE
@given(st.binary(max_size=200))
def test_any_bytes_get_findings_not_exceptions(assessor: Assessor, raw: bytes) -> None:
    assert_clean(assessor, raw)


@PROFILE
@given(st.lists(st.tuples(st.sampled_from(PATHS), FIELD_VALUES), min_size=1, max_size=4))
def test_a_note_with_any_fields_changed_never_raises(
    assessor: Assessor, changes: list[tuple[tuple[Any, ...], Any]]
) -> None:
    data = routine()
    for path, value in changes:
        data = replace(data, path, value)
    assert_clean(assessor, json.dumps(data))


@PROFILE
@given(
    st.floats(min_value=0.01, max_value=10),
    st.integers(min_value=1, max_value=1000),
    st.floats(min_value=0, max_value=80),
    st.floats(min_value=0.1, max_value=10),
)
def test_plausible_notes_always_emit_a_bundle(
    assessor: Assessor, energy: float, pulses: int, iop_after: float, opening: float
) -> None:
    data = routine()
    data["laser"]["series"] = [{"energy_mj": energy, "pulses": pulses}]
    data["laser"]["reported_total_energy_mj"] = None
    data["result"]["iop_after"][0]["value_mmhg"] = iop_after
    data["result"]["opening"]["horizontal_mm"] = opening
    result = assessor.assess(json.dumps(data), NOW)
    assert result.accepted, result.findings
    assert result.bundle is not None


@PROFILE
@given(JSON)
def test_analyst_validation_never_raises(value: Any) -> None:
    for candidate in (
        value,
        {"resourceType": "Procedure", "status": value},
        {"resourceType": value if isinstance(value, str) else "Coding"},
        {"resourceType": "Bundle", "type": "transaction", "entry": value},
    ):
        assert isinstance(validate_resource(candidate), list)
