"""create_app(settings) -> FastAPI; nothing runs at import time."""

from __future__ import annotations

import asyncio
import gc
import logging
import threading
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from pathlib import Path

from fastapi import FastAPI
from fastapi.staticfiles import StaticFiles
from fastapi.templating import Jinja2Templates

from .db import is_postgres, lazy_write_factory, open_project, session_factory
from .errors import install_error_handlers
from .layout import ProjectLayout
from .people import load_key
from .security import install
from .services.campaign_analysis import ResultsCache, warm_results
from .settings import Settings, get_settings

UI_DIR = Path(__file__).resolve().parent.parent / "annotator_ui"
log = logging.getLogger("heedmap")


def create_app(settings: Settings) -> FastAPI:
    """Build the app over ``settings.project_dir``; the engine lives as long as the app."""

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        engine = open_project(settings.project_dir, database_url=settings.database_url)
        # What the results and agreement pages need but import lazily (scipy.stats: a second or more): loaded with the
        # server, so that the first page after start-up does not pay for it.
        import scipy.stats  # noqa: F401
        app.state.sessions = session_factory(engine)
        app.state.writers = lazy_write_factory(engine)
        # SQLite has one writer: write requests queue on the event loop (deps._write_session). PostgreSQL
        # takes concurrent writes, kept correct by row locks (campaigns.assignment), across worker processes too.
        app.state.write_lock = None if is_postgres(engine) else asyncio.Lock()
        app.state.results_cache = ResultsCache.for_warming(settings.warm_campaigns, snapshots=ProjectLayout(settings.project_dir).label_cache)
        app.state.key = load_key(settings.project_dir)
        stop, warming = _warm_in_background(app, settings)
        yield
        stop.set()
        warming.join(timeout=60)  # a campaign being warmed finishes (seconds); none is started after this
        engine.dispose()

    # The API's self-description is off unless asked for (settings.api_docs): it maps every route for a stranger.
    docs = settings.api_docs
    app = FastAPI(title="heedmap", lifespan=lifespan, docs_url="/docs" if docs else None, redoc_url=None, openapi_url="/openapi.json" if docs else None)
    install(app, project_dir=settings.project_dir, debug=settings.debug)
    app.state.settings = settings
    app.state.templates = Jinja2Templates(directory=str(UI_DIR / "templates"))
    app.mount("/static", StaticFiles(directory=str(UI_DIR / "static")), name="static")

    from .routes import admin, auth, groups, labelling, pages, regions, results, stopping

    for module in (pages, auth, labelling, groups, regions, admin, results, stopping):
        for router in module.routers:
            app.include_router(router)
    install_error_handlers(app, debug=settings.debug)
    _build_routes(app)
    return app


def _build_routes(app: FastAPI) -> None:
    """Have FastAPI build each included router's routes now (it builds them when a request first walks past them:
    a quarter of a second on the first page a server shows)."""
    from starlette.routing import NoMatchFound

    try:
        app.url_path_for("heedmap: no route has this name")  # walks every route of every included router
    except NoMatchFound:
        pass


def _warm_in_background(app: FastAPI, settings: Settings) -> tuple[threading.Event, threading.Thread]:
    """Start computing the recent campaigns' results (``warm_results``) on a thread, so that the first page after start-up
    finds them made, or waits for the one being made instead of making it again. ``app.state.warmed`` is set when done."""
    stop, app.state.warmed = threading.Event(), threading.Event()

    def warm() -> None:
        try:
            if settings.warm_campaigns:
                warm_results(app.state.sessions, app.state.results_cache, min_support=settings.min_support,
                             campaigns_kept=settings.warm_campaigns, stop=stop)
                # The results were made with the cycle collector paused (campaign_analysis.collector_paused): the
                # collection it owes runs here, on this thread, not in the first request after the warming.
                gc.collect()
        except Exception:  # a page made later says what is wrong; start-up goes on without the warm results
            log.warning("warming the results at start-up failed; pages compute them when first opened", exc_info=settings.debug)
        finally:
            app.state.warmed.set()

    thread = threading.Thread(target=warm, name="heedmap-warm-results", daemon=True)
    thread.start()
    return stop, thread


def app_from_environment() -> FastAPI:
    """The app of one server worker (``heedmap serve --workers N``): settings from HEEDMAP_PROJECT and HEEDMAP_DATABASE_URL."""
    return create_app(get_settings())
