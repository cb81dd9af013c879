"""The HTTP API: FastAPI app factory, error mapping and the uvicorn entry point.

Every error a user can cause answers 4xx with ``{"detail": message, "error": kind}``:
closure.errors.UserError and its subclasses (status by class, see api.errors), request
validation (422 with field paths and allowed values). An unreachable Redis or catalog answers
503. OpenAPI is at /openapi.json, interactive docs at /docs.
"""

from __future__ import annotations

import json
import logging
import socket

import redis
import sqlalchemy.exc
from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from pydantic import BaseModel, Field
from starlette.exceptions import HTTPException as StarletteHTTPException

from api.deps import Settings
from api.errors import AuthError, status_for
from api.routers import datasets, health, jobs, models, products, reports, runs, sweeps
from closure import __version__
from closure.errors import UserError

log = logging.getLogger("closure.api")


def create_app(settings: Settings | None = None) -> FastAPI:
    """The API for ``settings`` (default: from the CLOSURE_* environment)."""
    settings = settings or Settings.from_env()
    settings.check()
    app = FastAPI(
        title="closure", version=__version__,
        description="Queue subgrid-scale closure discovery jobs on simulation data, follow "
                    "them, and query and export the discovered models. A priori skill does "
                    "not guarantee a stable or accurate coarse simulation: validate a model "
                    "a posteriori before relying on it.")
    app.state.settings = settings
    app.state.store = None
    app.state.redis = None
    for module in (jobs, datasets, models, runs, reports, products, sweeps, health):
        app.include_router(module.router)
    _install_error_handlers(app)
    app.add_middleware(RefuseNulBytes)
    app.add_middleware(AnswerOptions, api=app)
    app.openapi = lambda: _openapi(app)
    return app


# --------------------------------------------------------------------------- the error body

class FieldError(BaseModel):
    """One invalid field of a request."""

    field: str = Field(description="the field's path, e.g. filter.ratio")
    message: str
    in_: str | None = Field(None, alias="in", description="body, query, path or header")


class ErrorBody(BaseModel):
    """Every 4xx and 503 answer: the message says what to change."""

    detail: str = Field(description="what is wrong and what to change")
    error: str = Field(description="the kind of error, e.g. ValidationError, NotFoundError")
    errors: list[FieldError] | None = Field(
        None, description="the invalid fields (validation errors only; at most 20 listed)")


_STATUS_TEXT = {
    400: "A bad request (a NUL byte in the URL, an option the data cannot take)",
    401: "A missing or wrong bearer token (servers started with a token)",
    403: "A path outside the server's data roots, or a report file that is not one",
    404: "An unknown job, dataset or model id",
    409: "The request does not fit the resource's state",
    413: "An upload or input over the server's size limits (the message names the limit)",
    415: "An upload in an encoding the server does not take",
    422: "An invalid request: the message and ``errors`` name each field",
    503: "The job queue (Redis) or the catalog database is not answering",
}
#: the error statuses each route may answer besides 400, 401, 422 and 503 (every route)
_ROUTE_ERRORS = {
    ("post", "/jobs"): (403, 404, 409, 413),
    ("get", "/jobs/{job_id}"): (404,),
    ("delete", "/jobs/{job_id}"): (404, 409),
    ("post", "/datasets"): (413, 415),
    ("get", "/datasets/{dataset_id}"): (404,),
    ("get", "/models/{model_id}"): (404,),
    ("get", "/models/{model_id}/export"): (404,),
    ("post", "/models/{model_id}/les"): (403, 404, 413),
    ("get", "/models/{model_id}/les"): (404,),
    ("get", "/models/{model_id}/report"): (404,),
    ("get", "/models/{model_id}/report/"): (404,),
    ("get", "/models/{model_id}/report/{filename}"): (403, 404),
}
#: other answers a route gives besides its default status: (status, description, same body)
_ROUTE_ALSO = {
    ("post", "/jobs"): (200, "An identical job exists: its status, with reused true"),
    ("post", "/datasets"): (200, "The same file was uploaded before: its record"),
    ("post", "/models/{model_id}/les"): (200, "The same run exists: its status, reused true"),
    ("get", "/health"): (503, "Redis or the catalog is not answering (same body, with why)"),
}


def _openapi(app: FastAPI) -> dict:
    """FastAPI's document with every answer the routes give: the error body (ErrorBody) for
    each error status, the 422 body as it really is, and the second success statuses."""
    if app.openapi_schema:
        return app.openapi_schema
    from fastapi.openapi.utils import get_openapi

    doc = get_openapi(title=app.title, version=app.version, description=app.description,
                      routes=app.routes)
    schemas = doc.setdefault("components", {}).setdefault("schemas", {})
    body = ErrorBody.model_json_schema(ref_template="#/components/schemas/{model}",
                                       by_alias=True)
    schemas.update(body.pop("$defs", {}))
    schemas["ErrorBody"] = body
    schemas.pop("HTTPValidationError", None)
    schemas.pop("ValidationError", None)
    ref = {"application/json": {"schema": {"$ref": "#/components/schemas/ErrorBody"}}}
    for path, operations in doc.get("paths", {}).items():
        for method, op in operations.items():
            responses = op.setdefault("responses", {})
            if (method, path) in _ROUTE_ALSO:
                code, text = _ROUTE_ALSO[(method, path)]
                default = next(iter(responses.values()))
                responses[str(code)] = {**default, "description": text}
            codes = {400, 401, 422, 503, *_ROUTE_ERRORS.get((method, path), ())}
            if path == "/health":
                codes = {400}
            for code in sorted(codes):
                responses[str(code)] = {"description": _STATUS_TEXT[code], "content": ref}
    app.openapi_schema = doc
    return doc


class AnswerOptions:
    """Methods per route from the OpenAPI document: OPTIONS answers 204 with ``Allow``; a
    method a route does not take answers 405 with ``Allow`` and the error body."""

    def __init__(self, app, api: FastAPI):
        self.app, self.api = app, api
        self._routes: list | None = None

    def routes(self) -> list:
        if self._routes is None:
            import re

            self._routes = []
            for path, operations in self.api.openapi().get("paths", {}).items():
                pattern = re.compile("^" + re.sub(r"\\\{[^/]+?\\\}", "[^/]+",
                                                  re.escape(path)) + "$")
                methods = {m.upper() for m in operations}
                if "GET" in methods:
                    methods.add("HEAD")
                self._routes.append((pattern, methods))
        return self._routes

    async def __call__(self, scope, receive, send):
        if scope["type"] == "http":
            method = scope["method"]
            matching = [m for pattern, m in self.routes() if pattern.match(scope["path"])]
            allowed = set().union(*matching) if matching else set()
            if matching and (method == "OPTIONS" or method not in allowed):
                allow = ", ".join(sorted(allowed | {"OPTIONS"}))
                if method == "OPTIONS":
                    from starlette.responses import Response

                    response = Response(status_code=204, headers={"Allow": allow})
                else:
                    response = _error(405, "MethodNotAllowed", f"{method} is not a method of "
                                      f"this route; it takes {allow}")
                    response.headers["Allow"] = allow
                await response(scope, receive, send)
                return
        await self.app(scope, receive, send)


class RefuseNulBytes:
    """Answer 400 to a request whose path or query string holds a NUL byte (no file name,
    id or database text may contain one), before any route sees it."""

    def __init__(self, app):
        self.app = app

    async def __call__(self, scope, receive, send):
        if scope["type"] == "http":
            from urllib.parse import unquote_to_bytes

            raw = scope.get("raw_path") or scope.get("path", "").encode()
            if b"\x00" in unquote_to_bytes(raw) or \
                    b"\x00" in unquote_to_bytes(scope.get("query_string", b"")):
                response = _error(400, "BadRequest", "the URL contains a NUL byte (%00); "
                                  "ids, names and paths never do")
                await response(scope, receive, send)
                return
        await self.app(scope, receive, send)


#: bounds on an error answer: the message's characters and the number of listed field errors
MAX_DETAIL = 2000
MAX_ERRORS = 20


def bounded(message: str, limit: int = MAX_DETAIL) -> str:
    """``message`` cut to ``limit`` characters, saying how much was left out."""
    if len(message) <= limit:
        return message
    return message[:limit] + f"... ({len(message) - limit} more characters left out)"


def _error(status: int, kind: str, message: str, **extra) -> JSONResponse:
    headers = {"WWW-Authenticate": "Bearer"} if status == 401 else None
    return JSONResponse({"detail": bounded(message), "error": kind, **extra},
                        status_code=status, headers=headers)


def _install_error_handlers(app: FastAPI) -> None:
    @app.exception_handler(UserError)
    async def _user_error(request: Request, exc: UserError):
        kind = "unauthorized" if isinstance(exc, AuthError) else type(exc).__name__
        return _error(status_for(exc), kind, str(exc))

    @app.exception_handler(StarletteHTTPException)
    async def _http_error(request: Request, exc: StarletteHTTPException):
        # the framework's own refusals (an unparsable body, an unknown route) in our body
        from http import HTTPStatus

        try:
            kind = HTTPStatus(exc.status_code).phrase.replace(" ", "")
        except ValueError:
            kind = "HTTPError"
        detail = exc.detail if isinstance(exc.detail, str) else json.dumps(exc.detail)
        if exc.status_code == 400 and "parsing the body" in detail:
            detail += ": send the spec as UTF-8 JSON"
        response = _error(exc.status_code, kind, detail)
        for key, value in (exc.headers or {}).items():
            response.headers[key] = value
        return response

    @app.exception_handler(RequestValidationError)
    async def _validation(request: Request, exc: RequestValidationError):
        from closure.spec import merged_errors

        all_errors = merged_errors(exc.errors())
        errors = [_describe(e) for e in all_errors[:MAX_ERRORS]]
        more = len(all_errors) - len(errors)
        text = "; ".join(f"{e['field']}: {e['message']}" for e in errors)
        if more:
            text += f"; and {more} more error(s)"
        return _error(422, "ValidationError", "invalid request: " + text, errors=errors)

    @app.exception_handler(redis.RedisError)
    async def _redis_down(request: Request, exc: redis.RedisError):
        log.warning("Redis error: %s", exc)
        return _error(503, "QueueUnavailable",
                      f"the job queue (Redis) is not answering: {exc}; try again shortly")

    @app.exception_handler(sqlalchemy.exc.OperationalError)
    async def _db_down(request: Request, exc: sqlalchemy.exc.OperationalError):
        log.warning("catalog error: %s", exc)
        return _error(503, "CatalogUnavailable",
                      "the catalog database is not answering; try again shortly")


def ctx_error(err: dict) -> str:
    """The parser's own reason for a JSON decode error, with its position."""
    ctx = err.get("ctx") or {}
    reason = ctx.get("error") or "decode error"
    loc = err.get("loc") or ()
    return f"{reason} at character {loc[-1]}" if len(loc) > 1 else str(reason)


def _describe(err: dict) -> dict:
    """One validation error as {field, message}: the path without FastAPI's 'body'/'query'
    prefix, and the allowed values for a choice."""
    loc = [str(p) for p in err.get("loc", ())]
    where = loc[0] if loc else ""
    if where in ("body", "query", "path", "header"):
        loc = loc[1:]
    if where == "body" and loc[:1] in (["discover"], ["coarse-grain"], ["sweep"]):
        loc = loc[1:]  # the job kind pydantic puts first in a POST /jobs error
    message = err.get("msg", "invalid")  # in our words (closure.spec.merged_errors)
    if err.get("type") == "json_invalid":  # loc is (body, character offset)
        loc = []
        message = f"the request body is not valid JSON ({ctx_error(err)}); send the spec as JSON"
    field = bounded(".".join(loc), 200) or ("request body" if where == "body" else "request")
    if "input" in err and err.get("type") != "missing":
        given = err["input"]
        if isinstance(given, str | int | float | bool) or given is None:
            message += f" (got {bounded(repr(given), 200)})"
    return {"field": field, "message": message, "in": where or None}


def serve(settings: Settings, port: int = 8000, fd: int | None = None,
          log_level: str = "info") -> None:
    """Run the API with uvicorn on ``settings.host:port`` (or an inherited listening socket
    ``fd``, which is how ``closure up`` hands over a port it has already bound)."""
    import uvicorn

    app = create_app(settings)
    config = uvicorn.Config(app, host=settings.host, port=port, log_level=log_level,
                            access_log=False, timeout_graceful_shutdown=5)
    server = uvicorn.Server(config)
    if fd is not None:
        sock = socket.socket(fileno=fd)
        server.run(sockets=[sock])
    else:
        server.run()
