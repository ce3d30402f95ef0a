"""Recounting a month's report from the records of a bundle (standard library only).

The decisions of the month go into a temporary SQLite file as they stream past (what a tally
needs of each, its latest outcome, its final decisions), so memory does not grow with the
month. At the end they are tallied with the service's own tally functions
(``service.log.tallies``: exact integers, real sums in units of 2^-64) and every figure of the
snapshot that is pure counting is compared with the recount (``service.log.bundle_compare``),
bit for bit: per version and group the counts, the score sums and the reliability bins; per
shadow version and group its counts; the totals and the row counts. Figures that need
statistics (intervals, p-values, verdicts) are not recomputed: they are bound by the view's
digest, which the verifier checks.
"""

from __future__ import annotations

import os
import sqlite3
import tempfile
from collections.abc import Iterator, Mapping, Sequence
from datetime import UTC, date, datetime
from typing import Any
from zoneinfo import ZoneInfo

from service.log import tallies
from service.log.tallies import BINS, Cell, DecisionFacts, count, real

_TIME = "%Y-%m-%dT%H:%M:%S.%fZ"


class RecountProblem(Exception):
    """A record or a figure that does not agree with the rest of the bundle."""


def parse_time(text: Any) -> datetime:
    """A record's time (``2026-12-04T21:04:06.435859Z``, the only form records use)."""
    if not (isinstance(text, str) and len(text) == 27 and text[10] == "T" and text[26] == "Z"):
        raise ValueError(f"not a record's time: {text!r}")
    value = datetime.fromisoformat(text[:26]).replace(tzinfo=UTC)
    if value.strftime(_TIME) != text:
        raise ValueError(f"not a record's time: {text!r}")
    return value


def month_bounds(month: str, zone: ZoneInfo) -> tuple[datetime, datetime]:
    """[start, end) of ``YYYY-MM`` in ``zone``, as UTC instants."""
    if len(month) != 7 or month[4] != "-":
        raise ValueError(f"month {month!r} is not of the form YYYY-MM")
    year, number = int(month[:4]), int(month[5:])
    start = datetime(year, number, 1, tzinfo=zone)
    end = datetime(year + number // 12, number % 12 + 1, 1, tzinfo=zone)
    return start.astimezone(UTC), end.astimezone(UTC)


def _strict_int(value: Any, what: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise ValueError(f"{what} is not an integer: {value!r}")
    return value


def _strict_float(value: Any, what: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise ValueError(f"{what} is not a number: {value!r}")
    return float(value)


def _strict_bool(value: Any, what: str) -> bool:
    if not isinstance(value, bool):
        raise ValueError(f"{what} is not true or false: {value!r}")
    return value


class MonthCounter:
    """The month's decisions, their latest outcomes and final decisions, in a temporary file."""

    def __init__(self, policy: str, month: str, time_zone: str) -> None:
        self.policy = policy
        self.zone = ZoneInfo(time_zone)
        self.start, self.end = month_bounds(month, self.zone)
        self._dir = tempfile.TemporaryDirectory(prefix="evenhand-bundle-")
        self._db = sqlite3.connect(os.path.join(self._dir.name, "month.sqlite"))
        self._db.executescript(
            "PRAGMA journal_mode = OFF; PRAGMA synchronous = OFF; PRAGMA cache_size = -4000;"
            "CREATE TABLE decisions (rid TEXT PRIMARY KEY, leaf INTEGER, version INTEGER,"
            " grp TEXT, shadow_version INTEGER, day TEXT, action INTEGER, probability REAL,"
            " shadow_action INTEGER, score REAL, outcome INTEGER, finals INTEGER DEFAULT 0,"
            " overrides INTEGER DEFAULT 0);"
        )
        self._db.execute("BEGIN")
        self.decisions = 0
        self.versions_used: set[int] = set()
        """The versions and shadow versions the month's decisions name (a handful)."""

    def close(self) -> None:
        try:
            self._db.close()
        finally:
            self._dir.cleanup()

    def add_decision(self, leaf: int, record: Mapping[str, Any]) -> None:
        if record.get("policy") != self.policy:
            raise RecountProblem(
                f"a decision of policy {record.get('policy')!r} in the bundle of {self.policy!r}"
            )
        issued = parse_time(record["issued_at"])
        if not self.start <= issued < self.end:
            raise RecountProblem(f"a decision issued at {record['issued_at']} is outside the month")
        shadow_version = record["shadow_version"]
        shadow_action = record["shadow_action"]
        row = (
            str(record["recommendation_id"]),
            leaf,
            _strict_int(record["version"], "version"),
            str(record["group"]),
            None if shadow_version is None else _strict_int(shadow_version, "shadow_version"),
            issued.astimezone(self.zone).date().isoformat(),
            int(_strict_bool(record["action"], "action")),
            _strict_float(record["probability"], "probability"),
            None if shadow_action is None else int(_strict_bool(shadow_action, "shadow_action")),
            _strict_float(record["score"], "score"),
        )
        self.versions_used.add(row[2])
        if row[4] is not None:
            self.versions_used.add(row[4])
        try:
            self._db.execute(
                "INSERT INTO decisions (rid, leaf, version, grp, shadow_version, day, action,"
                " probability, shadow_action, score) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                row,
            )
        except sqlite3.IntegrityError:
            raise RecountProblem(
                f"decision {record['recommendation_id']} appears twice in the bundle"
            ) from None
        self.decisions += 1

    def add_outcome(self, record: Mapping[str, Any]) -> None:
        outcome = _strict_int(record["outcome"], "outcome")
        if outcome not in (0, 1):
            raise RecountProblem(f"an outcome is 0 or 1, got {outcome}")
        updated = self._db.execute(
            "UPDATE decisions SET outcome = ? WHERE rid = ?",
            (outcome, str(record["recommendation_id"])),
        ).rowcount
        if updated != 1:
            raise RecountProblem(
                f"an outcome names decision {record['recommendation_id']}, which is not a "
                "decision of the month in the bundle before it"
            )

    def add_final(self, record: Mapping[str, Any]) -> None:
        overridden = int(_strict_bool(record["overridden"], "overridden"))
        updated = self._db.execute(
            "UPDATE decisions SET finals = finals + 1, overrides = overrides + ? WHERE rid = ?",
            (overridden, str(record["recommendation_id"])),
        ).rowcount
        if updated != 1:
            raise RecountProblem(
                f"a final decision names decision {record['recommendation_id']}, which is not a "
                "decision of the month in the bundle before it"
            )

    def _rows(self) -> Iterator[tuple[Any, ...]]:
        cursor = self._db.execute(
            "SELECT version, grp, shadow_version, day, action, probability, shadow_action,"
            " score, outcome, finals, overrides FROM decisions ORDER BY rowid"
        )
        while True:
            batch = cursor.fetchmany(1_000)
            if not batch:
                return
            yield from batch

    def tallies(self) -> tallies.Tallies:
        """The month's tallies by cell, as the audit counts them."""
        out: tallies.Tallies = {}
        for version, grp, sv, day, action, p, sa, score, outcome, finals, overrides in self._rows():
            facts = DecisionFacts(
                policy=self.policy,
                version=int(version),
                group=str(grp),
                shadow_version=None if sv is None else int(sv),
                day=date.fromisoformat(day),
                action=bool(action),
                probability=float(p),
                shadow_action=None if sa is None else bool(sa),
                score=float(score),
            )
            tallies.add_decision(out, facts)
            if outcome is not None:
                tallies.add_outcome(out, facts, int(outcome))
            for i in range(int(finals)):
                tallies.add_final(out, facts, i < int(overrides))
        return out


def _cell_counts(v: Sequence[int]) -> dict[str, int]:
    n, actions = count(v, "n"), count(v, "actions")
    observed, positives = count(v, "observed"), count(v, "positives")
    tp, fp = count(v, "tp"), count(v, "fp")
    finals, overrides = count(v, "finals"), count(v, "overrides")
    negatives = observed - positives
    return {
        "n": n,
        "actions": actions,
        "no_actions": n - actions,
        "observed": observed,
        "unobserved": n - observed,
        "positives": positives,
        "negatives": negatives,
        "tp": tp,
        "fp": fp,
        "fn": positives - tp,
        "tn": negatives - fp,
        "observed_actions": tp + fp,
        "observed_no_actions": positives - tp + negatives - fp,
        "finals": finals,
        "overrides": overrides,
        "followed": finals - overrides,
    }


def _shadow_counts(v: Sequence[int]) -> dict[str, int]:
    n, actions, differs = count(v, "shadow_n"), count(v, "shadow_actions"), count(v, "differs")
    observed, positives = count(v, "shadow_observed"), count(v, "shadow_positives")
    tp, fp = count(v, "shadow_tp"), count(v, "shadow_fp")
    negatives = observed - positives
    return {
        "n": n,
        "actions": actions,
        "no_actions": n - actions,
        "differs": differs,
        "agrees": n - differs,
        "observed": observed,
        "positives": positives,
        "negatives": negatives,
        "tp": tp,
        "fp": fp,
        "fn": positives - tp,
        "tn": negatives - fp,
        "observed_actions": tp + fp,
        "observed_no_actions": positives - tp + negatives - fp,
    }


def _score_sums(v: Sequence[int]) -> dict[str, Any]:
    return {
        "n": count(v, "s_n"),
        "sum_y": float(count(v, "s_y")),
        "sum_p": real(v, "s1"),
        "sum_p2": real(v, "s2"),
        "sum_p3": real(v, "s3"),
        "sum_p4": real(v, "s4"),
        "sum_yp": real(v, "s_yp"),
        "log_double": real(v, "log_double"),
        "log_half": real(v, "log_half"),
        "bin_counts": [count(v, f"b{b}_n") for b in range(BINS)],
        "bin_positives": [count(v, f"b{b}_pos") for b in range(BINS)],
        "bin_score_sums": [real(v, f"b{b}_sum") for b in range(BINS)],
    }


class Recount:
    """The month's figures that are pure counting, per version and group."""

    def __init__(self, month: Mapping[Cell, Sequence[int]]) -> None:
        groups: dict[tuple[int, str], list[int]] = {}
        shadows: dict[tuple[int, int, str], list[int]] = {}
        for cell, vector in month.items():
            tallies.add_vector(groups, (cell.version, cell.group), vector)  # type: ignore[arg-type]
            if cell.shadow_version is not None:
                key = (cell.version, cell.shadow_version, cell.group)
                tallies.add_vector(shadows, key, vector)  # type: ignore[arg-type]
        self.cells = {k: _cell_counts(v) for k, v in groups.items() if count(v, "n")}
        self.scores = {k: _score_sums(v) for k, v in groups.items() if count(v, "s_n")}
        self.shadows = {
            k: _shadow_counts(v)
            for k, v in shadows.items()
            if (k[0], k[2]) in self.cells and count(v, "shadow_n")
        }
        self.versions = sorted({v for v, _ in self.cells})
        totals: dict[int, dict[str, int]] = {}
        for (version, _), c in self.cells.items():
            acc = totals.setdefault(version, {"n": 0, "observed": 0, "finals": 0})
            for name in acc:
                acc[name] += c[name]
        self.totals = totals
