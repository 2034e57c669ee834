"""What every page shares: the caution line, the anti-forgery token, who is signed in."""

from __future__ import annotations

from collections.abc import Mapping

from fastapi import Request
from fastapi.responses import Response

from ..deps import request_csrf
from ..people import Viewer

CAUTION = (
    "A concept audit is evidence for a human review, not a certification. For medical, safety or other "
    "regulated uses, the domain's own rules and review decide."
)


def render(request: Request, name: str, context: Mapping[str, object], *, viewer: Viewer | None, status_code: int = 200) -> Response:
    """Render a template with the caution, the viewer and their form token."""
    base = {"caution": CAUTION, "viewer": viewer, "csrf": request_csrf(request) if viewer else ""}
    page: Response = request.app.state.templates.TemplateResponse(request, name, {**base, **context}, status_code=status_code)
    return page
