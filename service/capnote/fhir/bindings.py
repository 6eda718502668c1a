"""The required binding of each emitted resource's status, checked before a Bundle leaves.

fhir.resources accepts any string in a code element (Procedure.status "done" passes), so
capnote checks the one bound code of an emitted resource that follows the note's state.
The value sets come from the generated R4 table (core_table, from the official core
package); the other bound codes the builders write are literals, checked by the tests.
"""

from __future__ import annotations

import functools
from typing import Any

from capnote.fhir import core_table


@functools.cache
def _status_binding(kind: str) -> tuple[frozenset[str], str]:
    """The codes allowed in kind.status and the value set's id (event-status, ...)."""
    row = core_table.table()["types"][kind]["elements"][f"{kind}.status"]
    url = str(row[3])
    codes = core_table.value_set_codes(url)
    if codes is None:  # every status value set is in the core package
        raise LookupError(f"{url} cannot be expanded")
    return codes, url.rsplit("/", 1)[-1]


def status_problem(resource: dict[str, Any]) -> tuple[str, str, str] | None:
    """(location, value, value set id) when an emitted resource's status is outside its
    required value set; None when it is in it."""
    kind = resource["resourceType"]
    if f"{kind}.status" not in core_table.table()["types"][kind]["elements"]:
        return None  # a Condition: its two statuses are literals of the builder, tested
    allowed, value_set = _status_binding(kind)
    status = resource.get("status")
    if isinstance(status, str) and status in allowed:
        return None
    return (f"{kind}.status", str(status), value_set)
