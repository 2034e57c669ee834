"""create_app(settings) -> FastAPI; nothing runs at import time."""

from __future__ import annotations

import asyncio
import logging
import threading
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from pathlib import Path

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse, Response
from fastapi.staticfiles import StaticFiles
from fastapi.templating import Jinja2Templates

from .db import lazy_write_factory, make_engine, session_factory, write_session
from .errors import AppError
from .people import project_key
from .settings import Settings

UI_DIR = Path(__file__).resolve().parent.parent / "annotator_ui"
log = logging.getLogger("heedmap")


def create_app(settings: Settings) -> FastAPI:
    """Build the app over ``settings.project_dir``; the engine lives as long as the app."""

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        engine = make_engine(settings.project_dir)
        app.state.sessions = session_factory(engine)
        app.state.writers = lazy_write_factory(engine)
        app.state.write_lock = asyncio.Lock()
        app.state.results_cache = {}
        app.state.results_lock = threading.Lock()
        with write_session(app.state.sessions) as s:
            app.state.key = project_key(s)
        yield
        engine.dispose()

    app = FastAPI(title="heedmap", lifespan=lifespan)
    app.state.settings = settings
    app.state.templates = Jinja2Templates(directory=str(UI_DIR / "templates"))
    app.mount("/static", StaticFiles(directory=str(UI_DIR / "static")), name="static")

    from .routes import admin, auth, labelling, pages, regions, results

    for module in (pages, auth, labelling, regions, admin, results):
        app.include_router(module.router)

    def _wants_json(request: Request) -> bool:
        return request.url.path.startswith("/api/") or "application/json" in request.headers.get("accept", "")

    @app.exception_handler(AppError)
    async def _app_error(request: Request, exc: AppError) -> Response:
        if _wants_json(request):
            return JSONResponse({"message": exc.message, "code": exc.code, "status": exc.status_code}, status_code=exc.status_code)
        from .routes.common import CAUTION

        context = {"message": exc.message, "status": exc.status_code, "caution": CAUTION, "viewer": None}
        return app.state.templates.TemplateResponse(request, "error.html", context, status_code=exc.status_code)

    @app.exception_handler(RequestValidationError)
    async def _validation(request: Request, exc: RequestValidationError) -> Response:
        parts = ["/".join(str(p) for p in e.get("loc", ())) + ": " + str(e.get("msg", "")) for e in exc.errors()]
        return JSONResponse({"message": "; ".join(parts), "code": "invalid_request", "status": 422}, status_code=422)

    @app.exception_handler(Exception)
    async def _unexpected(request: Request, exc: Exception) -> Response:
        log.exception("unhandled error on %s", request.url.path)
        message = repr(exc) if settings.debug else "Something went wrong on the server; the error is in its log."
        return JSONResponse({"message": message, "code": "internal_error", "status": 500}, status_code=500)

    return app
