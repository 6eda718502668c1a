"""Inputs of a batch: folders walked in name order, files and folders mixed, standard input,
and NDJSON lines numbered as an editor numbers them."""

from __future__ import annotations

import ast
import io
import json
import subprocess
from pathlib import Path

import pytest

from capnote.batch import inputs
from capnote.batch.inputs import STDIN, Source, expand, records
from capnote.errors import UsageError
from tests.batch_helpers import CAPNOTE, NOW, ReportPage, capnote, note
from tests.conftest import ROOT, VALID


def _tree(root: Path) -> Path:
    """A folder as an analyst gets it: notes, NDJSON dumps, and things that are neither."""
    files = {
        "b.json": json.dumps(note(1, "clean")),
        "a.ndjson": json.dumps(note(2, "clean")) + "\n" + json.dumps(note(3, "warning")) + "\n",
        "sub/c.json": json.dumps(note(4, "error")),
        "sub/deeper/d.ndjson": json.dumps(note(5, "clean")) + "\n",
        "Upper.JSON": json.dumps(note(6, "clean")),
        ".hidden.json": "not json at all",
        ".cache/e.json": "not json at all",
        "notes.txt": "not json at all",
        "README.md": "# not json at all",
        "sub/f.json.bak": "not json at all",
    }
    for name, text in files.items():
        path = root / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text)
    return root


def test_a_folder_is_walked_recursively_in_name_order(tmp_path: Path) -> None:
    root = _tree(tmp_path / "in")
    found = expand([root])
    # Code-point order of the path parts: capitals first, a folder's files together.
    assert [(s.path.relative_to(root).as_posix(), s.streamed) for s in found] == [
        ("Upper.JSON", False),
        ("a.ndjson", True),
        ("b.json", False),
        ("sub/c.json", False),
        ("sub/deeper/d.ndjson", True),
    ]


def test_files_and_folders_keep_command_line_order(tmp_path: Path) -> None:
    root = _tree(tmp_path / "in")
    single = VALID[0]
    found = expand([single, root, root / "a.ndjson"])
    assert found[0] == Source(single, False)
    assert found[-1] == Source(root / "a.ndjson", True)
    assert len(found) == 7


@pytest.mark.parametrize(
    ("named", "ndjson", "streamed"),
    [
        ("dump.ndjson", False, True),
        ("dump.NDJSON", False, True),
        ("note.json", False, False),
        ("note.json", True, True),  # --ndjson: every named file, whatever its ending
        ("export.txt", True, True),
        ("export.txt", False, False),
    ],
)
def test_a_named_file_is_streamed_by_ending_or_option(
    tmp_path: Path, named: str, ndjson: bool, streamed: bool
) -> None:
    path = tmp_path / named
    path.write_text("{}")
    assert expand([path], ndjson) == [Source(path, streamed)]


def test_files_in_a_folder_are_read_by_their_ending_even_with_the_option(tmp_path: Path) -> None:
    root = _tree(tmp_path / "in")
    assert Source(root / "b.json", False) in expand([root], ndjson=True)


@pytest.mark.parametrize(
    "contents",
    [
        {},
        {".hidden.json": "{}", "notes.txt": "{}"},
        {".git/HEAD.json": "{}", "x.yaml": "a: 1"},
    ],
    ids=["empty", "hidden-and-other", "hidden-folder"],
)
def test_a_folder_without_json_or_ndjson_files_is_a_usage_error(
    tmp_path: Path, contents: dict[str, str]
) -> None:
    root = tmp_path / "in"
    root.mkdir()
    for name, text in contents.items():
        (root / name).parent.mkdir(parents=True, exist_ok=True)
        (root / name).write_text(text)
    with pytest.raises(UsageError, match=r"holds no \.json or \.ndjson files"):
        expand([root])
    run = capnote("check", str(root))
    assert run.returncode == 2, run.stdout + run.stderr
    assert "holds no .json or .ndjson files" in run.stderr
    assert "Traceback" not in run.stderr


def test_a_link_back_up_the_tree_is_not_followed(tmp_path: Path) -> None:
    root = _tree(tmp_path / "in")
    (root / "sub" / "loop").symlink_to(root, target_is_directory=True)
    assert len(expand([root])) == 5


def test_an_excluded_output_is_not_read_back(tmp_path: Path) -> None:
    root = _tree(tmp_path / "in")
    out = root / "bundles.ndjson"
    out.write_text("{}\n")
    assert Source(out, True) not in expand([root], exclude=[out])
    assert Source(out, True) in expand([root])


def test_lines_are_numbered_as_an_editor_numbers_them(tmp_path: Path) -> None:
    path = tmp_path / "dump.ndjson"
    # A byte order mark on the first line (RFC 8259 lets a reader ignore it), a blank line,
    # a line of spaces and a last line without a newline.
    path.write_bytes(b'\xef\xbb\xbf{"a": 1}\n\n   \n{"b": 2}\r\n{"c": 3}')
    got = [(r.line, r.data) for r in records([Source(path, True)])]
    assert got == [(1, b'{"a": 1}'), (4, b'{"b": 2}'), (5, b'{"c": 3}')]


def test_an_overlong_line_is_refused_unread_and_the_next_one_read(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(inputs, "MAX_LINE_BYTES", 64)
    path = tmp_path / "dump.ndjson"
    path.write_bytes(b'{"ok": 1}\n' + b"x" * 1000 + b'\n{"ok": 2}\n')
    got = list(records([Source(path, True)]))
    assert [(r.line, r.data) for r in got] == [(1, b'{"ok": 1}'), (2, None), (3, b'{"ok": 2}')]
    assert got[1].failure is not None
    assert got[1].failure.code == "line-too-long"


def test_a_file_that_cannot_be_opened_is_a_finding(tmp_path: Path) -> None:
    (record,) = records([Source(tmp_path / "gone.ndjson", True)])
    assert record.data is None
    assert record.failure is not None
    assert record.failure.code == "file-unreadable"


def test_standard_input_is_read_as_ndjson() -> None:
    stream = io.BytesIO(b'{"a": 1}\n{"b": 2}\n')
    got = [(r.source.name, r.line) for r in records(expand([STDIN]), stream)]
    assert got == [("<stdin>", 1), ("<stdin>", 2)]
    with pytest.raises(UsageError, match="once"):
        expand([STDIN, STDIN])


def test_check_walks_folders_and_files_together(tmp_path: Path) -> None:
    root = _tree(tmp_path / "in")
    single = ROOT / "examples" / "notes" / "right-routine.json"
    run = capnote("check", str(single), str(root), "--now", NOW)
    assert run.returncode == 1, run.stdout + run.stderr
    order = [line.split(" (note)")[0] for line in run.stdout.splitlines() if " (note): " in line]
    assert order == [
        str(single),
        str(root / "Upper.JSON"),
        str(root / "b.json"),
        str(root / "sub/c.json"),
    ]
    assert f"{root / 'a.ndjson'}:2: warning" in run.stdout
    assert f"{root / 'sub/c.json'} (note): FAILED" in run.stdout
    assert "7 record(s) in 6 file(s): 6 without errors, 1 with errors" in run.stderr
    assert ".hidden" not in run.stdout
    assert ".cache" not in run.stdout


def test_check_reads_standard_input() -> None:
    lines = json.dumps(note(1, "clean")) + "\n" + json.dumps(note(2, "error")) + "\n"
    run = capnote("check", "-", "--now", NOW, stdin=lines)
    assert run.returncode == 1, run.stdout + run.stderr
    assert "<stdin>:2: error" in run.stdout
    assert "2 record(s) in 1 file(s): 1 without errors, 1 with errors" in run.stderr


def test_batch_modules_know_nothing_of_the_command_line() -> None:
    # service/batch is the pure part: the command line's frameworks stay in service/cli.
    for path in sorted((ROOT / "service" / "capnote" / "batch").glob("*.py")):
        tree = ast.parse(path.read_text())
        imported = {
            alias.name.split(".")[0]
            for node in ast.walk(tree)
            if isinstance(node, ast.Import)
            for alias in node.names
        } | {
            (node.module or "").split(".")[0]
            for node in ast.walk(tree)
            if isinstance(node, ast.ImportFrom)
        }
        assert not imported & {"typer", "click", "rich"}, path.name
        assert len(path.read_text().splitlines()) <= 400, path.name


@pytest.mark.parametrize("report", [False, True])
def test_a_reader_that_goes_away_gets_its_own_exit_code(tmp_path: Path, report: bool) -> None:
    # `capnote check big.ndjson | head`: the pipe closes early. Exit 141 (128 + SIGPIPE, as a
    # shell reports it), never 1 ("errors found"), and stderr says whether the report was
    # written: it is, in full, since the checking went on without a reader.
    dump = tmp_path / "dump.ndjson"
    dump.write_text("".join(json.dumps(note(i, "error")) + "\n" for i in range(1, 2001)))
    target = tmp_path / "r.html"
    extra = ["--report", str(target), "--print-findings"] if report else []
    with subprocess.Popen(
        [*CAPNOTE, "check", str(dump), "--now", NOW, *extra],
        cwd=ROOT,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    ) as proc:
        assert proc.stdout is not None
        assert proc.stderr is not None
        assert proc.stdout.readline().startswith(str(dump).encode())
        proc.stdout.close()
        err = proc.stderr.read().decode()
        proc.wait(timeout=120)
    assert proc.returncode == 141, err
    assert "broken pipe" in err
    assert "Traceback" not in err
    assert "incident" not in err
    if report:
        assert f"the report was written to {target}" in err
        assert ReportPage(target.read_text()).counts["records"] == 2000
    else:
        assert "no report was asked for" in err
        assert not target.exists()
