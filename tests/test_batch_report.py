"""`capnote check --report`: the HTML and CSV reports say what the text output says, escape
what the input echoes, appear whole or not at all, and keep memory flat."""

from __future__ import annotations

import contextlib
import csv
import json
import os
import signal
import subprocess
import threading
from collections import Counter
from pathlib import Path
from typing import IO

import pytest

from capnote.batch.output import AtomicFile
from capnote.batch.report_csv import COLUMNS, cell
from capnote.batch.report_html import SAMPLE_ROWS
from capnote.plain_text import CAUTION
from tests.batch_helpers import (
    CAPNOTE,
    NOW,
    ReportPage,
    by_code,
    capnote,
    note,
    peak_rss_kib,
    text_findings,
    text_tally,
    write_ndjson,
)
from tests.conftest import EXAMPLES, ROOT, load

# Input that findings echo: an unknown key of a note, and the resourceType of a FHIR line.
SCRIPT = "<script>alert('capnote')</script>"
FORMULA = '=HYPERLINK("http://example.invalid","x")'
IMG = "<img src=x onerror=alert(1)>"


def _batch(folder: Path, lines: int = 300) -> list[Path]:
    """An NDJSON dump (with hostile, broken and FHIR lines) and two whole JSON files."""
    folder.mkdir(parents=True, exist_ok=True)
    dump = write_ndjson(folder / "dump.ndjson", lines)
    hostile = note(9001, "warning")
    hostile[SCRIPT] = 1
    formula = note(9002, "clean")
    formula[FORMULA] = 1
    energy = note(9003, "clean")  # out-of-range from a second rule, beside the IOP's
    energy["laser"]["series"][0]["energy_mj"] = 12
    bundle = load(EXAMPLES / "bundles" / "right-routine.bundle.json")
    bundle["entry"][0]["resource"]["status"] = "done"  # outside the required value set
    with dump.open("a") as out:
        for extra in (hostile, formula, energy, {"resourceType": IMG}, bundle):
            out.write(json.dumps(extra) + "\n")
        out.write("{not json\n")
    single = folder / "single.json"
    single.write_text(json.dumps(note(9100, "error")))
    clean = EXAMPLES / "notes" / "right-iop-spike.json"
    return [dump, single, clean]


@pytest.fixture(scope="module")
def checked(tmp_path_factory: pytest.TempPathFactory) -> dict[str, object]:
    """One batch checked twice, with an HTML and with a CSV report, and the text output."""
    folder = tmp_path_factory.mktemp("batch")
    inputs = _batch(folder)
    runs = {}
    for fmt in ("html", "csv"):
        report = folder / f"report.{fmt}"
        run = capnote(
            "check", *map(str, inputs), "--now", NOW, "--report", str(report), "--print-findings"
        )
        assert run.returncode == 1, run.stdout + run.stderr
        assert f"report written to {report}" in run.stderr
        runs[fmt] = (run, report)
    html_run, html = runs["html"]
    csv_run, csv_path = runs["csv"]
    assert isinstance(html_run, subprocess.CompletedProcess)
    assert isinstance(csv_run, subprocess.CompletedProcess)
    assert html_run.stdout == csv_run.stdout  # the report changes nothing on stdout
    assert isinstance(html, Path)
    assert isinstance(csv_path, Path)
    return {
        # The findings on stdout, the summary on stderr (stdout is a pipe here).
        "stdout": html_run.stdout + html_run.stderr,
        "html": html.read_text(),
        "csv": csv_path.read_text(),
        "inputs": inputs,
    }


def _html(checked: dict[str, object]) -> str:
    text = checked["html"]
    assert isinstance(text, str)
    return text


def _stdout(checked: dict[str, object]) -> str:
    text = checked["stdout"]
    assert isinstance(text, str)
    return text


def test_html_header_counts_match_the_text_tally(checked: dict[str, object]) -> None:
    page = ReportPage(_html(checked))
    tally = text_tally(_stdout(checked))
    assert tally["records"] == 300 + 6 + 2
    assert page.counts == {
        "records": tally["records"],
        "passed": tally["passed"],
        "failed": tally["failed"],
        "errors": tally["errors"],
        "warnings": tally["warnings"],
        "information": tally["information"],
        "skipped": 0,
        "empty": 0,
    }
    assert CAUTION in _html(checked)


def test_html_lists_the_records_with_errors_first_grouped_by_file(
    checked: dict[str, object],
) -> None:
    text = _html(checked)
    page = ReportPage(text)
    # Before the tables of files and codes: the first thing after the header.
    order = [i for i in page.ids if i in ("errors", "files", "summary", "chart", "codes")]
    assert order == ["errors", "files", "summary", "chart", "codes"]
    found = text_findings(_stdout(checked))
    failed = {(f, line) for f, line, _loc, sev, _code in found if sev == "error"}
    listed = page.error_findings()
    # Every finding of every record with an error, and nothing of the others.
    expected = [x for x in found if (x[0], x[1]) in failed]
    assert sorted(listed) == sorted(expected)
    assert len({(f, line) for f, line, *_ in listed}) == len(failed)
    # One group per file, in input order, each record's errors before its warnings.
    groups = [s["data-file"] for s in page.sections if "data-file" in s]
    inputs = checked["inputs"]
    assert isinstance(inputs, list)
    assert groups == [str(p) for p in inputs if any(f == str(p) for f, _l in failed)]
    rows = page.body_rows("errors")
    record: list[str] = []
    for r in [*rows, None]:
        if r is None or len(r.cells) == 7:
            assert record == sorted(record, key=lambda sev: sev != "error"), record
            record = []
        if r is not None:
            record.append(r.attrs["class"])
    # Each finding with its location, rule and allowed range.
    single = [r for r in rows if r.group["data-file"].endswith("single.json")]
    assert single[0].cells[0].startswith("whole file")
    first = next(r for r in rows if r.attrs["class"] == "error" and "out-of-range" in r.cells)
    assert first.cells[-2] == "IOP must be >= 0 and <= 80 mmHg"
    assert first.cells[-1] == ">= 0 and <= 80 mmHg"
    assert first.cells[0].split("\n")[1].startswith("https://")  # the note identifier


def test_html_has_a_table_per_file(checked: dict[str, object]) -> None:
    page = ReportPage(_html(checked))
    found = text_findings(_stdout(checked))
    rows = {r.attrs["data-file"]: [int(v) for v in r.values] for r in page.body_rows("files")}
    inputs = checked["inputs"]
    assert isinstance(inputs, list)
    assert list(rows) == [str(p) for p in inputs]
    for name, (_records, failed, errors, warnings, information) in rows.items():
        mine = [x for x in found if x[0] == name]
        assert errors == sum(1 for x in mine if x[3] == "error")
        assert warnings == sum(1 for x in mine if x[3] == "warning")
        assert information == sum(1 for x in mine if x[3] == "information")
        assert failed == len({x[1] for x in mine if x[3] == "error"})
    assert rows[str(inputs[0])][0] == 306
    assert rows[str(inputs[1])][0] == 1


def test_html_summary_has_a_row_per_code_and_rule_that_adds_up(
    checked: dict[str, object],
) -> None:
    page = ReportPage(_html(checked))
    found = text_findings(_stdout(checked))
    summary = page.body_rows("summary")
    table: Counter[tuple[str, str]] = Counter()
    for r in summary:
        table[(r.attrs["data-code"], r.attrs["data-severity"])] += int(r.values[0])
    assert dict(table) == dict(by_code(found))
    # out-of-range, from two different rules, is two rows that say which rule each is.
    ranges = [r for r in summary if r.attrs["data-code"] == "out-of-range"]
    rules = {r.cells[2]: int(r.values[0]) for r in ranges}
    assert rules == {
        "IOP must be >= 0 and <= 80 mmHg": 13,
        "pulse energy must be > 0 and <= 10 mJ": 1,
    }
    per_severity: Counter[str] = Counter()
    for (_code, severity), count in table.items():
        per_severity[severity] += count
    tally = text_tally(_stdout(checked))
    assert per_severity["error"] == tally["errors"]
    assert per_severity["warning"] == tally["warnings"]
    assert per_severity["information"] == tally["information"]


def test_each_code_links_to_its_rows(checked: dict[str, object]) -> None:
    page = ReportPage(_html(checked))
    found = by_code(text_findings(_stdout(checked)))
    sections = {s["id"]: s for s in page.sections if s.get("class", "").startswith("code")}
    for r in page.body_rows("summary"):
        (link,) = r.links
        target = sections[link.removeprefix("#")]
        assert (target["data-code"], target["data-severity"]) == (
            r.attrs["data-code"],
            r.attrs["data-severity"],
        )
    for anchor, section in sections.items():
        key = (section["data-code"], section["data-severity"])
        listed = [r for r in page.body_rows("codes") if r.group.get("id") == anchor]
        if key[1] == "error":  # every error, each linking to its record
            assert len(listed) == found[key]
            assert all(r.links and r.links[0].startswith("#r") for r in listed)
        else:  # the first rows of a warning code; the CSV report has all of them
            assert len(listed) == min(found[key], SAMPLE_ROWS)
    inputs = checked["inputs"]
    assert isinstance(inputs, list)
    names = {str(p) for p in inputs}
    for r in page.body_rows("codes"):  # every row says where its record is: file:line
        assert r.cells[0].split("\n")[0].rsplit(":", 1)[0] in names, r.cells[0]
    record_ids = {i for i in page.ids if i.startswith("r") and i[1:].isdigit()}
    links = {link.removeprefix("#") for r in page.body_rows("codes") for link in r.links}
    assert links <= record_ids


def test_html_chart_shows_the_most_common_findings(checked: dict[str, object]) -> None:
    page = ReportPage(_html(checked))
    counts = by_code(text_findings(_stdout(checked)))
    bars = [v for tag, k, v in page.attributes if tag == "g" and k == "data-code"]
    assert len(bars) == min(12, len(counts))
    top_code = max(counts.items(), key=lambda kv: kv[1])[0][0]
    assert bars[0] == top_code


def test_html_is_self_contained_and_escapes_what_the_input_echoes(
    checked: dict[str, object],
) -> None:
    text = _html(checked)
    page = ReportPage(text)
    # Nothing to run and nothing to fetch: no script, no external link, image or style.
    assert page.tags["script"] == 0
    assert not {"link", "img", "iframe", "object", "embed"} & set(page.tags)
    for tag, name, value in page.attributes:
        assert not name.startswith("on"), (tag, name)
        if name in ("href", "src"):
            assert value.startswith("#"), (tag, name, value)
    assert "url(" not in text
    assert "@import" not in text
    # The hostile values are shown as text, never as markup.
    assert SCRIPT not in text
    assert IMG not in text
    assert "&lt;script&gt;alert(&#x27;capnote&#x27;)&lt;/script&gt;" in text
    cells = [c for r in page.body_rows("errors") for c in r.cells]
    assert SCRIPT in cells  # the location of the unknown key, read back as text
    assert any(IMG in c for c in cells)
    assert text.endswith("</html>\n")


def test_csv_has_a_row_per_finding_with_the_same_columns_and_kind(
    checked: dict[str, object],
) -> None:
    text = checked["csv"]
    assert isinstance(text, str)
    rows = list(csv.reader(text.splitlines()))
    assert tuple(rows[0]) == COLUMNS
    body = [dict(zip(COLUMNS, r, strict=True)) for r in rows[1:]]
    listed = [
        (r["file"], r["line"] or "-", r["location"].removeprefix("'"), r["severity"], r["code"])
        for r in body
    ]
    assert sorted(listed) == sorted(text_findings(_stdout(checked)))
    kinds = {(r["code"], r["kind"]) for r in body}
    assert ("fhir-code-not-in-value-set", "fhir") in kinds
    assert ("fhir-unknown-type", "fhir") in kinds
    assert ("json-invalid", "note") in kinds
    single = next(r for r in body if r["file"].endswith("single.json"))
    assert single["line"] == ""  # a whole JSON file; "-" would read as a formula


def test_csv_guards_cells_against_formulas(checked: dict[str, object]) -> None:
    text = checked["csv"]
    assert isinstance(text, str)
    body = list(csv.DictReader(text.splitlines()))
    (row,) = [r for r in body if "HYPERLINK" in r["location"]]
    # OWASP, "CSV Injection": the cell starts with an apostrophe, so it is shown as text.
    assert row["location"] == "'" + FORMULA
    assert row["message"].startswith("'=HYPERLINK")
    for r in body:
        for value in r.values():
            assert not value.startswith(("=", "+", "-", "@", "\t", "\r")), r


# OWASP, "CSV Injection": cells starting with =, +, -, @, tab or carriage return are made text.
@pytest.mark.parametrize(
    ("text", "shown"),
    [
        ("=1+1", "'=1+1"),
        ("+41 22", "'+41 22"),
        ("-2+3", "'-2+3"),
        ("@SUM(A1)", "'@SUM(A1)"),
        ("\t=1", "'\t=1"),
        ("\r=1", "'\r=1"),
        ("a=1", "a=1"),
        ("laser.series[0].energy_mj", "laser.series[0].energy_mj"),
        ("", ""),
        (None, ""),
    ],
)
def test_csv_cell_guard(text: str | None, shown: str) -> None:
    assert cell(text) == shown


def test_a_file_name_that_looks_like_a_formula_is_guarded(tmp_path: Path) -> None:
    name = "=cmd.ndjson"
    (tmp_path / name).write_text(json.dumps(note(1, "error")) + "\n")
    run = capnote("check", name, "--now", NOW, "--report", "r.csv", cwd=tmp_path)
    assert run.returncode == 1, run.stdout + run.stderr
    (row,) = list(csv.DictReader((tmp_path / "r.csv").read_text().splitlines()))
    assert row["file"] == "'" + name


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--report", "out.txt"], ".html, .htm, .csv"),
        (["--report", "out"], ".html, .htm, .csv"),
        (["--report", "out.html", "--report-format", "pdf"], "html, csv"),
        (["--report", "no-such-folder/out.html"], "does not exist"),
        (["--report", "."], "directory"),
    ],
)
def test_report_usage_errors_exit_2_and_write_nothing(
    tmp_path: Path, args: list[str], message: str
) -> None:
    source = tmp_path / "one.ndjson"
    source.write_text(json.dumps(note(1, "clean")) + "\n")
    before = sorted(p.name for p in tmp_path.iterdir())
    run = capnote("check", str(source), *args, cwd=tmp_path)
    assert run.returncode == 2, run.stdout + run.stderr
    assert message in run.stderr
    assert "Traceback" not in run.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == before


def test_report_format_option_overrides_the_ending(tmp_path: Path) -> None:
    source = tmp_path / "one.ndjson"
    source.write_text(json.dumps(note(1, "warning")) + "\n")
    run = capnote("check", str(source), "--report", "r.txt", "--report-format", "csv", cwd=tmp_path)
    assert run.returncode == 0, run.stdout + run.stderr
    assert (tmp_path / "r.txt").read_text().startswith("file,line,kind,")


def test_a_clean_batch_gets_a_report_that_says_so(tmp_path: Path) -> None:
    source = tmp_path / "clean.ndjson"
    source.write_text(json.dumps(note(1, "clean")) + "\n")
    run = capnote("check", str(source), "--now", NOW, "--report", "r.html", cwd=tmp_path)
    assert run.returncode == 0, run.stdout + run.stderr
    page = ReportPage((tmp_path / "r.html").read_text())
    assert page.counts["records"] == 1
    assert page.counts["failed"] == 0
    assert page.body_rows("errors") == []
    assert "No record has an error." in (tmp_path / "r.html").read_text()
    assert "No findings." in (tmp_path / "r.html").read_text()


def test_atomic_file_leaves_the_target_alone_when_writing_fails(tmp_path: Path) -> None:
    target = tmp_path / "report.html"
    target.write_text("the last good report")

    def write_half() -> None:
        with AtomicFile(target) as out:
            out.binary.write(b"half a rep")
            raise RuntimeError("disk on fire")

    with pytest.raises(RuntimeError, match="disk on fire"):
        write_half()
    assert target.read_text() == "the last good report"
    assert [p.name for p in tmp_path.iterdir()] == ["report.html"]
    with AtomicFile(target) as out:
        out.text().write("a new report")
        out.commit()
    assert target.read_text() == "a new report"
    assert [p.name for p in tmp_path.iterdir()] == ["report.html"]


def _feed(pipe: IO[bytes], data: bytes) -> None:
    """Write data into the pipe, which stays open; a check stopped meanwhile closes it."""
    with contextlib.suppress(BrokenPipeError):
        pipe.write(data)
        pipe.flush()


def _default_sigint() -> None:
    # A job started in the background by a shell inherits SIGINT ignored, and Python then
    # keeps ignoring it: the check would never see the signal this test sends.
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def _stop_midway(tmp_path: Path, fmt: str, sig: signal.Signals) -> tuple[Path, int]:
    """Start a check with a report, feed it 3,000 lines on standard input and send sig once
    findings are printing.

    Standard input stays open until the signal has gone, so the check is still running when
    it arrives, however fast the check or slow the machine.
    """
    source = write_ndjson(tmp_path / "dump.ndjson", 3_000)
    target = tmp_path / f"report.{fmt}"
    target.write_text("the last good report")
    with subprocess.Popen(
        [*CAPNOTE, "check", "-", "--now", NOW, "--report", str(target), "--print-findings"],
        cwd=ROOT,
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        stderr=subprocess.DEVNULL,
        preexec_fn=_default_sigint,
    ) as proc:
        assert proc.stdin is not None
        assert proc.stdout is not None
        # Written from a thread: the pipe holds 64 KiB, and the check answers on stdout
        # (read here) while it reads.
        feeder = threading.Thread(target=_feed, args=(proc.stdin, source.read_bytes()))
        feeder.start()
        # stdout is a pipe, so it arrives in 8 KiB blocks: the first one is about 40 findings
        # into the 3,000 lines.
        first = proc.stdout.readline()
        assert first.startswith(b"<stdin>:")
        proc.send_signal(sig)
        try:
            # What is left to print fits the pipe, so the check never waits on it.
            proc.wait(timeout=60)
        finally:
            if proc.poll() is None:  # a check that ignored the signal fails, never hangs
                proc.kill()
                proc.wait()
            feeder.join(timeout=60)
            with contextlib.suppress(BrokenPipeError):
                proc.stdin.close()
    assert proc.returncode != 0
    return target, proc.returncode


@pytest.mark.parametrize("fmt", ["html", "csv"])
def test_a_killed_check_leaves_the_last_report_whole(tmp_path: Path, fmt: str) -> None:
    target, _code = _stop_midway(tmp_path, fmt, signal.SIGKILL)
    assert target.read_text() == "the last good report"
    # Nothing half-written under a visible name (a hidden .part may stay after SIGKILL).
    assert sorted(p.name for p in tmp_path.iterdir() if not p.name.startswith(".")) == [
        "dump.ndjson",
        target.name,
    ]


@pytest.mark.parametrize("fmt", ["html", "csv"])
@pytest.mark.parametrize(("sig", "code"), [(signal.SIGINT, 130), (signal.SIGTERM, 143)])
def test_an_interrupted_check_cleans_up_after_itself(
    tmp_path: Path, fmt: str, sig: signal.Signals, code: int
) -> None:
    # Ctrl-C and SIGTERM (what a service manager or `kill` sends) alike: no hidden .part file
    # and no temporary rows left, the last report untouched, and the shell's exit code for
    # a death by that signal (128 + its number), never 1 ("errors found").
    target, returned = _stop_midway(tmp_path, fmt, sig)
    assert returned == code
    assert target.read_text() == "the last good report"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["dump.ndjson", target.name]


def test_report_memory_stays_flat_from_two_to_twenty_thousand_lines(tmp_path: Path) -> None:
    small = write_ndjson(tmp_path / "small.ndjson", 2_000)
    large = write_ndjson(tmp_path / "large.ndjson", 20_000)
    for fmt in ("html", "csv"):
        report = str(tmp_path / f"report.{fmt}")
        low = peak_rss_kib("check", str(small), "--now", NOW, "--report", report)
        high = peak_rss_kib("check", str(large), "--now", NOW, "--report", report)
        # The large report lists 2,400 findings (about 1 MB of HTML); holding them, or the
        # 36 MB of input, would add tens of MB. The bound is generous on purpose.
        assert high < low * 1.10 + 8 * 1024, (fmt, low, high)
        assert os.path.getsize(report) > 0
