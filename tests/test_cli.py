"""The command line, run as a user runs it: a real process, real files, real exit codes."""

from __future__ import annotations

import json
import os
import re
import socket
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest

from tests.conftest import EXAMPLES, INVALID, ROOT, VALID
from tests.fhir_r4_check import r4_problems

NOW = "2026-12-01T12:00:00+00:00"


def capnote(*args: str, env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-c", "from capnote.cli import main; main()", *args],
        capture_output=True,
        text=True,
        cwd=ROOT,
        timeout=120,
        env={**os.environ, **(env or {})},
        check=False,
    )


def test_check_demo_notes_passes_with_a_summary() -> None:
    run = capnote("check", *map(str, VALID), "--now", NOW)
    assert run.returncode == 0, run.stdout + run.stderr
    # Standard output is a pipe here, so the summary and the caution go to standard error.
    assert f"{len(VALID)} file(s): {len(VALID)} without errors, 0 with errors" in run.stderr
    assert "local protocol and the treating clinician decide" in run.stderr
    assert "Review visit: Tue 29 Dec 2026" in run.stdout


def test_check_invalid_notes_fails_with_every_location() -> None:
    run = capnote("check", *map(str, INVALID), "--now", NOW)
    assert run.returncode == 1
    assert "laser.series[1].pulses" in run.stdout
    assert "Traceback" not in run.stdout + run.stderr


def test_json_format_gives_operation_outcomes_that_are_valid_r4() -> None:
    files = [EXAMPLES / "invalid" / "eye-both.json", EXAMPLES / "notes" / "right-routine.json"]
    run = capnote("check", "--format", "json", *map(str, files), "--now", NOW)
    assert run.returncode == 1
    report = json.loads(run.stdout)
    assert r4_problems(report) == []  # a collection Bundle of OperationOutcomes
    first, second = (e["resource"] for e in report["entry"])
    assert first["issue"][0]["expression"] == ["eye"]
    assert first["issue"][0]["severity"] == "error"
    assert second["issue"][0]["severity"] == "information"
    assert report["entry"][0]["fullUrl"].endswith("eye-both.json")


def test_check_validates_fhir_resources_for_the_analyst(tmp_path: Path) -> None:
    emitted = capnote("emit", str(EXAMPLES / "notes" / "right-routine.json"), "--now", NOW)
    bundle = json.loads(emitted.stdout)
    good = tmp_path / "bundle.json"
    good.write_text(json.dumps(bundle))
    bundle["entry"][0]["resource"]["status"] = "done"  # fhir.resources alone would accept it
    bad = tmp_path / "bad-bundle.json"
    bad.write_text(json.dumps(bundle))
    assert capnote("check", str(good)).returncode == 0
    run = capnote("check", str(bad))
    assert run.returncode == 1
    assert "Bundle.entry[0].resource.status" in run.stdout
    assert "event-status" in run.stdout


_LOADED_PROBE = (
    "import sys\n"
    "from capnote.cli import main\n"
    "try:\n"
    "    main()\n"
    "except SystemExit as done:\n"
    "    heavy = sorted(m for m in ('sqlalchemy', 'httpx', 'fhir.resources.R4B.bundle')\n"
    "                   if m in sys.modules)\n"
    "    print('LOADED', heavy, 'EXIT', done.code)\n"
)


def _loaded_after(*args: str) -> str:
    """The heavy modules loaded once the command line has run with args, and its exit."""
    run = subprocess.run(
        [sys.executable, "-c", _LOADED_PROBE, *args],
        capture_output=True,
        text=True,
        cwd=ROOT,
        timeout=120,
        check=False,
    )
    return run.stdout.strip().splitlines()[-1]


def test_checking_notes_loads_neither_the_store_nor_the_r4b_models(tmp_path: Path) -> None:
    # An analyst's check of one file starts in a fraction of the time when the store's
    # libraries (SQLAlchemy, httpx) and the R4B models stay unloaded: they are loaded by the
    # commands and records that need them (capnote.cli.operator, capnote.batch.checking).
    notes = EXAMPLES / "notes"
    assert _loaded_after("check", "--now", NOW, str(notes)) == "LOADED [] EXIT 0"
    # A FHIR resource is checked against the generated R4 table, without the R4B models.
    emitted = capnote("emit", str(notes / "right-routine.json"), "--now", NOW)
    (tmp_path / "bundle.json").write_text(emitted.stdout)
    assert _loaded_after("check", str(tmp_path / "bundle.json")) == "LOADED [] EXIT 0"


def test_emit_is_byte_identical_across_processes() -> None:
    note = str(EXAMPLES / "notes" / "left-raised-risk-multi-series.json")
    one = capnote("emit", note, "--now", NOW, env={"PYTHONHASHSEED": "1"})
    two = capnote("emit", note, "--now", NOW, env={"PYTHONHASHSEED": "2"})
    assert one.returncode == 0, one.stderr
    assert one.stdout == two.stdout
    assert r4_problems(json.loads(one.stdout)) == []


def test_emit_refuses_a_note_with_errors() -> None:
    run = capnote("emit", str(EXAMPLES / "invalid" / "iop-out-of-range.json"), "--now", NOW)
    assert run.returncode == 1
    assert run.stdout == ""
    assert "before.iop.value_mmhg" in run.stderr


@pytest.mark.parametrize(
    "args",
    [
        ("check", "no-such-file.json"),
        ("check", "--format", "xml", str(EXAMPLES / "notes" / "right-routine.json")),
        ("check", "--now", "yesterday", str(EXAMPLES / "notes" / "right-routine.json")),
        ("frobnicate",),
    ],
)
def test_usage_errors_exit_2_without_traceback(args: tuple[str, ...]) -> None:
    run = capnote(*args)
    assert run.returncode == 2, run.stdout + run.stderr
    assert "Traceback" not in run.stderr


def test_bad_site_policy_exits_2_with_a_clear_message(tmp_path: Path) -> None:
    site = tmp_path / "site.toml"
    site.write_text("[thresholds]\nusual_pulse_energy_max_mj = 'lots'\n")
    run = capnote("check", "--policy", str(site), str(VALID[0]))
    assert run.returncode == 2
    assert "usual_pulse_energy_max_mj" in run.stderr
    assert "Traceback" not in run.stderr


def test_garbage_files_are_findings_not_crashes(tmp_path: Path) -> None:
    files = {"binary.json": b"\x00\xff\xfe garbage", "list.json": b"[1, 2, 3]", "empty.json": b""}
    for name, content in files.items():
        (tmp_path / name).write_bytes(content)
    run = capnote("check", *(str(tmp_path / n) for n in files))
    assert run.returncode == 1
    assert "Traceback" not in run.stdout + run.stderr
    assert run.stdout.count("FAILED") == 3


def test_serve_names_a_page_that_exists(tmp_path: Path) -> None:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    env = {
        **os.environ,
        "CAPNOTE_DATABASE_URL": f"sqlite:///{tmp_path / 'capnote.sqlite3'}",
        "PYTHONUNBUFFERED": "1",
    }
    with subprocess.Popen(
        [
            sys.executable,
            "-c",
            "from capnote.cli import main; main()",
            "serve",
            "--port",
            str(port),
        ],
        cwd=tmp_path,
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.DEVNULL,
        text=True,
    ) as proc:
        try:
            assert proc.stdout is not None
            line = proc.stdout.readline()
            named = re.search(r"on (http://\S+) \(.* at (/\S+)\)", line)
            assert named is not None, line
            url = named[1] + named[2]
            deadline = time.monotonic() + 60
            while True:
                try:
                    answer = httpx.get(url, timeout=5)
                    break
                except httpx.TransportError:
                    assert time.monotonic() < deadline, "the service did not start"
                    time.sleep(0.2)
            assert answer.status_code == 200, url
            assert "openapi" in answer.json()
        finally:
            proc.terminate()
            proc.wait(timeout=30)


def test_terminal_escapes_in_a_payload_are_shown_not_obeyed(tmp_path: Path) -> None:
    """A key that moves the cursor up, erases the line and prints a fake "ok" (the security
    tester's case), and a right-to-left override, reach the terminal as visible escapes."""
    note = json.loads(VALID[0].read_text())
    note["\x1b[1A\x1b[2K\rall notes ok\u202e"] = 1
    streamed = tmp_path / "hostile.ndjson"
    streamed.write_text(json.dumps(note) + "\n")
    whole = tmp_path / "hostile.json"
    whole.write_text(json.dumps(note))
    for path in (streamed, whole):
        run = capnote("check", str(path), "--now", NOW)
        assert run.returncode == 1
        out = run.stdout + run.stderr
        assert "\x1b" not in out
        assert "\r" not in out
        assert "\u202e" not in out
        assert "\\u001b[1A\\u001b[2K\\u000dall notes ok\\u202e" in run.stdout
