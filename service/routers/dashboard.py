"""The operators' dashboard: one page, its static files, and the flagged-documents resource.

The page (``GET /dashboard``) and its files under ``/dashboard/static/`` are plain HTML, CSS,
SVG and one small script from ``service/static/``: no CDN, nothing fetched from elsewhere, so it
works offline. The script reads the same JSON API everything else uses (models, drift history
and alerts, groups, snapshots, restore) with the key the operator typed in (kept in the tab's
session storage only).

``GET /models/{model}/flagged`` lists the most recent documents this process answered with
``review: true`` (see :class:`service.metrics.FlaggedDocuments`). ``GET /review-reasons`` gives
the words of every review reason (:data:`mixture.routing.REVIEW_REASONS`), so the page says
what a code means; it needs no Redis, so it answers in degraded mode too.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

from fastapi import APIRouter, FastAPI, Query, Request
from fastapi.responses import FileResponse
from fastapi.staticfiles import StaticFiles

from mixture.routing import REVIEW_REASONS
from service.routers import COMMON_RESPONSES, Runtime
from service.schemas import Problem
from service.settings import Settings

STATIC_DIR = Path(__file__).resolve().parent.parent / "static"

# The browser itself refuses anything from another origin (no CDN, no beacons); style
# attributes are allowed because the script colours each group's line and card.
PAGE_POLICY = (
    "default-src 'none'; script-src 'self'; style-src 'self' 'unsafe-inline'; "
    "img-src 'self' data:; connect-src 'self'; base-uri 'none'; form-action 'none'; "
    "frame-ancestors 'none'"
)

router = APIRouter(tags=["dashboard"], responses=COMMON_RESPONSES)


@router.get("/dashboard", include_in_schema=False)
def dashboard_page() -> FileResponse:
    """The dashboard page."""
    return FileResponse(
        STATIC_DIR / "dashboard.html",
        media_type="text/html",
        headers={"Cache-Control": "no-cache", "Content-Security-Policy": PAGE_POLICY},
    )


@router.get(
    "/models/{model}/flagged",
    summary="Documents recently flagged for review (this process)",
    responses={404: {"model": Problem, "description": "Unknown model"}},
)
def flagged_documents(
    model: str,
    request: Request,
    runtime: Runtime,
    count: Annotated[int, Query(ge=1, le=10_000)] = 20,
) -> dict[str, Any]:
    """Newest first: id, time, group, label, reasons, MAP posterior, version and the text's
    first 200 characters. Held in this API process's memory only, lost at restart."""
    runtime.model(model)  # 404 for an unknown model
    flagged = request.app.state.flagged
    return {
        "model": model,
        "kept": flagged.keep,
        "documents": flagged.recent(model, count),
    }


@router.get("/review-reasons", summary="The review reasons and what each means, in words")
def review_reason_words() -> dict[str, Any]:
    """Every review reason a routing answer can carry (``review_reasons``), in the table's
    order, with the sentence the dashboard and the README show for it."""
    return {"reasons": [{"name": name, "words": words} for name, words in REVIEW_REASONS.items()]}


def install(app: FastAPI, settings: Settings) -> None:
    """Add the page, its static files and the flagged-documents route to the app."""
    del settings
    app.include_router(router)
    app.mount("/dashboard/static", StaticFiles(directory=STATIC_DIR), name="dashboard-static")
