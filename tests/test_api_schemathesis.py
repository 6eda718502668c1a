"""schemathesis against the service's own OpenAPI document, every route, with a valid token
of each role: no 5xx, responses conform to what the document says (status codes, media
types, headers), every error is an OperationOutcome.

Bounded for CI (CAPNOTE_SCHEMATHESIS_EXAMPLES, default 15 per route, a fixed seed); set it
higher for a longer run. Excluded: positive_data_acceptance, because the document gives the
note's shape while capnote's checks (site limits, dates, cross-field rules) rightly refuse
many shape-valid notes with a 422.
"""

from __future__ import annotations

import os
import tempfile
from datetime import UTC, datetime

import schemathesis
from hypothesis import HealthCheck, given, seed, settings
from schemathesis.specs.openapi import checks as openapi_checks

from capnote.app import create_app
from capnote.config import Settings
from tests.conftest import new_token

NOW = datetime(2026, 12, 1, 12, tzinfo=UTC)
EXAMPLES = int(os.environ.get("CAPNOTE_SCHEMATHESIS_EXAMPLES", "15"))
_folder = tempfile.TemporaryDirectory()
app = create_app(
    Settings(database_url=f"sqlite:///{_folder.name}/schemathesis.sqlite3"), clock=lambda: NOW
)
TOKENS = {
    role: new_token(f"sqlite:///{_folder.name}/schemathesis.sqlite3", role, f"schemathesis {role}")[
        0
    ]
    for role in ("submitter", "clinician", "analyst", "auditor")
}
schema = schemathesis.openapi.from_asgi("/openapi.json", app)


def _check(case: schemathesis.Case) -> None:
    for token in TOKENS.values():
        response = case.call_and_validate(
            headers={"Authorization": f"Bearer {token}"},
            excluded_checks=[openapi_checks.positive_data_acceptance],
        )
        if response.status_code >= 400:
            assert response.json()["resourceType"] == "OperationOutcome"


def test_every_route_for_every_role() -> None:
    # One plain test that walks the operations itself: schemathesis' pytest plugin is turned
    # off (pyproject addopts) because it hides pytest's closing summary line, which CI reads.
    operations = [result.ok() for result in schema.get_all_operations()]
    assert len(operations) >= 18
    for operation in operations:
        run = settings(
            max_examples=EXAMPLES,
            deadline=None,
            derandomize=True,
            suppress_health_check=list(HealthCheck),
        )(given(case=operation.as_strategy())(_check))
        seed(20261201)(run)()
