"""Review visit routes: parse, call capnote.reviews, map, return."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Depends, Header, Path, Request
from fastapi.responses import Response

from capnote.api.answers import (
    DeliveryAnswer,
    ReviewAnswer,
    ReviewCheckAnswer,
    ReviewVersionsAnswer,
    SessionReviewsAnswer,
)
from capnote.api.auth import CHECK, READ, WRITE, allow
from capnote.api.deps import Reviews
from capnote.api.docs import CHECK_BODY, REVIEW_AMEND_BODY, REVIEW_BODY, VOID_BODY, responses
from capnote.api.media import JSON, http_date, json_body, json_response
from capnote.api.notes import if_match_version
from capnote.findings import refusal
from capnote.notes import Principal
from capnote.reviews import StoredReview

router = APIRouter(tags=["reviews"])
Writer = Annotated[Principal, Depends(allow(*WRITE))]
Reader = Annotated[Principal, Depends(allow(*READ))]


def _answer(stored: StoredReview, status: int = 200) -> Response:
    """A stored version as the answer, with its ETag, Location and Last-Modified."""
    headers = {
        "ETag": f'W/"{stored.version}"',
        "Location": f"/reviews/{stored.key}",
        "Last-Modified": http_date(stored.recorded_at),
    }
    return Response(stored.json(), status, headers, media_type=JSON)


@router.post(
    "/reviews",
    status_code=201,
    openapi_extra=REVIEW_BODY,
    responses=responses(200, 201, 409, 422, model=ReviewAnswer),
)
async def submit_review(request: Request, reviews: Reviews, who: Writer) -> Response:
    """Check and store one review visit record and emit its Bundle (a resend is safe)."""
    created, stored = await reviews.submit(await json_body(request), who)
    return _answer(stored, 201 if created else 200)


@router.post(
    "/reviews/check", openapi_extra=CHECK_BODY, responses=responses(200, model=ReviewCheckAnswer)
)
async def check_review(
    request: Request, reviews: Reviews, _who: Annotated[Principal, Depends(allow(*CHECK))]
) -> Response:
    """Everything POST /reviews would produce, stored nowhere; a review with errors still
    answers 200, with accepted false."""
    body = await json_body(request)
    if not body.lstrip().startswith(b"{"):
        raise refusal(
            "wrong-type",
            "",
            "the body must be a JSON object",
            "POST /reviews/check takes a review (a JSON object)",
            issue_type="structure",
        )
    return json_response(await reviews.check(body))


@router.get("/reviews/{review_id}", responses=responses(200, 404, model=ReviewAnswer))
async def read_review(reviews: Reviews, review_id: str, _who: Reader) -> Response:
    """The latest version of a review record."""
    return _answer(await reviews.get(review_id))


@router.get(
    "/reviews/{review_id}/versions", responses=responses(200, 404, model=ReviewVersionsAnswer)
)
async def review_versions(reviews: Reviews, review_id: str, _who: Reader) -> Response:
    """Every version of a review record, oldest first."""
    return json_response({"id": review_id, "versions": await reviews.versions(review_id)})


@router.get(
    "/reviews/{review_id}/versions/{version}", responses=responses(200, 404, model=ReviewAnswer)
)
async def read_review_version(
    reviews: Reviews,
    review_id: str,
    version: Annotated[int, Path(ge=1, le=2**31 - 1)],
    _who: Reader,
) -> Response:
    """One version of a review record."""
    return _answer(await reviews.get(review_id, version))


@router.put(
    "/reviews/{review_id}",
    openapi_extra=REVIEW_AMEND_BODY,
    responses=responses(200, 404, 409, 412, 422, 428, model=ReviewAnswer),
)
async def amend_review(
    request: Request,
    reviews: Reviews,
    review_id: str,
    who: Writer,
    if_match: Annotated[str | None, Header()] = None,
) -> Response:
    """Store an amended version: {"reason": ..., "review": {...}}; a signed review needs a
    reason and If-Match."""
    body = await json_body(request)
    return _answer(await reviews.amend(review_id, body, who, if_match_version(if_match)))


@router.post(
    "/reviews/{review_id}/void",
    openapi_extra=VOID_BODY,
    responses=responses(200, 404, 412, 422, 428, model=ReviewAnswer),
)
async def void_review(
    request: Request,
    reviews: Reviews,
    review_id: str,
    who: Writer,
    if_match: Annotated[str | None, Header()] = None,
) -> Response:
    """Mark a review entered-in-error, with a reason; the session's review is owed again."""
    body = await json_body(request)
    return _answer(await reviews.void(review_id, body, who, if_match_version(if_match)))


@router.get("/reviews/{review_id}/delivery", responses=responses(200, 404, model=DeliveryAnswer))
async def review_delivery(reviews: Reviews, review_id: str, _who: Reader) -> Response:
    """Where each version's Bundle stands on its way to the hospital's FHIR server."""
    return json_response(await reviews.delivery(review_id))


@router.get("/notes/{note_id}/reviews", responses=responses(200, 404, model=SessionReviewsAnswer))
async def reviews_of_session(reviews: Reviews, note_id: str, _who: Reader) -> Response:
    """The review records of one laser session (the newest version of each), as seen."""
    return json_response(await reviews.of_session(note_id))
