"""The demo notes: an invented clinic's sessions, shipped in the package (capnote.demo, from
examples/notes in the source tree) for `capnote serve --demo` and the OpenAPI examples."""

from __future__ import annotations

from importlib import resources
from importlib.resources.abc import Traversable


def demo_notes() -> list[Traversable]:
    """Every demo note file, by name."""
    folder = resources.files("capnote.demo")
    return sorted(
        (entry for entry in folder.iterdir() if entry.name.endswith(".json")),
        key=lambda entry: entry.name,
    )
