"""capnote's FHIR package served: /fhir/StructureDefinition, /fhir/CodeSystem, /fhir/ValueSet.

Read and search-type (all, or by `url` or `_id`), without a token like /fhir/metadata:
receiving systems fetch them to validate what capnote sends, and they hold no patient data.
"""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Request
from fastapi.responses import Response

from capnote.api.docs import responses
from capnote.api.media import FHIR_JSON, fhir_response
from capnote.errors import NotFoundError
from capnote.fhir.profiles import resources
from capnote.findings import refusal

router = APIRouter(prefix="/fhir", tags=["fhir"])
_SEARCH = ("url", "_id")


def _items(kind: str) -> list[dict[str, Any]]:
    return resources()[kind]


def _search(request: Request, kind: str) -> Response:
    base = str(request.base_url).rstrip("/") + "/fhir"
    items = _items(kind)
    for name, value in request.query_params.multi_items():
        if name not in _SEARCH:
            raise refusal(
                "search-parameter-unknown",
                name[:64],
                f"{kind} is searched by {' and '.join(_SEARCH)} only",
                "FHIR R4 search (search.html): a parameter the server does not apply is refused",
                value=None,
                allowed=", ".join(_SEARCH),
            )
        key = "id" if name == "_id" else name
        items = [i for i in items if i.get(key) == value.split("|")[0]]
    return fhir_response(
        {
            "resourceType": "Bundle",
            "type": "searchset",
            "total": len(items),
            "link": [{"relation": "self", "url": str(request.url)}],
            "entry": [
                {"fullUrl": f"{base}/{kind}/{i['id']}", "resource": i, "search": {"mode": "match"}}
                for i in items
            ],
        }
    )


def _read(kind: str, resource_id: str) -> Response:
    for item in _items(kind):
        if item["id"] == resource_id:
            return fhir_response(item)
    raise NotFoundError(f"no {kind} {resource_id[:64]!r} in capnote's package")


@router.get("/StructureDefinition", responses=responses(200, 422, media=FHIR_JSON))
async def search_structure_definitions(request: Request) -> Response:
    """capnote's profiles (by url or _id)."""
    return _search(request, "StructureDefinition")


@router.get("/CodeSystem", responses=responses(200, 422, media=FHIR_JSON))
async def search_code_systems(request: Request) -> Response:
    """capnote's CodeSystem (by url or _id)."""
    return _search(request, "CodeSystem")


@router.get("/ValueSet", responses=responses(200, 422, media=FHIR_JSON))
async def search_value_sets(request: Request) -> Response:
    """capnote's ValueSets (by url or _id)."""
    return _search(request, "ValueSet")


@router.get("/StructureDefinition/{resource_id}", responses=responses(200, 404, media=FHIR_JSON))
async def read_structure_definition(resource_id: str) -> Response:
    """One of capnote's profiles."""
    return _read("StructureDefinition", resource_id)


@router.get("/CodeSystem/{resource_id}", responses=responses(200, 404, media=FHIR_JSON))
async def read_code_system(resource_id: str) -> Response:
    """capnote's CodeSystem."""
    return _read("CodeSystem", resource_id)


@router.get("/ValueSet/{resource_id}", responses=responses(200, 404, media=FHIR_JSON))
async def read_value_set(resource_id: str) -> Response:
    """One of capnote's ValueSets."""
    return _read("ValueSet", resource_id)
