"""The home page: what the signed-in person can do here."""

from __future__ import annotations

from fastapi import Request
from fastapi.responses import Response

from .. import campaigns, store
from ..deps import OptionalViewerDep, SessionDep, guarded_router
from .common import render

router = guarded_router()
routers = (router,)


@router.get("/")
def home(request: Request, s: SessionDep, viewer: OptionalViewerDep) -> Response:
    """Project overview, or the way in for someone not signed in."""
    if viewer is None:
        return render(request, "index.html", {"campaigns": [], "progress": {}, "stats": None}, viewer=None)
    listed = [c for c in campaigns.list_campaigns(s) if viewer.role != "annotator" or viewer.campaign_id in (None, c.id)]
    if viewer.role == "annotator":
        listed = [c for c in listed if c.closed_at is None]
    progress = {c.id: campaigns.person_progress(s, c, viewer.person_id)[0] for c in listed}
    stats = None
    run_id = store.latest_run_id(s)
    if viewer.role != "annotator" and run_id is not None:
        images, regions = store.run_counts(s, run_id)
        stats = {"run_id": run_id, "images": images, "regions": regions}
    return render(request, "index.html", {"campaigns": listed, "progress": progress, "stats": stats}, viewer=viewer)
