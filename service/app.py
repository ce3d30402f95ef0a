"""The application factory: settings in, a FastAPI app out; the lifespan owns the engine."""

from __future__ import annotations

import gc
import logging
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

import anyio.to_thread
from fastapi import FastAPI

from service.api import (
    bulk,
    decisions,
    docs,
    health,
    keys,
    log,
    outcomes,
    policies,
    recommendations,
    reports,
    warnings,
)
from service.api.deps import KeyCache
from service.api.errors import error_responses, install_error_handlers
from service.api.limits import BodySizeLimit
from service.observability.db_metrics import DatabaseCollector
from service.observability.metrics import RequestMetrics, metrics_router
from service.observability.middleware import RequestObserver
from service.settings import Settings
from service.store.committer import GroupCommitter
from service.store.db import create_db_engine, create_session_factory
from service.store.periodic_sealer import PeriodicSealer
from service.store.scoring import DocumentCache, ScoringContext
from service.store.signing import signer_from_settings

WORKER_THREADS = 8
logger = logging.getLogger("evenhand.app")


def create_app(settings: Settings | None = None) -> FastAPI:
    settings = settings or Settings()
    warning = settings.demo_warning()
    if warning is not None:
        logger.warning(warning)
    # Refuse to start without a usable draw secret (every recommendation needs it) or
    # signing key (every seal of the log needs it).
    secret = settings.draw_key()
    signer = signer_from_settings(settings)

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        # Sync routes run in anyio's thread pool (40 threads by default). On 2-4 cores a
        # few threads keep the CPU busy; more only fight over the GIL.
        anyio.to_thread.current_default_thread_limiter().total_tokens = WORKER_THREADS
        engine = create_db_engine(settings)
        app.state.engine = engine
        app.state.session_factory = create_session_factory(engine)
        # Single recommendations share transactions (one commit per group).
        committer = GroupCommitter(engine, app.state.scoring)
        app.state.committer = committer
        committer.start()
        # Background tasks (e.g. the periodic log sealer) start here and stop after `yield`.
        sealer = PeriodicSealer(
            app.state.session_factory,
            signer,
            settings.timezone,
            settings.seal_interval_seconds,
            settings.head_mirror,
        )
        sealer.start()
        # Everything made so far (modules, the app, the engine) lives as long as the server:
        # move it out of the cyclic garbage collector's view, so the full collections that
        # large request bodies set off scan only what requests create (in a batch of 5,000
        # they cost about 5 us per item, more than validating it). Undone at shutdown, so a
        # process that builds many apps (the tests) still frees their cycles.
        gc.freeze()
        try:
            yield
        finally:
            await sealer.stop()
            committer.stop()
            engine.dispose()
            gc.unfreeze()

    app = FastAPI(
        title="Evenhand",
        version="0.1.0",
        description=(
            "Governed decision policies, a keyed scoring API and a tamper-evident decision "
            "log. Recommendations are advisory: a person decides and can override.\n\n"
            f"Limits: request bodies up to {settings.max_body_bytes} bytes "
            f"(EVENHAND_MAX_BODY_BYTES; 413 body_too_large), batches up to "
            f"{settings.max_batch_items} items (EVENHAND_MAX_BATCH_ITEMS; 413 "
            "batch_too_large); every other bound is in the schemas below. Every refusal is "
            "an ErrorResponse."
        ),
        lifespan=lifespan,
        # /docs is our own route: Swagger UI served from the installed package, no CDN.
        docs_url=None,
        redoc_url=None,
    )
    app.state.settings = settings
    app.state.signer = signer
    app.state.scoring = ScoringContext(secret, DocumentCache(), settings.max_batch_items)
    app.state.key_cache = KeyCache(settings.auth_cache_seconds)
    install_error_handlers(app)
    # Routes are matched in order: the scoring routes, by far the most called, come first.
    # Every route that reads or writes the database may answer 503 database_unavailable.
    unavailable = error_responses(503)
    app.include_router(recommendations.router, responses=unavailable)
    app.include_router(bulk.router, responses=unavailable)
    app.include_router(health.router)
    for router in (
        policies.router,
        keys.router,
        log.router,
        outcomes.router,
        decisions.router,
        reports.router,
        warnings.router,
    ):
        app.include_router(router, responses=unavailable)
    # The console for admins and auditors (server-rendered pages under /console).
    from service.console import log_pages, lookup_pages, people_pages, report_pages, routes

    for console_pages in (routes, report_pages, people_pages, lookup_pages, log_pages):
        app.include_router(console_pages.router)
    app.include_router(docs.docs_router())
    app.include_router(metrics_router(settings.metrics_access), include_in_schema=False)
    app.state.request_metrics = RequestMetrics()
    app.state.db_metrics = DatabaseCollector(app.state)
    app.add_middleware(
        BodySizeLimit,
        max_bytes=settings.max_body_bytes,
        unbounded_paths=frozenset({bulk.PATH}),  # bounded line by line instead
    )
    # Outermost: every request gets an id and is timed, refusals included.
    app.add_middleware(
        RequestObserver, metrics=app.state.request_metrics, access_log_on=settings.access_log
    )
    return app
