"""Application errors carry their HTTP status; one set of handlers turns every error into one shape.

JSON requests (paths under /api/, or an Accept of JSON) get ``{"message", "code", "status"}``;
pages get the error template with the same message. Errors of the analysis core are the user's
input that the core refused: 422, except "not enough labels yet", which is 404 like a missing
result.
"""

from __future__ import annotations

import logging
from typing import TYPE_CHECKING

from analysis.errors import AnalysisError, NotEnoughLabelsError

if TYPE_CHECKING:
    from fastapi import FastAPI, Request
    from fastapi.responses import Response

log = logging.getLogger("heedmap")


class AppError(Exception):
    status_code = 500
    code = "internal_error"

    def __init__(self, message: str) -> None:
        super().__init__(message)
        self.message = message


class NotFoundError(AppError):
    status_code = 404
    code = "not_found"


class ConflictError(AppError):
    status_code = 409
    code = "conflict"


class InvalidRequestError(AppError):
    status_code = 422
    code = "invalid_request"


class SchemaVersionError(AppError):
    code = "schema_version"


class UnauthorizedError(AppError):
    status_code = 401
    code = "sign_in_required"


class ForbiddenError(AppError):
    status_code = 403
    code = "forbidden"


def error_status(exc: Exception) -> tuple[int, str, str]:
    """(HTTP status, machine-readable code, message) for one of our errors or the core's."""
    if isinstance(exc, AppError):
        return exc.status_code, exc.code, exc.message
    if isinstance(exc, NotEnoughLabelsError):
        return 404, "not_enough_labels", str(exc)
    if isinstance(exc, AnalysisError):
        return 422, "invalid_request", str(exc)
    return 500, "internal_error", "Something went wrong on the server; the error is in its log."


def install_error_handlers(app: FastAPI, *, debug: bool = False) -> None:
    """Register the handlers: our errors and the core's by their status, validation errors as 422, anything else as 500."""
    from fastapi.exceptions import RequestValidationError
    from fastapi.responses import JSONResponse

    def wants_json(request: Request) -> bool:
        return request.url.path.startswith("/api/") or "application/json" in request.headers.get("accept", "")

    def respond(request: Request, status: int, code: str, message: str) -> Response:
        if wants_json(request):
            return JSONResponse({"message": message, "code": code, "status": status}, status_code=status)
        from .routes.common import CAUTION

        context = {"message": message, "status": status, "caution": CAUTION, "viewer": None}
        page: Response = app.state.templates.TemplateResponse(request, "error.html", context, status_code=status)
        return page

    async def known(request: Request, exc: Exception) -> Response:
        return respond(request, *error_status(exc))

    async def validation(request: Request, exc: Exception) -> Response:
        found = exc.errors() if isinstance(exc, RequestValidationError) else []
        parts = ["/".join(str(p) for p in e.get("loc", ())) + ": " + str(e.get("msg", "")) for e in found]
        return JSONResponse({"message": "; ".join(parts), "code": "invalid_request", "status": 422}, status_code=422)

    async def unexpected(request: Request, exc: Exception) -> Response:
        log.exception("unhandled error on %s", request.url.path)
        message = repr(exc) if debug else error_status(exc)[2]
        return JSONResponse({"message": message, "code": "internal_error", "status": 500}, status_code=500)

    app.add_exception_handler(AppError, known)
    app.add_exception_handler(AnalysisError, known)
    app.add_exception_handler(RequestValidationError, validation)
    app.add_exception_handler(Exception, unexpected)
