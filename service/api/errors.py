"""The one JSON error shape, its OpenAPI schema, and the handlers that produce it."""

from __future__ import annotations

import logging
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from pydantic import BaseModel, ValidationError
from sqlalchemy.exc import SQLAlchemyError
from starlette.exceptions import HTTPException as StarletteHTTPException

from service.api.fields import SLUG_PATTERN
from service.errors import ServiceError, ServiceUnavailable
from service.policy.attributes import NAME_PATTERN, TEXT_PATTERN, VALUE_PATTERN, control_character
from service.store.db import DatabaseUnavailable, is_unavailable

log = logging.getLogger("evenhand.api")


class ErrorDetail(BaseModel):
    code: str
    message: str
    field: str | None = None


class ErrorBody(ErrorDetail):
    details: list[ErrorDetail] = []


class ErrorResponse(BaseModel):
    """Every refusal: a stable code, a message a person can act on, the field when known."""

    error: ErrorBody


def error_responses(*statuses: int) -> dict[int | str, dict[str, Any]]:
    """OpenAPI ``responses=`` entries for the error statuses a route can return."""
    descriptions = {
        400: "Malformed JSON or a bad request",
        401: "Missing, unknown or revoked bearer token",
        403: "The key's role may not call this endpoint, or a four-eyes violation",
        404: "Not found",
        409: "Conflict with the current state (lifecycle, idempotency)",
        413: "Body or batch too large",
        415: "The body is not of the media type the route reads",
        422: "Invalid input: see error.field and error.details",
        503: "Unavailable for now (the database, or the server shutting down): retry after "
        "the Retry-After header's seconds",
    }
    return {
        s: {"model": ErrorResponse, "description": descriptions.get(s, "Error")} for s in statuses
    }


def error_json(
    status: int,
    code: str,
    message: str,
    field: str | None = None,
    details: list[dict[str, Any]] | None = None,
    headers: dict[str, str] | None = None,
) -> JSONResponse:
    body = {"error": {"code": code, "message": message, "field": field, "details": details or []}}
    return JSONResponse(body, status_code=status, headers=headers)


def _loc_to_field(loc: tuple[Any, ...] | list[Any]) -> str | None:
    parts = [str(p) for p in loc if p not in ("body", "query", "path", "header")]
    return ".".join(parts) or None


_TEXT_PATTERNS = {TEXT_PATTERN, NAME_PATTERN, VALUE_PATTERN}


def _message(err: Any) -> str:
    """pydantic's message, or ours where it would only quote a regular expression."""
    if err.get("type") == "string_pattern_mismatch":
        pattern = (err.get("ctx") or {}).get("pattern")
        text = err.get("input")
        if pattern == SLUG_PATTERN:
            return (
                "is not a policy name: 1 to 64 of a-z, 0-9, '.', '_' and '-', starting with a "
                "letter or digit"
            )
        if pattern in _TEXT_PATTERNS and isinstance(text, str):
            found = control_character(text)
            if found is not None:
                return f"contains the control character {found}, which is not accepted"
            if pattern == VALUE_PATTERN and "|" in text:
                return "contains '|', which separates the values of a group key"
    return str(err.get("msg", "invalid value"))


def validation_details(errors: list[Any]) -> list[dict[str, Any]]:
    out = []
    for err in errors:
        out.append(
            {
                "code": str(err.get("type", "invalid")),
                "message": _message(err),
                "field": _loc_to_field(err.get("loc", ())),
            }
        )
    return out


def _validation_response(errors: list[Any]) -> JSONResponse:
    if any(e.get("type") == "json_invalid" for e in errors):
        first = next(e for e in errors if e.get("type") == "json_invalid")
        ctx = first.get("ctx") or {}
        reason = ctx.get("error", "invalid JSON")
        return error_json(400, "malformed_json", f"the request body is not valid JSON: {reason}")
    details = validation_details(errors)
    field: str | None = details[0]["field"] if details else None
    text: str = details[0]["message"] if details else "invalid input"
    message = f"{field}: {text}" if field else text
    if len(details) > 1:
        message += f" (and {len(details) - 1} more problem(s), see details)"
    return error_json(422, "validation_error", message, field, details)


def service_error_response(exc: ServiceError) -> JSONResponse:
    headers = None
    if exc.status_code == 401:
        headers = {"WWW-Authenticate": "Bearer"}
    elif isinstance(exc, ServiceUnavailable):
        headers = {"Retry-After": str(exc.retry_after)}
    return error_json(
        exc.status_code, exc.code, exc.message, exc.field, exc.details, headers=headers
    )


def install_error_handlers(app: FastAPI) -> None:
    @app.exception_handler(ServiceError)
    async def _service_error(_request: Request, exc: ServiceError) -> JSONResponse:
        # Every refusal, the policy engine's included: the one root (service.errors).
        return service_error_response(exc)

    @app.exception_handler(SQLAlchemyError)
    async def _database_error(_request: Request, exc: SQLAlchemyError) -> JSONResponse:
        # The one place a database error becomes an answer: unavailable (a lost or refused
        # connection, a restart, a timeout) is a 503 to retry, never a 500.
        if is_unavailable(exc):
            log.warning("database unavailable: %s", type(exc).__name__)
            return service_error_response(DatabaseUnavailable())
        log.error("database error: %s", type(exc).__name__, exc_info=exc)
        return error_json(500, "internal_error", "internal error; the request was not recorded")

    @app.exception_handler(RequestValidationError)
    async def _request_validation(_request: Request, exc: RequestValidationError) -> JSONResponse:
        return _validation_response(list(exc.errors()))

    @app.exception_handler(ValidationError)
    async def _pydantic_validation(_request: Request, exc: ValidationError) -> JSONResponse:
        return _validation_response(list(exc.errors()))

    @app.exception_handler(StarletteHTTPException)
    async def _http_error(_request: Request, exc: StarletteHTTPException) -> JSONResponse:
        if exc.status_code == 400:
            # FastAPI's one 400: a body it could not decode (e.g. bytes that are not UTF-8).
            return error_json(
                400, "malformed_json", "the request body is not valid JSON (nor UTF-8 text)"
            )
        codes = {404: "not_found", 405: "method_not_allowed"}
        return error_json(
            exc.status_code, codes.get(exc.status_code, "http_error"), str(exc.detail)
        )

    @app.exception_handler(Exception)
    async def _unexpected(_request: Request, exc: Exception) -> JSONResponse:
        # The message may carry internals; log the type only and say nothing specific.
        log.error("unhandled error: %s", type(exc).__name__, exc_info=exc)
        return error_json(500, "internal_error", "internal error; the request was not recorded")
