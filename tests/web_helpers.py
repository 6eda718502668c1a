"""Helpers for the form's browser tests: the real service on 127.0.0.1 in a thread, tokens,
and Debian's Chromium driven by Playwright (never a downloaded browser)."""

from __future__ import annotations

import os
import shutil
import socket
import threading
import time
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from datetime import datetime
from pathlib import Path
from typing import Any, NoReturn

import pytest
import uvicorn
from fastapi import FastAPI

from capnote.api import web
from capnote.app import create_app
from capnote.config import Settings
from tests.conftest import new_token as store_token

CHROMIUM = Path("/usr/bin/chromium")
# Debian ships only the en-US resources with chromium; chromium-l10n adds en-GB, which makes
# date fields read day/month/year as in the clinic.
EN_GB = Path("/usr/lib/chromium/locales/en-GB.pak")
CHROMIUM_ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
    "--lang=en-GB",
]
AXE = Path(__file__).resolve().parent / ".node" / "node_modules" / "axe-core" / "axe.min.js"
ARTIFACTS = Path(__file__).resolve().parent / "artifacts"


def in_ci() -> bool:
    return os.environ.get("CI", "").lower() == "true"


def missing(reason: str) -> NoReturn:
    """Skip outside CI; in CI a missing browser part fails the run."""
    if in_ci():
        pytest.fail(reason)
    pytest.skip(reason)


# The numbering systems of the invented clinic in examples/notes, as a site sets them.
SITE = "https://harbourside-eye.example/fhir/sid"
SYSTEMS = {
    "patient_id_system": f"{SITE}/mrn",
    "visit_id_system": f"{SITE}/visit",
    "staff_id_system": f"{SITE}/staff",
}


def build_app(database_url: str, clock: Callable[[], datetime], *, systems: bool = True) -> FastAPI:
    """The whole service with the form's router (added here until app.py includes it), with
    the site's numbering systems set unless systems is False."""
    settings = Settings(database_url=database_url, **(SYSTEMS if systems else {}))
    app = create_app(settings, clock=clock)
    if not any(getattr(route, "path", None) == "/" for route in app.routes):
        app.include_router(web.router)
    return app


def new_token(app: FastAPI, role: str, now: datetime) -> str:
    """A token of this role in the app's database (the store migrates it first). The store
    is async; Playwright's sync API keeps an event loop on this thread, so the store's own
    loop runs on another thread."""
    url = app.state.settings.database_url
    with ThreadPoolExecutor(max_workers=1) as pool:
        token, _ = pool.submit(store_token, url, role, f"form test {role}", now).result()
    return token


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port: int = s.getsockname()[1]
        return port


@contextmanager
def live_server(app: FastAPI) -> Iterator[str]:
    """uvicorn serving the app on a free port in a thread; yields the base URL."""
    port = free_port()
    config = uvicorn.Config(
        app, host="127.0.0.1", port=port, log_level="warning", ws="none", lifespan="on"
    )
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, name=f"uvicorn-{port}", daemon=True)
    thread.start()
    try:
        deadline = time.monotonic() + 30
        while not server.started:
            if not thread.is_alive() or time.monotonic() > deadline:
                raise RuntimeError("the test server did not start")
            time.sleep(0.02)
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=30)  # the app's lifespan closes its store


def playwright_or_skip() -> Any:
    """The sync_playwright factory, after checking that Chromium and its en-GB files exist."""
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        missing("playwright is not installed (pip install playwright)")
    if not CHROMIUM.exists() or shutil.which(str(CHROMIUM)) is None:
        missing("Debian's chromium is missing (apt-get install chromium)")
    if not EN_GB.exists():
        missing("chromium's en-GB locale is missing (apt-get install chromium-l10n)")
    return sync_playwright


def browser_env() -> dict[str, str]:
    """Chromium's own environment: British English, whatever the machine's locale."""
    return {**os.environ, "LANG": "en_GB.UTF-8", "LANGUAGE": "en_GB"}


def launched_chromium() -> Iterator[Any]:
    """Debian's Chromium under Playwright, headless, as every browser test starts it; a
    generator for a module-scoped fixture (``yield from launched_chromium()``)."""
    factory = playwright_or_skip()
    with factory() as playwright:
        browser = playwright.chromium.launch(
            executable_path=str(CHROMIUM), headless=True, args=CHROMIUM_ARGS, env=browser_env()
        )
        yield browser
        browser.close()
