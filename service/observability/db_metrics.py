"""Metrics read from the database when Prometheus scrapes (none on the scoring path).

- ``evenhand_recommendations_total{policy,version,action}``: decisions recorded. Sealed
  ranges are counted once per process and kept (seals are in id order and final, so each
  decision is counted exactly once); the unsealed tail is counted on every scrape. A retention
  purge deletes sealed rows: the total drops only when the process restarts (a counter reset).
- ``evenhand_log_unsealed_records{kind="decision"}`` and
  ``evenhand_log_oldest_unsealed_age_seconds``: the seal lag.
- ``evenhand_audit_last_age_seconds{policy}``: time since each policy's last audit snapshot.
- ``evenhand_db_pool_connections{state}``, ``evenhand_db_pool_size``: this process's pool.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Iterator
from datetime import UTC, datetime
from typing import Any

from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from sqlalchemy import Engine, func, select
from sqlalchemy.orm import Session, sessionmaker

from service.log.records import DECISION
from service.store.audit_models import AuditSnapshot, Seal
from service.store.db import begin_read_only
from service.store.models import Recommendation

log = logging.getLogger("evenhand.metrics")
Counts = dict[tuple[str, int, bool], int]


def _count_range(session: Session, after: int, through: int | None) -> Counts:
    query = select(
        Recommendation.policy, Recommendation.version, Recommendation.action, func.count()
    ).where(Recommendation.id > after)
    if through is not None:
        query = query.where(Recommendation.id <= through)
    query = query.group_by(Recommendation.policy, Recommendation.version, Recommendation.action)
    return {(p, int(v), bool(a)): int(n) for p, v, a, n in session.execute(query)}


def _sealed_through(session: Session) -> int:
    """The last decision id the latest seal covers (0 before the first seal)."""
    ranges = session.scalar(select(Seal.ranges).order_by(Seal.id.desc()).limit(1))
    if not ranges or DECISION not in ranges:
        return 0
    return int(ranges[DECISION][1])


class DatabaseCollector:
    """A ``prometheus_client`` collector over the app's database (``app.state``)."""

    def __init__(self, state: Any) -> None:
        self.state = state  # engine and session_factory appear when the lifespan starts
        self._lock = threading.Lock()
        self._sealed_counts: Counts = {}
        self._counted_through = 0

    def describe(self) -> list[Metric]:
        return []  # names are not known before the first scrape: do not collect at register

    def collect(self) -> Iterator[Metric]:
        factory: sessionmaker[Session] | None = getattr(self.state, "session_factory", None)
        engine: Engine | None = getattr(self.state, "engine", None)
        if engine is not None:
            yield from self._pool(engine)
        if factory is None:
            return
        now = datetime.now(UTC)
        with factory() as session:
            begin_read_only(session)
            counts, unsealed, oldest = self._decisions(session)
            audits = session.execute(
                select(AuditSnapshot.policy, func.max(AuditSnapshot.created_at)).group_by(
                    AuditSnapshot.policy
                )
            ).all()
        total = CounterMetricFamily(
            "evenhand_recommendations",
            "Decisions recorded in the log, by policy, version and action.",
            labels=("policy", "version", "action"),
        )
        for (policy, version, action), n in sorted(counts.items()):
            total.add_metric([policy, str(version), "true" if action else "false"], n)
        yield total
        lag = GaugeMetricFamily(
            "evenhand_log_unsealed_records",
            "Log records not covered by a seal yet.",
            labels=["kind"],
        )
        lag.add_metric([DECISION], unsealed)
        yield lag
        yield GaugeMetricFamily(
            "evenhand_log_oldest_unsealed_age_seconds",
            "Age of the oldest decision not covered by a seal yet (0 when all are sealed).",
            value=0.0 if oldest is None else max(0.0, (now - oldest).total_seconds()),
        )
        age = GaugeMetricFamily(
            "evenhand_audit_last_age_seconds",
            "Time since the policy's most recent audit snapshot was written.",
            labels=["policy"],
        )
        for policy, created in sorted(audits):
            age.add_metric([policy], max(0.0, (now - created).total_seconds()))
        yield age

    def _decisions(self, session: Session) -> tuple[Counts, int, datetime | None]:
        sealed = _sealed_through(session)
        with self._lock:
            if sealed > self._counted_through:
                for key, n in _count_range(session, self._counted_through, sealed).items():
                    self._sealed_counts[key] = self._sealed_counts.get(key, 0) + n
                self._counted_through = sealed
            counts = dict(self._sealed_counts)
            through = self._counted_through
        tail = _count_range(session, through, None)
        for key, n in tail.items():
            counts[key] = counts.get(key, 0) + n
        oldest = session.scalar(
            select(func.min(Recommendation.issued_at)).where(Recommendation.id > through)
        )
        return counts, sum(tail.values()), oldest

    @staticmethod
    def _pool(engine: Engine) -> Iterator[Metric]:
        pool: Any = engine.pool
        if not all(hasattr(pool, name) for name in ("checkedout", "checkedin", "size")):
            return
        used = GaugeMetricFamily(
            "evenhand_db_pool_connections",
            "This process's database connections, in use or idle in the pool.",
            labels=["state"],
        )
        used.add_metric(["in_use"], pool.checkedout())
        used.add_metric(["idle"], pool.checkedin())
        yield used
        yield GaugeMetricFamily(
            "evenhand_db_pool_size",
            "Connections the pool keeps (more may open up to its overflow limit).",
            value=pool.size(),
        )
