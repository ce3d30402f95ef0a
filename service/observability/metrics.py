"""Prometheus metrics (``prometheus-client``) and the ``/metrics`` route.

Two sources:

- in the process: the request latency histogram, by method, route template and status
  (:class:`RequestMetrics`, fed by the middleware);
- read from the database at scrape time (``service.observability.db_metrics``): decisions
  recorded by policy, version and action, the log's seal lag, the age of each policy's last
  audit, and the process's connection pool. These cost nothing on the scoring path and are
  the same whichever worker answers the scrape.

With several worker processes, set ``PROMETHEUS_MULTIPROC_DIR`` to an empty folder (the
container's entrypoint does): the histogram is then summed over the workers by
``prometheus_client.multiprocess``.
"""

from __future__ import annotations

import os
from typing import Any

from fastapi import APIRouter, Depends, Request, Response
from prometheus_client import CONTENT_TYPE_LATEST, CollectorRegistry, Histogram, generate_latest
from prometheus_client.multiprocess import MultiProcessCollector

LATENCY_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)
"""Seconds: a single recommendation takes about 1-5 ms, an audit seconds."""


class RequestMetrics:
    """The request latency histogram, in a registry of this app's own (one per app, so the
    tests' many apps do not share counts)."""

    def __init__(self) -> None:
        self.registry = CollectorRegistry(auto_describe=True)
        self.latency = Histogram(
            "evenhand_http_request_duration_seconds",
            "Time from the request's arrival to the end of its response, by route template.",
            ("method", "route", "status"),
            buckets=LATENCY_BUCKETS,
            registry=self.registry,
        )
        self._children: dict[tuple[str, str, int], Any] = {}

    def observe(self, method: str, route: str, status: int, seconds: float) -> None:
        key = (method, route, status)
        child = self._children.get(key)
        if child is None:  # labels() builds a key and takes a lock: once per combination
            child = self.latency.labels(method, route, str(status))
            self._children[key] = child
        child.observe(seconds)


def scrape_registry(request: Request) -> CollectorRegistry:
    """What one scrape reports: the process's (or, in multi-process mode, every worker's)
    in-process metrics, then the database's."""
    from service.observability.db_metrics import DatabaseCollector

    metrics: RequestMetrics = request.app.state.request_metrics
    folder = os.environ.get("PROMETHEUS_MULTIPROC_DIR")
    if folder:
        registry = CollectorRegistry()
        MultiProcessCollector(registry, path=folder)  # type: ignore[no-untyped-call]
    else:
        registry = metrics.registry
    out = CollectorRegistry(auto_describe=False)
    out.register(_Chain(registry))
    collector: DatabaseCollector = request.app.state.db_metrics
    out.register(collector)
    return out


class _Chain:
    """Adapts a registry to a collector."""

    def __init__(self, registry: CollectorRegistry) -> None:
        self.registry = registry

    def collect(self) -> Any:
        return self.registry.collect()


def metrics_router(access: str) -> APIRouter:
    """``GET /metrics``: with ``access == "key"`` a key with the audit or the admin role is
    required (Prometheus sends it as a bearer token); ``"open"`` serves it to anyone who can
    reach the port (a scraper on a private network)."""
    dependencies: list[Any] = []
    if access == "key":
        from service.api.deps import require_role

        dependencies.append(Depends(require_role("audit", "admin")))
    router = APIRouter(tags=["operations"], dependencies=dependencies)

    @router.get(
        "/metrics",
        summary="Prometheus metrics (text exposition format)",
        response_class=Response,
        responses={200: {"content": {CONTENT_TYPE_LATEST: {}}, "description": "Metrics"}},
    )
    def metrics(request: Request) -> Response:
        body = generate_latest(scrape_registry(request))
        return Response(body, media_type=CONTENT_TYPE_LATEST)

    return router
