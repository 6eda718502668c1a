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

import orjson

from capnote.errors import NotFoundError
from capnote.fhir.readmodel import READABLE, StoredBundle, parse_id
from capnote.store.base import Store, VersionRow
from capnote.store.codec import unpack_bundle, unpack_roles


@dataclass(frozen=True, slots=True)
class SearchPage:
    """What one searchset page asks for, once the route has read the parameters."""

    patient: tuple[str, str] | None
    status: str | None
    after: tuple[str, datetime] | None  # ("ge" | "gt", time)
    before: tuple[str, datetime] | None  # ("le" | "lt", time)
    page: int
    count: int


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


class FhirReads:
    """Reads of the resources capnote has emitted, as the FHIR R4 read API serves them."""

    def __init__(self, store: Store) -> None:
        self.store = store

    async def read(self, kind: str, resource_id: str) -> dict[str, Any]:
        """The current version of a resource."""
        key, role = _id(resource_id)
        row = await self.store.latest(key)
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

    async def search(
        self,
        kind: str,
        wanted: SearchPage,
        base: str,
        self_url: str,
        page_url: Callable[[int], str],
    ) -> dict[str, Any]:
        """One page of a searchset (page_url gives the URL of another page)."""
        total, rows = await self.store.fhir_search(
            kind,
            patient=wanted.patient,
            status=wanted.status,
            after=wanted.after,
            before=wanted.before,
            offset=(wanted.page - 1) * wanted.count,
            limit=wanted.count,
        )
        resources = []
        for r in rows:
            resource = _bundle(r.note_key, r.version, r.recorded_at, r.bundle, r.roles).served(
                r.role, kind
            )
            if resource is not None:  # the index and the Bundle are written together: always
                resources.append(resource)
        links = [{"relation": "self", "url": self_url}]
        if wanted.page * wanted.count < total:
            links.append({"relation": "next", "url": page_url(wanted.page + 1)})
        return {
            "resourceType": "Bundle",
            "type": "searchset",
            "total": total,
            "link": links,
            "entry": [
                {
                    "fullUrl": f"{base}/{kind}/{resource['id']}",
                    "resource": resource,
                    "search": {"mode": "match"},
                }
                for resource in resources
            ],
        }
