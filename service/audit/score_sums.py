"""Sums of a month's outcomes by score and by randomization zone, counted in the database.

Calibration within a group (Spiegelhalter's test, a reliability table) and the risk-adjusted
charts need sums of powers and logarithms of the scores of cases with an outcome; rates under
selective labels need counts by *zone* of the recorded probability of action (p = 1, the
randomized band 0 < p < 1, p = 0) and inverse-probability sums over the band. One GROUP BY
per table gives them, by (version, group, outcome, action, zone, score bin; the last two by
their output names, so PostgreSQL sees the same expressions); Python adds up the few rows that
come back. Scores outside [0, 1] contribute nothing to the score sums (they have
no meaning as probabilities).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from sqlalchemy import Integer, and_, case, cast, func, literal_column, select
from sqlalchemy.orm import Session

from service.audit.realized import BINS, Observability, ScoreSums
from service.stats.calibration import PowerSums
from service.stats.selective_labels import SelectiveCounts
from service.store.audit_models import Outcome
from service.store.models import Recommendation

CellKey = tuple[int, str]


@dataclass
class _Zones:
    """The raw per-zone tallies of one (version, group); made into SelectiveCounts per mode."""

    cases: list[int] = field(default_factory=lambda: [0, 0, 0])  # zone 0 (p=0), 1, 2 (p=1)
    band_actions: int = 0
    # observed outcomes by (zone, action, outcome), and band sums of 1/p and 1/(1-p)
    observed: dict[tuple[int, bool, int], int] = field(default_factory=dict)
    inverse_p: dict[tuple[bool, int], float] = field(default_factory=dict)
    inverse_q: dict[tuple[bool, int], float] = field(default_factory=dict)

    def selective(self, mode: Observability) -> SelectiveCounts | None:
        if mode == "both":
            return None
        acted = mode == "action"

        def seen(zone: int, y: int) -> int:
            return self.observed.get((zone, acted, y), 0)

        weights = self.inverse_p if acted else self.inverse_q
        return SelectiveCounts(
            mode=mode,
            certain_action=self.cases[2],
            band=self.cases[1],
            certain_no_action=self.cases[0],
            band_actions=self.band_actions,
            certain_action_positives=seen(2, 1) if acted else 0,
            certain_action_negatives=seen(2, 0) if acted else 0,
            band_positives=seen(1, 1),
            band_negatives=seen(1, 0),
            certain_no_action_positives=0 if acted else seen(0, 1),
            certain_no_action_negatives=0 if acted else seen(0, 0),
            band_weighted_positives=weights.get((acted, 1), 0.0),
            band_weighted_negatives=weights.get((acted, 0), 0.0),
        )


def _zone(probability: Any) -> Any:
    return case((probability >= 1.0, 2), (probability <= 0.0, 0), else_=1)


def _in_unit(score: Any) -> Any:
    return and_(score >= 0.0, score <= 1.0)


def _bin(score: Any) -> Any:
    return case(
        (score >= 1.0, BINS - 1), (score < 0.0, 0), else_=cast(func.floor(score * BINS), Integer)
    )


@dataclass(frozen=True)
class OutcomeSums:
    scores: dict[CellKey, ScoreSums]
    zones: dict[CellKey, _Zones]

    def selective(self, key: CellKey, mode: Observability) -> SelectiveCounts | None:
        return self.zones.get(key, _Zones()).selective(mode)


def count_score_sums(
    session: Session, policy: str, start: datetime, end: datetime, zones_of: set[int]
) -> OutcomeSums:
    """Score sums of every (version, group) of the month, and zone tallies of the versions in
    ``zones_of`` (those whose outcomes are seen only after some decisions)."""
    o = Outcome.__table__.c
    s = o.score
    unit = _in_unit(s)
    in_month = (o.policy == policy, o.issued_at >= start, o.issued_at < end)

    def unit_sum(expr: Any) -> Any:
        return func.sum(case((unit, expr), else_=None))

    score_rows = session.execute(
        select(
            o.version,
            o.group,
            o.outcome,
            _bin(s).label("bin"),
            func.count(case((unit, 1), else_=None)).label("unit_rows"),
            unit_sum(s).label("s1"),
            unit_sum(s * s).label("s2"),
            unit_sum(s * s * s).label("s3"),
            unit_sum(s * s * s * s).label("s4"),
            unit_sum(func.ln(1.0 + s)).label("log_double"),
            unit_sum(func.ln(1.0 - 0.5 * s)).label("log_half"),
        )
        .where(*in_month)
        .group_by(o.version, o.group, o.outcome, literal_column("bin"))
    )
    scores: dict[CellKey, ScoreSums] = {}
    for row in score_rows:
        n = int(row.unit_rows)
        if not n:
            continue
        y = int(row.outcome)
        ss = scores.setdefault((int(row.version), str(row.group)), ScoreSums())
        s1 = float(row.s1)
        ss.power = ss.power + PowerSums(
            n=n,
            sum_y=float(n * y),
            sum_p=s1,
            sum_p2=float(row.s2),
            sum_p3=float(row.s3),
            sum_p4=float(row.s4),
            sum_yp=s1 * y,
        )
        ss.log_double += float(row.log_double)
        ss.log_half += float(row.log_half)
        b = int(row.bin)
        ss.bin_counts[b] += n
        ss.bin_positives[b] += n * y
        ss.bin_score_sums[b] += s1
    zones: dict[CellKey, _Zones] = {}
    if zones_of:
        _count_zones(session, policy, start, end, sorted(zones_of), zones)
    return OutcomeSums(scores, zones)


def _count_zones(
    session: Session,
    policy: str,
    start: datetime,
    end: datetime,
    versions: list[int],
    zones: dict[CellKey, _Zones],
) -> None:
    o = Outcome.__table__.c
    zone = _zone(o.probability)
    band = zone == 1
    for row in session.execute(
        select(
            o.version,
            o.group,
            o.outcome,
            o.action,
            zone.label("zone"),
            func.count().label("rows"),
            func.sum(case((and_(band, o.probability > 0.0), 1.0 / o.probability))).label("inv_p"),
            func.sum(case((and_(band, o.probability < 1.0), 1.0 / (1.0 - o.probability)))).label(
                "inv_q"
            ),
        )
        .where(
            o.policy == policy,
            o.version.in_(versions),
            o.issued_at >= start,
            o.issued_at < end,
        )
        .group_by(o.version, o.group, o.outcome, o.action, literal_column("zone"))
    ):
        key = (int(row.version), str(row.group))
        y, acted, z = int(row.outcome), bool(row.action), int(row.zone)
        zt = zones.setdefault(key, _Zones())
        zt.observed[(z, acted, y)] = zt.observed.get((z, acted, y), 0) + int(row.rows)
        if row.inv_p is not None:
            zt.inverse_p[(acted, y)] = zt.inverse_p.get((acted, y), 0.0) + float(row.inv_p)
        if row.inv_q is not None:
            zt.inverse_q[(acted, y)] = zt.inverse_q.get((acted, y), 0.0) + float(row.inv_q)
    r = Recommendation.__table__.c
    rzone = _zone(r.probability)
    for row in session.execute(
        select(r.version, r.group, r.action, rzone.label("zone"), func.count().label("rows"))
        .where(
            r.policy == policy,
            r.version.in_(versions),
            r.issued_at >= start,
            r.issued_at < end,
        )
        .group_by(r.version, r.group, r.action, literal_column("zone"))
    ):
        zt = zones.setdefault((int(row.version), str(row.group)), _Zones())
        zt.cases[int(row.zone)] += int(row.rows)
        if int(row.zone) == 1 and row.action:
            zt.band_actions += int(row.rows)
