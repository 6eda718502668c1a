"""JSON that parsers read differently: duplicate keys, refused up front.

Two parsers may keep different values of a duplicated key, so a body with one is ambiguous
and is refused rather than guessed at. (Deep nesting needs no check of its own: the contract
parser stops at its recursion limit with a json-invalid finding, and json.loads here stops
with a RecursionError that leaves the verdict to it.)
"""

from __future__ import annotations

import json
from typing import Any

from capnote.errors import InputError
from capnote.findings import Finding, Severity

# Members of one JSON object: no object of the note contract or of a FHIR resource comes
# near this, and a body of 90,000 unknown keys held the event loop for 3.9 s.
MEMBERS_MAX = 1_000


class _DuplicateKeyError(ValueError):
    def __init__(self, key: str) -> None:
        super().__init__(key)
        self.key = key


class _TooManyMembersError(ValueError):
    def __init__(self, count: int) -> None:
        super().__init__(count)
        self.count = count


def _no_duplicates(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    if len(pairs) > MEMBERS_MAX:
        raise _TooManyMembersError(len(pairs))
    seen: dict[str, Any] = {}
    for key, value in pairs:
        if key in seen:
            raise _DuplicateKeyError(key)
        seen[key] = value
    return seen


def _refuse(code: str, message: str, rule: str) -> InputError:
    return InputError(
        message,
        [
            Finding(
                severity=Severity.ERROR,
                code=code,
                location="",
                message=message,
                rule=rule,
                issue_type="structure",
            )
        ],
    )


def check_json(raw: bytes) -> None:
    """Raise InputError for a duplicated key or an object of more than MEMBERS_MAX members;
    else nothing.

    Malformed JSON passes through: the contract parser reports it with its position.
    """
    try:
        json.loads(raw, object_pairs_hook=_no_duplicates)
    except _DuplicateKeyError as dup:
        # The key is a field name of the contract or of the sender's invention, never a value.
        raise _refuse(
            "json-duplicate-key",
            f"the key {dup.key[:40]!r} appears twice in one object",
            "each key appears once per JSON object",
        ) from None
    except _TooManyMembersError as big:
        raise _refuse(
            "json-too-many-members",
            f"a JSON object has {big.count} members; allowed: at most {MEMBERS_MAX}",
            f"at most {MEMBERS_MAX} members per JSON object",
        ) from None
    except (ValueError, RecursionError):
        return
