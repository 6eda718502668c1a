"""Shared fixtures: the default policy, a fixed present time and the example notes."""

from __future__ import annotations

import json
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest

from service.assess import Assessor
from service.policy import Policy, load_policy

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = ROOT / "examples"
VALID = sorted((EXAMPLES / "notes").glob("*.json"))
INVALID = sorted((EXAMPLES / "invalid").glob("*.json"))
# The examples are set in late November 2026; checks run as if on this day.
NOW = datetime(2026, 12, 1, 12, 0, tzinfo=UTC)


@pytest.fixture(scope="session")
def policy() -> Policy:
    return load_policy()


@pytest.fixture(scope="session")
def assessor(policy: Policy) -> Assessor:
    return Assessor(policy)


def load(path: Path) -> dict[str, Any]:
    data: dict[str, Any] = json.loads(path.read_text())
    return data


def routine() -> dict[str, Any]:
    """A fresh copy of the routine right-eye demo note, to change in a test."""
    return load(EXAMPLES / "notes" / "right-routine.json")
