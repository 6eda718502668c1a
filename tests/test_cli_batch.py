"""`capnote check` and `emit` over batches as a Unix tool: a progress bar only on a terminal,
the summary where it stays visible, --quiet, every skipped and empty file named, and what a
record is (a BOM, a FHIR resource that does not parse, one note identifier twice).

Every test runs capnote as a real process; a terminal is a real pseudo-terminal (os.openpty).
"""

from __future__ import annotations

import csv
import json
import os
import subprocess
import threading
from pathlib import Path

import pytest

from tests.batch_helpers import CAPNOTE, NOW, ReportPage, capnote, note, write_ndjson
from tests.conftest import EXAMPLES, ROOT, load

SUMMARY = "record(s) in"


def _on_a_terminal(args: list[str], which: str) -> tuple[subprocess.CompletedProcess[bytes], str]:
    """Run capnote with standard error (or output) on a pseudo-terminal; what the terminal
    showed comes back beside the process."""
    master, slave = os.openpty()
    shown: list[bytes] = []

    def read() -> None:
        while True:
            try:
                chunk = os.read(master, 65536)
            except OSError:  # the other end closed
                return
            if not chunk:
                return
            shown.append(chunk)

    reader = threading.Thread(target=read)
    reader.start()
    env = {**os.environ, "TERM": "xterm-256color", "COLUMNS": "120"}
    env.pop("NO_COLOR", None)
    streams = {"stderr": slave} if which == "stderr" else {"stdout": slave}
    try:
        run = subprocess.run(
            [*CAPNOTE, *args],
            cwd=ROOT,
            capture_output=False,
            stdin=subprocess.DEVNULL,
            stdout=streams.get("stdout", subprocess.PIPE),
            stderr=streams.get("stderr", subprocess.PIPE),
            env=env,
            timeout=300,
            check=False,
        )
    finally:
        os.close(slave)
        reader.join(timeout=30)
        os.close(master)
    return run, b"".join(shown).decode(errors="replace")


def test_a_progress_bar_shows_on_a_terminal_and_nowhere_else(tmp_path: Path) -> None:
    dump = write_ndjson(tmp_path / "dump.ndjson", 6_000)
    args = ["check", str(dump), "--now", NOW, "--report", str(tmp_path / "r.html")]
    run, terminal = _on_a_terminal(args, "stderr")
    assert run.returncode == 1
    assert "records/s" in terminal  # records done and the rate
    assert " records" in terminal
    assert "0:00:" in terminal  # the time left: the input's size is known
    assert "6000 record(s) in 1 file(s)" in terminal
    # Standard error a pipe: not a byte of the bar.
    piped = capnote(*args)
    assert piped.returncode == 1
    assert "records/s" not in piped.stderr
    assert "\x1b" not in piped.stderr
    assert piped.stdout == ""
    # --quiet: no bar even on a terminal.
    _quiet, terminal = _on_a_terminal([*args, "--quiet"], "stderr")
    assert "records/s" not in terminal
    assert "6000 record(s) in 1 file(s)" in terminal


def test_the_summary_goes_to_stderr_only_when_stdout_is_redirected(tmp_path: Path) -> None:
    dump = write_ndjson(tmp_path / "dump.ndjson", 50)
    run, terminal = _on_a_terminal(["check", str(dump), "--now", NOW], "stdout")
    assert run.returncode == 1
    assert "50 record(s) in 1 file(s)" in terminal  # stdout a terminal: the summary there
    assert SUMMARY not in run.stderr.decode()
    piped = capnote("check", str(dump), "--now", NOW)
    assert f"{dump}:25: error" in piped.stdout
    assert SUMMARY not in piped.stdout
    assert "50 record(s) in 1 file(s): 48 without errors, 2 with errors" in piped.stderr


def test_quiet_prints_the_summary_only(tmp_path: Path) -> None:
    dump = write_ndjson(tmp_path / "dump.ndjson", 50)
    run = capnote("check", str(dump), "--now", NOW, "--quiet")
    assert run.returncode == 1
    assert run.stdout == ""
    assert run.stderr.splitlines()[0].startswith("50 record(s) in 1 file(s)")
    assert "error " not in run.stderr


def test_a_report_prints_the_summary_unless_findings_are_asked_for(tmp_path: Path) -> None:
    dump = write_ndjson(tmp_path / "dump.ndjson", 50)
    report = str(tmp_path / "r.csv")
    run = capnote("check", str(dump), "--now", NOW, "--report", report)
    assert run.returncode == 1
    assert run.stdout == ""
    assert "50 record(s) in 1 file(s)" in run.stderr
    assert f"report written to {report}" in run.stderr
    asked = capnote("check", str(dump), "--now", NOW, "--report", report, "--print-findings")
    assert f"{dump}:25: error" in asked.stdout
    as_json = capnote("check", str(dump), "--now", NOW, "--report", report, "--format", "json")
    assert len(as_json.stdout.splitlines()) == 50  # --format asks for the listing too


def _folder(root: Path) -> Path:
    """A folder with notes, an empty NDJSON file, and four things a walk skips."""
    (root / "sub").mkdir(parents=True)
    (root / "a.ndjson").write_text(json.dumps(note(1, "clean")) + "\n")
    (root / "empty.ndjson").write_text("\n  \n")
    (root / "b.json").write_text(json.dumps(note(2, "warning")))
    (root / "notes.txt").write_text("another ending")
    (root / ".hidden.json").write_text("{}")
    (root / ".cache").mkdir()
    (root / ".cache" / "c.json").write_text("{}")
    outside = root.parent / "elsewhere"
    outside.mkdir()
    (outside / "d.json").write_text(json.dumps(note(3, "clean")))
    (root / "sub" / "link").symlink_to(outside, target_is_directory=True)
    return root


def test_every_skipped_and_empty_file_is_counted_and_named(tmp_path: Path) -> None:
    root = _folder(tmp_path / "in")
    run = capnote("check", str(root), "--now", NOW)
    assert run.returncode == 0, run.stdout + run.stderr
    assert f"{root / 'empty.ndjson'}: empty, no records" in run.stdout
    assert (
        f"2 record(s) in 3 file(s): 2 without errors, 0 with errors; 0 error(s), 1 warning(s), "
        f"0 information; 1 empty file(s): {root / 'empty.ndjson'}; 4 file(s) skipped in folders"
    ) in run.stderr
    for name, why in (
        (".cache", "hidden"),
        (".hidden.json", "hidden"),
        ("notes.txt", "not .json or .ndjson"),
        ("sub/link", "a symbolic link to a folder (not followed)"),
    ):
        assert f"skipped: {root / name} ({why})" in run.stderr
    target = tmp_path / "r.html"
    run = capnote("check", str(root), "--now", NOW, "--report", str(target))
    page = ReportPage(target.read_text())
    assert page.counts["skipped"] == 4
    assert page.counts["empty"] == 1
    assert page.counts["records"] == 2
    skipped = [r.cells for r in page.body_rows("files") if r.attrs["class"] == "skipped-row"]
    assert sorted(c[0] for c in skipped) == sorted(
        str(root / n) for n in (".cache", ".hidden.json", "notes.txt", "sub/link")
    )
    files = {
        r.attrs["data-file"]: r.cells for r in page.body_rows("files") if "data-file" in r.attrs
    }
    assert files[str(root / "empty.ndjson")][-1] == "empty: no records"
    emitted = capnote("emit", str(root), "--now", NOW)
    assert emitted.returncode == 0, emitted.stderr
    assert len(emitted.stdout.splitlines()) == 2
    assert f"{root / 'empty.ndjson'}: empty, no records" in emitted.stderr
    assert f"skipped: {root / 'notes.txt'} (not .json or .ndjson)" in emitted.stderr
    assert (
        "2 Bundle(s) from 2 record(s) in 3 file(s); 0 skipped for errors; 1 empty file(s); "
        "4 file(s) skipped in folders"
    ) in emitted.stderr


def test_an_empty_standard_input_is_named(tmp_path: Path) -> None:
    run = capnote("check", "-", "--now", NOW, stdin="")
    assert run.returncode == 0
    assert "<stdin>: empty, no records" in run.stdout
    assert "0 record(s) in 1 file(s)" in run.stderr
    assert "1 empty file(s): <stdin>" in run.stderr


def test_a_json_file_that_holds_ndjson_gets_a_hint(tmp_path: Path) -> None:
    lines = tmp_path / "export.json"
    write_ndjson(lines, 3)
    run = capnote("check", str(lines), "--now", NOW)
    assert run.returncode == 1
    assert f"{lines} (file): FAILED" in run.stdout
    assert "[json-holds-ndjson]" in run.stdout
    assert "--ndjson" in run.stdout
    assert "missing" not in run.stdout  # not "a note with every field missing"
    assert capnote("check", str(lines), "--now", NOW, "--ndjson").returncode == 0


def test_a_byte_order_mark_on_a_whole_json_file_is_accepted(tmp_path: Path) -> None:
    # RFC 8259 section 8.1: a parser may ignore a byte order mark; an NDJSON line's already is.
    path = tmp_path / "bom.json"
    path.write_bytes(b"\xef\xbb\xbf" + json.dumps(note(1, "clean")).encode())
    run = capnote("check", str(path), "--now", NOW)
    assert run.returncode == 0, run.stdout
    assert f"{path} (note): ok" in run.stdout


def test_a_resource_that_does_not_parse_is_still_a_fhir_resource(tmp_path: Path) -> None:
    bundle = load(EXAMPLES / "bundles" / "right-routine.bundle.json")
    resource = bundle["entry"][0]["resource"]
    resource["id"] = "session-1"
    procedure = json.dumps(resource)
    # 1e400 is valid JSON syntax but no double holds it (RFC 8259 section 6 lets a reader
    # refuse it): the resource is then one finding, not a note with 18 missing fields.
    broken = procedure.replace('"status"', '"extra": 1e400, "status"', 1)
    path = tmp_path / "big-number.ndjson"
    path.write_text(broken + "\n")
    run = capnote("check", str(path), "--now", NOW, "--format", "json")
    assert run.returncode == 1
    (record,) = [json.loads(line) for line in run.stdout.splitlines()]
    (issue,) = record["outcome"]["issue"]
    assert issue["code"] == "structure"
    assert "not valid JSON: a number too large to hold (such as 1e400)" in json.dumps(issue)
    csv_path = tmp_path / "r.csv"
    capnote("check", str(path), "--now", NOW, "--report", str(csv_path))
    (row,) = list(csv.DictReader(csv_path.read_text().splitlines()))
    assert row["kind"] == "fhir"
    assert row["record"] == "Procedure/session-1"


def test_emit_says_a_fhir_resource_is_not_a_note(tmp_path: Path) -> None:
    bundle = load(EXAMPLES / "bundles" / "right-routine.bundle.json")
    one = tmp_path / "procedure.json"
    one.write_text(json.dumps(bundle["entry"][0]["resource"]))
    run = capnote("emit", str(one), "--now", NOW)
    assert run.returncode == 1
    assert run.stdout == ""
    assert "this is a FHIR Procedure resource, not a note" in run.stderr
    assert f"{one}: not emitted, it is a FHIR resource" in run.stderr
    assert "missing" not in run.stderr
    lines = tmp_path / "mixed.ndjson"
    lines.write_text(json.dumps(bundle) + "\n" + json.dumps(note(1, "clean")) + "\n")
    run = capnote("emit", str(lines), "--now", NOW)
    assert run.returncode == 1
    assert len(run.stdout.splitlines()) == 1
    assert f"{lines}:1: error" in run.stderr
    assert "this is a FHIR Bundle resource, not a note" in run.stderr


def _twice(path: Path) -> Path:
    """Line 1 a note; line 2 the same note with other spacing and key order (a resend);
    line 3 the same identifier with other content; line 4 another note."""
    first = note(1, "clean")
    again = dict(reversed(list(first.items())))
    changed = note(1, "warning")
    path.write_text(
        "\n".join(
            [
                json.dumps(first),
                json.dumps(again, indent=1).replace("\n", " "),
                json.dumps(changed),
                json.dumps(note(2, "clean")),
            ]
        )
        + "\n"
    )
    return path


def test_one_note_identifier_twice_in_a_batch(tmp_path: Path) -> None:
    # As the service answers: the same content again is a resend (stored once, 200), other
    # content under the identifier a 409 Conflict (README, the REST service).
    dump = _twice(tmp_path / "twice.ndjson")
    run = capnote("check", str(dump), "--now", NOW)
    assert run.returncode == 1
    out = run.stdout.splitlines()
    assert any(
        line.startswith(f"{dump}:2: information ") and "[repeated-note]" in line for line in out
    )
    assert any(
        line.startswith(f"{dump}:3: error ") and "[duplicate-note-id]" in line for line in out
    )
    assert f"already used at {dump}:1" in run.stdout
    assert not any(line.startswith((f"{dump}:1:", f"{dump}:4:")) for line in out)


def test_emit_writes_one_bundle_per_note_identifier(tmp_path: Path) -> None:
    dump = _twice(tmp_path / "twice.ndjson")
    run = capnote("emit", str(dump), "--now", NOW)
    assert run.returncode == 1  # the other content under one identifier is an error
    bundles = [json.loads(line) for line in run.stdout.splitlines()]
    assert len(bundles) == 2  # notes 1 and 2, once each
    assert f"{dump}:2: information" in run.stderr
    assert f"{dump}:3: error" in run.stderr
    assert "2 Bundle(s) from 4 record(s) in 1 file(s); 1 skipped for errors; 1 repeated" in (
        run.stderr
    )


def test_emit_to_a_reader_that_goes_away_exits_141(tmp_path: Path) -> None:
    dump = write_ndjson(tmp_path / "dump.ndjson", 400)
    with subprocess.Popen(
        [*CAPNOTE, "emit", str(dump), "--now", NOW],
        cwd=ROOT,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    ) as proc:
        assert proc.stdout is not None
        assert proc.stderr is not None
        assert proc.stdout.readline().startswith(b'{"resourceType":"Bundle"')
        proc.stdout.close()
        err = proc.stderr.read().decode()
        proc.wait(timeout=120)
    assert proc.returncode == 141, err
    assert "broken pipe" in err
    assert "Traceback" not in err


@pytest.mark.parametrize("now", ["2026-12-01T12:00:00", "2026-12-01T12:00", "2026-12-01"])
def test_now_without_an_offset_says_it_needs_one(tmp_path: Path, now: str) -> None:
    run = capnote("check", str(EXAMPLES / "notes" / "right-routine.json"), "--now", now)
    assert run.returncode == 2
    assert "needs a UTC offset" in " ".join(run.stderr.split())
    assert "%Y" not in run.stderr  # never the parser's format strings


def test_now_with_an_offset_or_z_is_taken(tmp_path: Path) -> None:
    for now in ("2026-12-01T12:00:00+01:00", "2026-12-01T12:00Z"):
        run = capnote("check", str(EXAMPLES / "notes" / "right-routine.json"), "--now", now)
        assert run.returncode == 0, run.stderr


def test_csv_names_each_record_and_can_start_with_a_bom(tmp_path: Path) -> None:
    dump = write_ndjson(tmp_path / "dump.ndjson", 25)
    target = tmp_path / "r.csv"
    run = capnote("check", str(dump), "--now", NOW, "--report", str(target), "--csv-bom")
    assert run.returncode == 1
    raw = target.read_bytes()
    assert raw.startswith(b"\xef\xbb\xbffile,line,kind,record,")  # UTF-8 BOM, then the header
    rows = list(csv.DictReader(raw.decode("utf-8-sig").splitlines()))
    by_line = {r["line"]: r["record"] for r in rows}
    system = note(1, "clean")["note_id"]["system"]
    assert by_line["25"] == f"{system}|LN-NDJSON-000025"
    assert by_line["10"] == f"{system}|LN-NDJSON-000010"
    plain = tmp_path / "plain.csv"
    capnote("check", str(dump), "--now", NOW, "--report", str(plain))
    assert plain.read_bytes().startswith(b"file,line,kind,record,")
