"""``evenhand serve``: run the HTTP API with uvicorn (defaults from EVENHAND_* settings)."""

from __future__ import annotations

import argparse
import sys
from typing import Any

from service.cli.common import CliError
from service.settings import DrawSecretError, Settings


def register(sub: Any) -> None:
    p: argparse.ArgumentParser = sub.add_parser(
        "serve", help="run the HTTP API", description="Run the HTTP API with uvicorn."
    )
    p.add_argument("--host", help="interface to bind (default: EVENHAND_HOST or 127.0.0.1)")
    p.add_argument("--port", type=int, help="port (default: EVENHAND_PORT or 8000)")
    p.add_argument("--workers", type=int, help="worker processes (default: EVENHAND_WORKERS or 1)")
    p.add_argument(
        "--access-log",
        action="store_true",
        help="also write uvicorn's own access log (raw paths; EVENHAND_ACCESS_LOG's JSON line "
        "per request, with route templates, is on by default)",
    )
    p.set_defaults(handler=run)


def _preflight(settings: Settings) -> None:
    """Refuse to start, with a clear message, when scoring could not work."""
    warning = settings.demo_warning()
    if warning is not None:
        print(f"evenhand: warning: {warning}", file=sys.stderr)
    try:
        settings.draw_key()
    except DrawSecretError as exc:
        raise CliError(str(exc)) from None
    from service.log.key_errors import SigningKeyError
    from service.store.signing import signer_from_settings

    try:
        signer_from_settings(settings)
    except SigningKeyError as exc:
        raise CliError(str(exc)) from None
    from service.store.db import create_db_engine
    from service.store.migrate import at_head

    engine = create_db_engine(settings)
    try:
        ready = at_head(engine)
    except Exception as exc:
        raise CliError(f"cannot reach the database ({type(exc).__name__}: {exc})") from None
    finally:
        engine.dispose()
    if not ready:
        raise CliError(
            "the database is not migrated to the latest revision: run `evenhand migrate`"
        )


def run(args: argparse.Namespace) -> int:
    import uvicorn

    from service.observability.json_logs import log_config

    settings = Settings()
    _preflight(settings)
    host = args.host or settings.host
    port = args.port or settings.port
    workers = args.workers or settings.workers
    print(f"evenhand: serving on http://{host}:{port} with {workers} worker(s)", file=sys.stderr)
    uvicorn.run(
        "service.app:create_app",
        factory=True,
        host=host,
        port=port,
        workers=workers,
        access_log=args.access_log,
        log_level="info",
        log_config=log_config(
            json_format=settings.log_format == "json", uvicorn_access=args.access_log
        ),
    )
    return 0
