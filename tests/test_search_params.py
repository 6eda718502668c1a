"""capnote.fhir.search on its own: how parameters become criteria (FHIR R4 search,
http://hl7.org/fhir/R4/search.html). The searches themselves run over a real server in
tests/test_fhir_search.py; these pin the pure rules with a fixed present time."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import pytest

from capnote.errors import SearchError
from capnote.fhir.search import (
    MAX_COUNT,
    Cursor,
    parse_date,
    parse_search,
    split_escaped,
    unescape,
)

NOW = datetime(2026, 12, 4, 12, 0, tzinfo=UTC)
US = timedelta(microseconds=1)


def utc(*parts: int) -> datetime:
    year, month, day, *rest = parts
    return datetime(year, month, day, *rest, tzinfo=UTC)


@pytest.mark.parametrize(
    ("value", "prefix", "low", "high"),
    [
        # R4 2.1.1.5.9: a value's precision gives its range.
        ("2026", "eq", utc(2026, 1, 1), utc(2027, 1, 1) - US),
        ("2026-11", "eq", utc(2026, 11, 1), utc(2026, 12, 1) - US),
        ("2026-12", "eq", utc(2026, 12, 1), utc(2027, 1, 1) - US),
        ("ge2026-02", "ge", utc(2026, 2, 1), utc(2026, 3, 1) - US),
        ("lt2026-11-02", "lt", utc(2026, 11, 2), utc(2026, 11, 3) - US),
        ("sa2026-11-02T10:04Z", "sa", utc(2026, 11, 2, 10, 4), utc(2026, 11, 2, 10, 5) - US),
        (
            "eb2026-11-02T11:04:05+01:00",
            "eb",
            utc(2026, 11, 2, 10, 4, 5),
            utc(2026, 11, 2, 10, 4, 6) - US,
        ),
    ],
)
def test_a_date_is_the_range_its_precision_implies(
    value: str, prefix: str, low: datetime, high: datetime
) -> None:
    test = parse_date(value, "date", NOW)
    assert (test.prefix, test.low, test.high) == (prefix, low, high)


def test_approximately_widens_by_a_tenth_of_the_distance_from_now() -> None:
    # 2026-11-24 is 10 days 12 hours before NOW: a tenth of that is 25 h 12 min.
    test = parse_date("ap2026-11-24", "date", NOW)
    gap = (NOW - utc(2026, 11, 24)) / 10
    assert test.low == utc(2026, 11, 24) - gap
    assert test.high == utc(2026, 11, 25) - US + gap


@pytest.mark.parametrize("value", ["2026-02-30", "2026-13", "26", "2026-11-02T10:00", "x2026"])
def test_a_date_that_is_not_one_is_refused(value: str) -> None:
    with pytest.raises(SearchError) as refused:
        parse_date(value, "date", NOW)
    assert refused.value.http_status == 400
    assert refused.value.findings[0].location == "date"


@pytest.mark.parametrize(
    ("text", "parts"),
    [
        ("a,b", ["a", "b"]),
        ("a\\,b,c", ["a\\,b", "c"]),  # R4 2.1.1.1.5: "\," is a comma in a value
        ("a\\\\,b", ["a\\\\", "b"]),  # an escaped backslash, then a separator
        ("", [""]),
    ],
)
def test_values_split_at_unescaped_commas(text: str, parts: list[str]) -> None:
    assert split_escaped(text, ",") == parts


def test_escapes_are_undone() -> None:
    assert unescape("LN\\,S\\|4\\$\\\\x") == "LN,S|4$\\x"
    assert unescape("a\\b") == "a\\b"  # not an escape: kept


def test_or_and_and() -> None:
    found = parse_search(
        "Observation",
        [("code", "a|1,b|2"), ("code", "3"), ("patient", "Patient/x,y")],
        lenient=False,
        patient_id_system="urn:mrn",
        now=NOW,
    )
    assert [(t.system, t.code) for t in found.tokens[0][1]] == [("a", "1"), ("b", "2")]
    assert [(t.system, t.code) for t in found.tokens[1][1]] == [(None, "3")]
    assert found.patients == [[("urn:mrn", "x"), ("urn:mrn", "y")]]


def test_count_is_clamped_and_the_applied_value_is_what_the_link_shows() -> None:
    found = parse_search(
        "Procedure", [("_count", "5000")], lenient=False, patient_id_system=None, now=NOW
    )
    assert found.count == MAX_COUNT
    assert found.applied == [("_count", str(MAX_COUNT))]
    zero = parse_search(
        "Procedure", [("_count", "0")], lenient=False, patient_id_system=None, now=NOW
    )
    assert zero.count_only


def test_lenient_leaves_out_what_it_does_not_apply() -> None:
    found = parse_search(
        "Procedure",
        [("occurence", "x"), ("date", "2026")],
        lenient=True,
        patient_id_system=None,
        now=NOW,
    )
    assert found.ignored == ["occurence"]
    assert found.applied == [("date", "2026")]


def test_a_patient_reference_needs_the_site_patient_id_system() -> None:
    with pytest.raises(SearchError) as refused:
        parse_search(
            "Procedure",
            [("patient", "Patient/P-1")],
            lenient=False,
            patient_id_system=None,
            now=NOW,
        )
    assert "P-1" not in refused.value.findings[0].message


def test_a_cursor_round_trips_and_a_forged_one_is_refused() -> None:
    cursor = Cursor(utc(2026, 11, 2, 10, 5), "00000000-0000-0000-0000-000000000001", "iop-before")
    found = parse_search(
        "Observation", [("_cursor", cursor.text())], lenient=False, patient_id_system=None, now=NOW
    )
    assert found.cursor == cursor
    assert found.applied == []  # a next link adds it; the self link never shows it
    with pytest.raises(SearchError):
        parse_search(
            "Observation",
            [("_cursor", "bm90LWEtY3Vyc29y")],
            lenient=False,
            patient_id_system=None,
            now=NOW,
        )


@pytest.mark.parametrize("value", ["ap0001", "ap9999", "ap0001-01-01T00:00:00Z"])
def test_approximately_at_the_ends_of_time_stays_in_range(value: str) -> None:
    test = parse_date(value, "date", NOW)
    assert test.low <= test.high


def test_a_search_is_bounded() -> None:
    with pytest.raises(SearchError):
        parse_search(
            "Procedure",
            [("_id", ",".join(["x"] * 51))],
            lenient=False,
            patient_id_system=None,
            now=NOW,
        )
    with pytest.raises(SearchError):
        parse_search(
            "Procedure", [("date", "2026")] * 31, lenient=False, patient_id_system=None, now=NOW
        )
