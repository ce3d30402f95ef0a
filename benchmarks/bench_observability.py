"""CPU cost per request of the request observer (request id, latency histogram) and of the
JSON access-log line, measured in one process on a trivial ASGI app (no HTTP, no database),
so the figure does not depend on the machine's other load as much as a server benchmark does.

Run: ``.venv/bin/python benchmarks/bench_observability.py [--requests 20000] [--rounds 3]``.
Prints microseconds of process CPU time per request, for each round.
"""

from __future__ import annotations

import argparse
import asyncio
import logging.config
import os
import platform
import sys
import time
from typing import Any

from service.observability.json_logs import log_config
from service.observability.metrics import RequestMetrics
from service.observability.middleware import RequestObserver


class _Route:
    path = "/v1/recommendations"


async def _inner(scope: dict[str, Any], receive: Any, send: Any) -> None:
    scope["route"] = _Route
    await send({"type": "http.response.start", "status": 201, "headers": []})
    await send({"type": "http.response.body", "body": b"{}"})


async def _send(_message: Any) -> None:
    return None


async def _receive() -> dict[str, str]:
    return {"type": "http.request"}


def _scope() -> dict[str, Any]:
    return {
        "type": "http",
        "method": "POST",
        "path": "/v1/recommendations",
        "headers": [(b"authorization", b"Bearer x"), (b"content-type", b"application/json")],
    }


async def _loop(app: Any, n: int) -> None:
    for _ in range(n):
        await app(_scope(), _receive, _send)


def cpu_us(app: Any, n: int) -> float:
    asyncio.run(_loop(app, min(n, 1000)))  # warm-up
    started = time.process_time()
    asyncio.run(_loop(app, n))
    return (time.process_time() - started) / n * 1e6


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--requests", type=int, default=20_000)
    parser.add_argument("--rounds", type=int, default=3)
    args = parser.parse_args()
    out = sys.stdout
    machine = f"{platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}"
    print(f"machine: {machine}; load average {os.getloadavg()[0]:.2f}", file=out)
    # The log lines go where the server's go (stderr), here discarded.
    sys.stderr = open(os.devnull, "w")  # noqa: SIM115
    logging.config.dictConfig(log_config())
    for _ in range(args.rounds):
        bare = cpu_us(_inner, args.requests)
        observed = cpu_us(RequestObserver(_inner, RequestMetrics(), False), args.requests)
        logged = cpu_us(RequestObserver(_inner, RequestMetrics(), True), args.requests)
        print(
            f"bare app {bare:.1f} us; observer (id, histogram) +{observed - bare:.1f} us; "
            f"access-log line +{logged - observed:.1f} us",
            file=out,
        )
    print(f"load average at end {os.getloadavg()[0]:.2f}", file=out)
    return 0


if __name__ == "__main__":
    sys.exit(main())
