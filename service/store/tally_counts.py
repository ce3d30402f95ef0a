"""Tallying records read from the database (queries only; no commits).

:func:`tally_ranges` reads the decisions, outcome records and final decisions with ids in
given ranges and tallies them with :mod:`service.log.tallies`: the sealer's tally batches,
the audit's count of what no batch covers yet, and verification all call it. An outcome
record that follows an earlier one for the same decision (a correction, or a second report)
takes the earlier value away and adds its own, so a sum over all records counts each
decision's latest outcome once.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from datetime import tzinfo
from typing import Any

from sqlalchemy import ColumnElement, Table, select
from sqlalchemy.orm import Session

from service.log import tallies
from service.log.audit_records import FINAL, OUTCOME
from service.log.records import DECISION
from service.store.audit_models import OutcomeRecord
from service.store.id_chunks import key_in, sorted_chunks
from service.store.log_sources import SOURCES, decision_facts, decision_window, rows

_OUT: Table = OutcomeRecord.__table__  # type: ignore[assignment]
Ranges = Mapping[str, tuple[int, int]]
"""Per kind, the ids ``(after, through]``."""
Progress = Callable[[str], None]


def _quiet(_message: str) -> None:
    return None


def _previous_outcomes(session: Session, page: list[Any]) -> dict[int, list[tuple[int, int]]]:
    """For the decisions of a page of outcome records: every record of theirs up to the
    page's last id, as (id, outcome) in id order."""
    last = int(page[-1].id)
    found: dict[int, list[tuple[int, int]]] = {}
    for chunk in sorted_chunks({int(r.recommendation_pk) for r in page}):
        for pk, rid, outcome in session.execute(
            select(_OUT.c.recommendation_pk, _OUT.c.id, _OUT.c.outcome)
            .where(key_in(_OUT.c.recommendation_pk, chunk), _OUT.c.id <= last)
            .order_by(_OUT.c.recommendation_pk, _OUT.c.id)
        ):
            found.setdefault(int(pk), []).append((int(rid), int(outcome)))
    return found


def _tally_outcomes(
    session: Session,
    out: tallies.Tallies,
    after: int,
    through: int,
    zone: tzinfo,
    where: tuple[ColumnElement[bool], ...],
) -> int:
    source = SOURCES[OUTCOME]
    page: list[Any] = []
    seen = 0

    def flush() -> None:
        history = _previous_outcomes(session, page)
        for r in page:
            facts = decision_facts(r, zone)
            earlier = [o for rid, o in history.get(int(r.recommendation_pk), []) if rid < r.id]
            if earlier:
                tallies.add_outcome(out, facts, earlier[-1], sign=-1)
            tallies.add_outcome(out, facts, int(r.outcome))
        page.clear()

    for r in rows(session, source, after, through, where):
        page.append(r)
        seen += 1
        if len(page) == 5_000:
            flush()
    if page:
        flush()
    return seen


def tally_ranges(
    session: Session,
    ranges: Ranges,
    zone: tzinfo,
    window: tuple[str, Any, Any] | None = None,
    progress: Progress = _quiet,
) -> tuple[tallies.Tallies, int]:
    """(tallies, records read) of the decisions, outcome records and final decisions in
    ``ranges``; with ``window`` = (policy, start, end) only those about decisions of that
    policy issued in ``[start, end)``."""
    where = () if window is None else decision_window(*window)
    out: tallies.Tallies = {}
    read = 0
    if DECISION in ranges:
        after, through = ranges[DECISION]
        for r in rows(session, SOURCES[DECISION], after, through, where):
            tallies.add_decision(out, decision_facts(r, zone))
            read += 1
        progress(f"  tallied decisions up to id {through}: {read:,} records")
    if OUTCOME in ranges:
        after, through = ranges[OUTCOME]
        read += _tally_outcomes(session, out, after, through, zone, where)
    if FINAL in ranges:
        after, through = ranges[FINAL]
        for r in rows(session, SOURCES[FINAL], after, through, where):
            tallies.add_final(out, decision_facts(r, zone), bool(r.overridden))
            read += 1
    return out, read
