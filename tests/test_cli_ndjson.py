"""`capnote check` over NDJSON, run as a user runs it: a real process on real files.

A streamed check must report each line as file:line, print only lines with findings, and
keep its memory flat however long the input is (it holds counters, never the results).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

from tests.conftest import EXAMPLES, ROOT, load, routine
from tests.fhir_r4_check import r4_problems

NOW = "2026-12-01T12:00:00+00:00"
CAPNOTE = [sys.executable, "-c", "from capnote.cli import main; main()"]


def capnote(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [*CAPNOTE, *args],
        capture_output=True,
        text=True,
        cwd=ROOT,
        timeout=300,
        check=False,
    )


def _note(i: int, kind: str) -> dict[str, Any]:
    """A distinct note: clean, with a warning (IOP rise of 7 mmHg) or with an error."""
    note = routine()
    note["note_id"]["value"] = f"LN-NDJSON-{i:06d}"
    note["patient"]["value"] = f"PX{i:06d}"
    if kind == "warning":
        note["result"]["iop_after"][0]["value_mmhg"] = 22
    elif kind == "error":
        note["before"]["iop"]["value_mmhg"] = 95
    return note


def write_ndjson(path: Path, lines: int) -> Path:
    """Every 10th line has a warning and every 25th an error; the rest are clean."""
    with path.open("w") as out:
        for i in range(1, lines + 1):
            kind = "error" if i % 25 == 0 else "warning" if i % 10 == 0 else "clean"
            out.write(json.dumps(_note(i, kind)) + "\n")
    return path


def test_text_reports_only_lines_with_findings_as_file_and_line(tmp_path: Path) -> None:
    bundle = load(EXAMPLES / "bundles" / "right-routine.bundle.json")
    bundle["entry"][0]["resource"]["status"] = "done"  # outside the required value set
    lines = [
        json.dumps(_note(1, "clean")),
        json.dumps(_note(2, "warning")),
        "",  # blank lines are skipped but still numbered
        json.dumps(_note(4, "error")),
        "{not json",
        json.dumps(bundle),
    ]
    path = tmp_path / "dump.ndjson"
    path.write_text("\n".join(lines) + "\n")
    run = capnote("check", str(path), "--now", NOW)
    assert run.returncode == 1, run.stdout + run.stderr
    out = run.stdout.splitlines()
    assert not any(line.startswith(f"{path}:1:") for line in out)
    assert any(
        line.startswith(f"{path}:2: warning") and "result.iop_after[0].value_mmhg" in line
        for line in out
    )
    assert any(
        line.startswith(f"{path}:4: error") and "before.iop.value_mmhg" in line for line in out
    )
    assert any(line.startswith(f"{path}:5: error") and "json-invalid" in line for line in out)
    assert any(
        line.startswith(f"{path}:6: error") and "Bundle.entry[0].resource.status" in line
        for line in out
    )
    assert "5 record(s) in 1 file(s): 2 without errors, 3 with errors" in run.stderr
    assert "treating clinician decide" in run.stderr
    assert "Traceback" not in run.stdout + run.stderr


def test_warnings_alone_exit_0(tmp_path: Path) -> None:
    path = tmp_path / "ok.ndjson"
    path.write_text(json.dumps(_note(1, "clean")) + "\n" + json.dumps(_note(2, "warning")) + "\n")
    run = capnote("check", str(path), "--now", NOW)
    assert run.returncode == 0, run.stdout + run.stderr
    assert (
        "2 record(s) in 1 file(s): 2 without errors, 0 with errors; 0 error(s), 1 warning(s)"
        in (run.stderr)
    )


def test_json_format_gives_one_operation_outcome_per_line(tmp_path: Path) -> None:
    path = tmp_path / "dump.ndjson"
    path.write_text(
        "\n".join(json.dumps(_note(i, k)) for i, k in enumerate(["clean", "warning", "error"], 1))
        + "\n"
    )
    run = capnote("check", "--format", "json", str(path), "--now", NOW)
    assert run.returncode == 1
    records = [json.loads(line) for line in run.stdout.splitlines()]
    assert [(r["file"], r["line"]) for r in records] == [(str(path), n) for n in (1, 2, 3)]
    for r in records:
        assert r4_problems(r["outcome"]) == []  # each outcome is a valid R4 OperationOutcome
    severities = [r["outcome"]["issue"][0]["severity"] for r in records]
    assert severities == ["information", "warning", "error"]
    assert records[2]["outcome"]["issue"][0]["expression"] == ["before.iop.value_mmhg"]


def test_ndjson_option_reads_any_file_as_ndjson(tmp_path: Path) -> None:
    path = tmp_path / "dump.txt"
    path.write_text(json.dumps(_note(1, "clean")) + "\n" + json.dumps(_note(2, "error")) + "\n")
    run = capnote("check", "--ndjson", str(path), "--now", NOW)
    assert run.returncode == 1
    assert f"{path}:2: error" in run.stdout


def test_json_files_beside_ndjson_keep_their_report(tmp_path: Path) -> None:
    path = write_ndjson(tmp_path / "dump.ndjson", 3)
    single = EXAMPLES / "notes" / "right-routine.json"
    run = capnote("check", str(single), str(path), "--now", NOW)
    assert run.returncode == 0, run.stdout + run.stderr
    assert f"{single} (note): ok" in run.stdout
    assert "4 record(s) in 2 file(s): 4 without errors, 0 with errors" in run.stderr
    mixed = capnote("check", "--format", "json", str(single), str(path), "--now", NOW)
    assert mixed.returncode == 2
    assert "Traceback" not in mixed.stderr


def test_twenty_thousand_lines_are_counted_and_located(tmp_path: Path) -> None:
    path = write_ndjson(tmp_path / "big.ndjson", 20_000)
    run = capnote("check", str(path), "--now", NOW)
    assert run.returncode == 1
    errors, warnings = 20_000 // 25, 20_000 // 10 - 20_000 // 50
    assert (
        f"20000 record(s) in 1 file(s): {20_000 - errors} without errors, {errors} with errors; "
        f"{errors} error(s), {warnings} warning(s), 0 information"
    ) in run.stderr
    finding_lines = [line for line in run.stdout.splitlines() if line.startswith(f"{path}:")]
    assert len(finding_lines) == errors + warnings
    assert finding_lines[-1].startswith(f"{path}:20000: error")


def _peak_rss_kib(*args: str) -> int:
    """Peak resident memory of one capnote process, from the kernel's rusage of that child.

    os.wait4 returns getrusage(RUSAGE_CHILDREN)'s figures for this one child, so earlier
    subprocesses of the test run cannot raise the number.
    """
    with subprocess.Popen(
        [*CAPNOTE, *args], cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
    ) as proc:
        _pid, status, usage = os.wait4(proc.pid, 0)
        proc.returncode = os.waitstatus_to_exitcode(status)
    assert proc.returncode in (0, 1)
    return int(usage.ru_maxrss)  # KiB on Linux


def test_memory_stays_flat_from_two_to_twenty_thousand_lines(tmp_path: Path) -> None:
    small = write_ndjson(tmp_path / "small.ndjson", 2_000)
    large = write_ndjson(tmp_path / "large.ndjson", 20_000)
    for output in ("text", "json"):
        low = _peak_rss_kib("check", "--format", output, str(small), "--now", NOW)
        high = _peak_rss_kib("check", "--format", output, str(large), "--now", NOW)
        # Holding the 20,000 lines (48 MB of input) or their results would add tens of MB;
        # a streamed check adds next to nothing. The bound is generous on purpose.
        assert high < low * 1.10 + 8 * 1024, (output, low, high)
