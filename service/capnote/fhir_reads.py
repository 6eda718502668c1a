"""The FHIR read API's work: read, vread, history and searches over the stored Bundles.

Routes (capnote.api.fhir) parse the request and call one method here; this reads the store,
serves resources from their stored Bundles (capnote.fhir.readmodel) and builds the
searchset and history Bundles.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime
from typing import Any
from urllib.parse import urlencode

import orjson

from capnote.errors import NotFoundError, UsageError
from capnote.fhir.outcome import message_outcome
from capnote.fhir.readmodel import READABLE, SEARCHABLE, StoredBundle, parse_id
from capnote.fhir.search import IDENTIFYING, Cursor, parse_search
from capnote.store.base import Store, VersionRow
from capnote.store.codec import unpack_bundle, unpack_roles


def _kind(kind: str) -> str:
    if kind not in READABLE:
        raise NotFoundError("capnote serves no resources of this type")
    return kind


def _id(resource_id: str) -> tuple[str, str]:
    """(note id, role) of a resource id; anything else names nothing (and never reaches SQL)."""
    parsed = parse_id(resource_id)
    if parsed is None:
        raise NotFoundError("no record with this id")
    return parsed


def _bundle(key: str, version: int, at: datetime, bundle: bytes, roles: str) -> StoredBundle:
    data = orjson.loads(unpack_bundle(bundle))
    return StoredBundle(key, version, at, data, tuple(r for _k, r in unpack_roles(roles)))


def _of_row(row: VersionRow) -> StoredBundle:
    return _bundle(row.note_key, row.version, row.recorded_at, row.bundle, row.roles)


def _provenance_version(kind: str, role: str) -> int | None:
    """The note version a Provenance id names (provenance-<n>), or None for other reads."""
    number = role.removeprefix("provenance-")
    if kind != "Provenance" or number == role or not (number.isascii() and number.isdigit()):
        return None
    return int(number) if len(number) <= 9 else 0


class FhirReads:
    """Reads of the resources capnote has emitted, as the FHIR R4 read API serves them."""

    def __init__(
        self,
        store: Store,
        clock: Callable[[], datetime],
        patient_id_system: str | None = None,
    ) -> None:
        self.store = store
        self.clock = clock
        # The identifier system whose values are the site's Patient ids (patient=Patient/x).
        self.patient_id_system = patient_id_system

    async def read(self, kind: str, resource_id: str) -> dict[str, Any]:
        """The current version of a resource."""
        key, role = _id(resource_id)
        version = _provenance_version(kind, role)
        # A version's Provenance is in that version's Bundle only (it is never updated).
        row = await (
            self.store.latest(key) if version is None else self.store.version(key, version)
        )
        resource = _of_row(row).served(role, _kind(kind)) if row is not None else None
        if resource is None:
            raise NotFoundError(f"no {kind} with this id")
        return resource

    async def vread(self, kind: str, resource_id: str, version: int) -> dict[str, Any]:
        """One version of a resource."""
        key, role = _id(resource_id)
        row = await self.store.version(key, version)
        resource = _of_row(row).served(role, _kind(kind)) if row is not None else None
        if resource is None:
            raise NotFoundError(f"no version {version} of this {kind}")
        return resource

    async def history(self, kind: str, resource_id: str, base: str) -> dict[str, Any]:
        """Every version of a resource, newest first, as a history Bundle."""
        key, role = _id(resource_id)
        kind = _kind(kind)
        found = []
        for row in reversed(await self.store.versions(key)):
            resource = _of_row(row).served(role, kind)
            if resource is not None:
                found.append((row.version, resource))
        if not found:
            raise NotFoundError(f"no {kind} with this id")
        # The first version this resource appeared in created it; later ones updated it.
        first = found[-1][0]
        return {
            "resourceType": "Bundle",
            "type": "history",
            "total": len(found),
            "entry": [
                {
                    "fullUrl": f"{base}/{kind}/{resource_id}",
                    "resource": resource,
                    "request": {
                        "method": "POST" if version == first else "PUT",
                        "url": kind if version == first else f"{kind}/{resource_id}",
                    },
                    "response": {
                        "status": "201 Created" if version == first else "200 OK",
                        "etag": f'W/"{version}"',
                    },
                }
                for version, resource in found
            ],
        }

    async def search(self, kind: str, asked: SearchRequest) -> dict[str, Any]:
        """One page of a searchset for the parameters asked (see capnote.fhir.search)."""
        if kind in READABLE and kind not in SEARCHABLE:
            raise UsageError(
                f"{kind} is read by id here, not searched (see the CapabilityStatement)"
            )
        found = parse_search(
            _kind(kind),
            asked.pairs,
            lenient=asked.lenient,
            patient_id_system=self.patient_id_system,
            now=self.clock(),
        )
        limit = 0 if found.count_only else found.count
        # One row more than the page shows says whether there is a next page.
        total, rows = await self.store.fhir_search(
            found, total=found.total or found.count_only, limit=limit and limit + 1
        )
        more = len(rows) > limit
        rows = rows[:limit]
        resources = []
        for r in rows:
            resource = _bundle(r.note_key, r.version, r.recorded_at, r.bundle, r.roles).served(
                r.role, kind
            )
            if resource is not None:  # the index and the Bundle are written together: always
                resources.append(resource)
        applied = [
            (name, value)
            for name, value in found.applied
            if not (asked.posted and name in IDENTIFYING)
        ]
        where = f"{asked.base}/{kind}" + ("/_search" if asked.posted else "")
        # The self link names this page: what was applied and, past the first, its cursor.
        here = applied if found.cursor is None else [*applied, ("_cursor", found.cursor.text())]
        links = [{"relation": "self", "url": _url(where, here)}]
        if more and rows:
            last = rows[-1]
            cursor = Cursor(last.sort_at, last.note_key, last.role)
            paged = [*(p for p in applied if p[0] != "_count"), ("_count", str(found.count))]
            links.append(
                {"relation": "next", "url": _url(where, [*paged, ("_cursor", cursor.text())])}
            )
        bundle: dict[str, Any] = {"resourceType": "Bundle", "type": "searchset"}
        if total is not None:
            bundle["total"] = total
        bundle["link"] = links
        entries: list[dict[str, Any]] = [
            {
                "fullUrl": f"{asked.base}/{kind}/{resource['id']}",
                "resource": resource,
                "search": {"mode": "match"},
            }
            for resource in resources
        ]
        if found.ignored:
            # Prefer: handling=lenient: what was left out is said, not only dropped.
            note = "ignored search parameters (not supported): " + ", ".join(found.ignored)
            entries.append(
                {
                    "resource": message_outcome("warning", "not-supported", note),
                    "search": {"mode": "outcome"},
                }
            )
        if entries:
            bundle["entry"] = entries
        return bundle


@dataclass(frozen=True, slots=True)
class SearchRequest:
    """A search as the route read it: the parameters in order, whether the client asked
    for lenient handling, whether they came in a POST body, and the server's FHIR base."""

    pairs: list[tuple[str, str]]
    lenient: bool
    posted: bool
    base: str


def _url(where: str, params: list[tuple[str, str]]) -> str:
    return f"{where}?{urlencode(params)}" if params else where
