"""The wheel is the product: built from this checkout, installed alone in a fresh virtual
environment outside it, it serves the demo and checks a note (no file of the checkout is
on the path there)."""

from __future__ import annotations

import json
import os
import re
import site
import subprocess
import sys
import time
from pathlib import Path

import httpx

from tests.conftest import ROOT
from tests.test_http_server import free_port


def run(
    argv: list[str], cwd: Path, env: dict[str, str], timeout: int = 300, *, stderr: bool = False
) -> str:
    done = subprocess.run(
        argv, cwd=cwd, env=env, capture_output=True, text=True, timeout=timeout, check=False
    )
    assert done.returncode == 0, done.stdout + done.stderr
    return done.stdout + done.stderr if stderr else done.stdout


def test_the_wheel_installed_alone_serves_the_demo_and_checks_a_note(tmp_path: Path) -> None:
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "CAPNOTE_DATABASE_URL")}
    wheels = tmp_path / "wheels"
    run(
        [
            sys.executable,
            "-m",
            "pip",
            "wheel",
            "--no-deps",
            "--no-build-isolation",
            "-q",
            "-w",
            str(wheels),
            str(ROOT),
        ],
        tmp_path,
        env,
    )
    [wheel] = wheels.glob("capnote-*.whl")
    # A fresh environment: capnote from the wheel only; its dependencies are borrowed from
    # this one (a path line, which does not run this environment's .pth files, so the
    # editable checkout is not importable there).
    fresh = tmp_path / "fresh"
    run([sys.executable, "-m", "venv", "--without-pip", str(fresh)], tmp_path, env)
    python = fresh / "bin" / "python"
    [fresh_site] = (fresh / "lib").glob("python3*/site-packages")
    (fresh_site / "borrowed.pth").write_text("\n".join(site.getsitepackages()) + "\n")
    run(
        [
            sys.executable,
            "-m",
            "pip",
            "--python",
            str(python),
            "install",
            "--no-deps",
            "-q",
            str(wheel),
        ],
        tmp_path,
        env,
    )
    where = run([str(python), "-c", "import capnote; print(capnote.__file__)"], tmp_path, env)
    assert where.strip().startswith(str(fresh_site)), where
    demo = run(
        [
            str(python),
            "-c",
            "from capnote.demo_notes import demo_notes; "
            "print('\\n'.join(str(p) for p in demo_notes()))",
        ],
        tmp_path,
        env,
    ).split()
    assert len(demo) >= 3  # the demo notes are package data
    assert all(p.startswith(str(fresh_site)) for p in demo)
    capnote = str(fresh / "bin" / "capnote")
    routine = next(p for p in demo if p.endswith("right-routine.json"))
    # exit 0: no errors; the summary goes to standard error when standard output is not a
    # terminal (issue 18), so the counts stay visible.
    checked = run([capnote, "check", routine], tmp_path, env, stderr=True)
    assert "1 file(s): 1 without errors, 0 with errors" in checked, checked
    assert "the treating clinician decide" in checked

    port = free_port()
    log = (tmp_path / "serve.log").open("w")
    served = subprocess.Popen(
        [capnote, "serve", "--demo", "--host", "127.0.0.1", "--port", str(port)],
        cwd=tmp_path,
        env={**env, "CAPNOTE_DATABASE_URL": f"sqlite:///{tmp_path / 'demo.sqlite3'}"},
        stdout=log,
        stderr=subprocess.STDOUT,
    )
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 90
        while True:
            try:
                if httpx.get(f"{base}/readyz", timeout=1).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            assert served.poll() is None, (tmp_path / "serve.log").read_text()
            assert time.monotonic() < deadline, (tmp_path / "serve.log").read_text()
            time.sleep(0.3)
        text = (tmp_path / "serve.log").read_text()
        match = re.search(r"demo clinician token: (cap_\S+)", text)
        assert match, text
        auth = {"authorization": f"Bearer {match[1]}"}
        procedures = httpx.get(f"{base}/fhir/Procedure", headers=auth, timeout=10).json()
        assert procedures["total"] == len(demo)  # every demo note was stored
        spec = httpx.get(f"{base}/openapi.json", timeout=10).json()
        body = spec["paths"]["/notes"]["post"]["requestBody"]["content"]["application/json"]
        assert len(body["examples"]) == len(demo)  # the OpenAPI examples come from the wheel
        page = httpx.get(f"{base}/", timeout=10)
        assert page.status_code == 200  # the form's page and assets are package data too
        assert "capnote" in page.text.lower()
        assert json.loads(httpx.get(f"{base}/web/defaults", timeout=10).text)["caution"]
    finally:
        served.terminate()
        served.wait(timeout=30)
        log.close()
