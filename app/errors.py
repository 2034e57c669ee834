"""Application errors carry their HTTP status; one handler turns them into one JSON shape."""

from __future__ import annotations


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
