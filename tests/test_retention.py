"""Retention purges on SQLite and PostgreSQL: what is refused, what is deleted and kept, and
that the log still verifies and proves afterwards, while tampering is still found.

Time is moved by sealing with explicit times and by giving the purge a ``now`` months ahead.
Proofs are checked with the RFC 9162 (Laurie, Messeri & Stradling, 2021) verification
algorithms of sections 2.1.3.2 and 2.1.4.2, written independently in ``tests/test_log_seal``.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta

import pytest
from fastapi.testclient import TestClient
from pydantic import ValidationError
from sqlalchemy import Engine, text
from sqlalchemy.exc import DBAPIError
from sqlalchemy.orm import Session, sessionmaker

from service.audit.month import Month
from service.cli.main import main
from service.errors import NotFound, Unprocessable
from service.settings import Settings
from service.store import log_proofs
from service.store.retention import PurgeSummary, purge
from service.store.sealing import seal_pending
from service.store.tally_batches import tally_pending
from tests.audit_helpers import POLICY
from tests.helpers import TEST_SECRET, bearer, make_request
from tests.insert_only import changes_allowed
from tests.log_helpers import SIGNER, scalar, seal, tamper, verify, write_every_kind
from tests.test_log_seal import _verify_consistency, _verify_inclusion

PERSONAL = ("recommendations", "outcome_records", "final_decisions")
KEPT = (
    "policy_versions",
    "policy_events",
    "key_events",
    "api_keys",
    "audit_snapshots",
    "tally_batches",
    "tallies",
    "seals",
    "tree_nodes",
    "signing_keys",
)


@pytest.fixture
def settings(database_url: str) -> Settings:
    # No periodic sealing during a test: the tests seal at the times they choose.
    return Settings(
        database_url=database_url,
        draw_secret=TEST_SECRET,  # type: ignore[arg-type]
        seal_interval_seconds=3600,
    )


def _now() -> datetime:
    return datetime.now(UTC)


THIS_MONTH = Month.containing(_now(), "UTC")
NEXT_MONTH_DAY = THIS_MONTH.bounds("UTC")[1] + timedelta(days=3)
"""When the second part of the log is sealed: in the next month."""
LATER = THIS_MONTH.shifted(8).bounds("UTC")[0] + timedelta(days=1)
"""A `now` at which this month lies seven whole months back: purgeable with 6 months."""


def _seal_at(factory: sessionmaker[Session], when: datetime) -> None:
    """Seal, tally every sealed record and seal the tallies, all dated ``when``."""
    while seal_pending(factory, SIGNER, now=when) is not None:
        pass
    while tally_pending(factory, "UTC", force=True, now=when) is not None:
        pass
    while seal_pending(factory, SIGNER, now=when) is not None:
        pass


def _score(client: TestClient, token: str, prefix: str, count: int) -> list[str]:
    items = [
        make_request(case_id=f"{prefix}-{i}", score=0.1 + 0.8 * i / count) for i in range(count)
    ]
    r = client.post("/v1/recommendations/batch", json={"items": items}, headers=bearer(token))
    assert r.status_code == 201, r.text
    return [item["recommendation_id"] for item in r.json()["items"]]


def _outcome(client: TestClient, token: str, rid: str, value: int) -> None:
    body = {
        "recommendation_id": rid,
        "outcome": value,
        "observed_at": _now().isoformat(),
        "source": "records",
    }
    r = client.post("/v1/outcomes", json=body, headers=bearer(token))
    assert r.status_code == 201, r.text


def _counts(engine: Engine) -> dict[str, int]:
    return {t: int(scalar(engine, f"SELECT count(*) FROM {t}")) for t in PERSONAL + KEPT}


def _purge(factory: sessionmaker[Session], month: Month = THIS_MONTH) -> PurgeSummary:
    return purge(factory, month, time_zone="UTC", retention_months=6, by="test", now=LATER)


@dataclass
class Purged:
    old: list[str]
    new: list[str]
    before: dict[str, int]
    after: dict[str, int]
    summary: PurgeSummary


@pytest.fixture
def purged(
    client: TestClient,
    engine: Engine,
    make_key: Callable[..., str],
    session_factory: sessionmaker[Session],
) -> Iterator[Purged]:
    """This month: every kind of record, sealed and tallied. Next month: more decisions with
    outcomes and a final decision. Then a purge through this month, sealed."""
    old = write_every_kind(client, make_key).recommendation_ids
    seal(session_factory)
    scoring = make_key("scoring")
    new = _score(client, scoring, "new", 6)
    for i, rid in enumerate(new[:3]):
        _outcome(client, scoring, rid, i % 2)
    r = client.post(
        f"/v1/recommendations/{new[0]}/final",
        json={"decision": "followed", "decided_at": _now().isoformat()},
        headers=bearer(scoring),
    )
    assert r.status_code == 201, r.text
    _seal_at(session_factory, NEXT_MONTH_DAY)
    before = _counts(engine)
    summary = _purge(session_factory)
    _seal_at(session_factory, LATER)
    yield Purged(old, new, before, _counts(engine), summary)


def test_retention_below_six_months_is_refused_at_start_up() -> None:
    # EU AI Act (Regulation (EU) 2024/1689) Art. 26(6): at least six months.
    with pytest.raises(ValidationError, match=r"at least 6.*Art\. 26\(6\)"):
        Settings(retention_months=5)
    assert Settings().retention_months == 6


def test_a_purge_inside_the_retention_period_is_refused(
    session_factory: sessionmaker[Session],
) -> None:
    # Five whole months between this month and the current one: not yet.
    now = THIS_MONTH.shifted(6).bounds("UTC")[0] + timedelta(days=1)
    with pytest.raises(Unprocessable) as refused:
        purge(session_factory, THIS_MONTH, time_zone="UTC", retention_months=6, by="t", now=now)
    assert refused.value.code == "within_retention"
    assert str(THIS_MONTH.shifted(-1)) in refused.value.message
    with pytest.raises(Unprocessable):  # a longer setting holds back more
        purge(session_factory, THIS_MONTH, time_zone="UTC", retention_months=8, by="t", now=LATER)


def test_a_purge_removes_the_personal_records_of_old_seals_and_keeps_the_rest(
    purged: Purged, engine: Engine, session_factory: sessionmaker[Session]
) -> None:
    plan = purged.summary.plan
    assert purged.summary.purge_id == 1 and plan.notes == []
    assert plan.through_month == str(THIS_MONTH)
    old_outcomes = purged.before["outcome_records"] - 4  # 3 new outcomes + 1 new final below
    assert plan.counts == {"decision": len(purged.old), "outcome": old_outcomes + 1, "final": 1}
    for table, kind in zip(PERSONAL, ("decision", "outcome", "final"), strict=True):
        assert purged.after[table] == purged.before[table] - plan.counts[kind], table
    assert purged.after["recommendations"] == len(purged.new) == 6
    assert purged.after["outcome_records"] == 3 and purged.after["final_decisions"] == 1
    kept = {rid.replace("-", "") for rid in purged.new}
    with engine.connect() as conn:
        left = {
            str(r).replace("-", "")
            for (r,) in conn.execute(text("SELECT recommendation_id FROM recommendations"))
        }
    assert left == kept
    for table in KEPT:
        assert purged.after[table] >= purged.before[table], table
    for table in ("policy_versions", "policy_events", "audit_snapshots", "tallies"):
        assert purged.after[table] == purged.before[table], table

    result = verify(session_factory)
    assert result.ok, result.problem
    assert result.purged_through_seal == plan.through_seal
    assert result.purged_leaves == sum(plan.counts.values())
    assert set(result.unsealed.values()) == {0}


def test_proofs_after_a_purge(purged: Purged, session_factory: sessionmaker[Session]) -> None:
    with session_factory() as session:
        for kind, record_id in (("decision", None), ("policy_event", 1), ("purge", 1)):
            if record_id is None:
                record_id = log_proofs.record_row_id(session, kind, None, purged.new[-1])
            proof = log_proofs.inclusion(session, kind, record_id)
            head = proof.head["head"]
            leaf = hashlib.sha256(b"\x00" + proof.record).digest()
            assert _verify_inclusion(
                proof.leaf_index, head["tree_size"], leaf, proof.path, bytes.fromhex(head["root"])
            ), kind
        last = int(proof.head["head"]["seal_id"])
        for first in range(1, last + 1):
            c = log_proofs.consistency(session, first, last)
            a, b = c.first["head"], c.second["head"]
            assert _verify_consistency(
                a["tree_size"],
                b["tree_size"],
                bytes.fromhex(a["root"]),
                bytes.fromhex(b["root"]),
                c.path,
            ), first
        with pytest.raises(NotFound) as gone:
            log_proofs.inclusion(session, "decision", 1)
        assert gone.value.code == "purged"


def test_proofs_and_audits_of_purged_months_over_http(
    purged: Purged, client: TestClient, make_key: Callable[..., str]
) -> None:
    audit = bearer(make_key("audit"))
    r = client.get("/v1/log/proofs/inclusion", params={"kind": "decision", "id": 1}, headers=audit)
    assert r.status_code == 404 and r.json()["error"]["code"] == "purged", r.text
    r = client.post("/v1/audits", json={"policy": POLICY, "month": str(THIS_MONTH)}, headers=audit)
    assert r.status_code == 422 and r.json()["error"]["code"] == "purged_month", r.text
    r = client.get(f"/v1/reports/{POLICY}/{THIS_MONTH}", headers=audit)
    assert r.status_code == 200, r.text  # the snapshot written before the purge
    body = client.get("/v1/log/verify", headers=audit).json()
    assert body["ok"] is True, body


def test_a_purge_run_again_removes_nothing(
    purged: Purged, engine: Engine, session_factory: sessionmaker[Session]
) -> None:
    again = _purge(session_factory)
    assert again.purge_id is None and again.plan.empty
    assert _counts(engine) == purged.after
    assert verify(session_factory).ok


def test_a_late_outcome_moves_the_horizon_back(
    client: TestClient,
    engine: Engine,
    make_key: Callable[..., str],
    session_factory: sessionmaker[Session],
) -> None:
    scoring = make_key("scoring")
    write_every_kind(client, make_key)
    seal(session_factory)
    later_this_month = _score(client, scoring, "b", 4)
    seal(session_factory)
    _outcome(client, scoring, later_this_month[2], 1)  # reported next month
    _seal_at(session_factory, NEXT_MONTH_DAY)
    summary = _purge(session_factory)
    assert summary.purge_id is not None
    assert any("late report" in note for note in summary.plan.notes), summary.plan.notes
    left = int(scalar(engine, "SELECT count(*) FROM recommendations"))
    assert left == 4  # the second part of the month stays with its late outcome
    _seal_at(session_factory, LATER)
    assert verify(session_factory).ok


def test_unsealed_records_are_not_purged_before_they_are_tallied(
    client: TestClient,
    engine: Engine,
    make_key: Callable[..., str],
    session_factory: sessionmaker[Session],
) -> None:
    write_every_kind(client, make_key)
    while seal_pending(session_factory, SIGNER) is not None:  # sealed, never tallied
        pass
    summary = _purge(session_factory)
    assert summary.plan.empty and summary.purge_id is None
    assert any("tally batches" in note for note in summary.plan.notes)
    assert int(scalar(engine, "SELECT count(*) FROM recommendations")) == 12


def _last_id(engine: Engine, table: str) -> int:
    return int(scalar(engine, f"SELECT max(id) FROM {table}"))


TAMPERING: dict[str, Callable[[Engine], tuple[str, str]]] = {
    # each changes the database and says which kind of problem verify must name
    "edit a kept outcome after the horizon": lambda e: (
        f"UPDATE outcome_records SET outcome = 1 - outcome WHERE id = "
        f"{_last_id(e, 'outcome_records')}",
        "outcome",
    ),
    "edit a kept policy event inside the horizon": lambda e: (
        "UPDATE policy_events SET reason = 'rewritten' WHERE id = 1",
        "policy_event",
    ),
    "forge a purge row's horizon": lambda e: (
        "UPDATE log_purges SET through_seal = through_seal + 2",
        "purge",
    ),
    "delete the purge row": lambda e: ("DELETE FROM log_purges", "seal"),
    "delete the kept leaf hashes": lambda e: ("DELETE FROM purged_leaves", "seal"),
    "delete a later decision's final decision": lambda e: (
        "DELETE FROM final_decisions",
        "seal",
    ),
}


@pytest.mark.parametrize("case", sorted(TAMPERING))
def test_tampering_after_a_purge_is_found(
    case: str, purged: Purged, engine: Engine, session_factory: sessionmaker[Session]
) -> None:
    statement, kind = TAMPERING[case](engine)
    tamper(engine, statement)
    result = verify(session_factory)
    assert not result.ok, case
    assert result.problem is not None and result.problem.kind == kind, result.problem


def test_an_unsealed_purge_row_skips_nothing(
    purged: Purged, engine: Engine, session_factory: sessionmaker[Session]
) -> None:
    last_seal = int(scalar(engine, "SELECT max(id) FROM seals"))
    tamper(
        engine,
        "INSERT INTO log_purges (through_seal, through_month, counts, purged_at, by) "
        f"VALUES ({last_seal}, '{THIS_MONTH.shifted(1)}', '{{}}', '2030-01-01 00:00:00', 'x')",
    )
    result = verify(session_factory)
    assert result.ok and result.unsealed["purge"] == 1
    assert result.purged_through_seal == purged.summary.plan.through_seal
    # ... and records deleted under its cover are found
    tamper(engine, f"DELETE FROM outcome_records WHERE id = {_last_id(engine, 'outcome_records')}")
    result = verify(session_factory)
    assert not result.ok and result.problem is not None
    assert "not sealed yet" in result.problem.reason


def test_postgres_refuses_changes_outside_a_purge(
    purged: Purged, engine: Engine, database_url: str
) -> None:
    if engine.dialect.name != "postgresql":
        pytest.skip("the trigger is PostgreSQL's")
    refused = (
        (False, "DELETE FROM recommendations"),
        (False, "UPDATE recommendations SET case_id = case_id"),
        (True, "UPDATE recommendations SET case_id = case_id"),
        (True, "DELETE FROM policy_events"),
        (True, "DELETE FROM tallies"),
        (True, "DELETE FROM log_purges"),
        (True, "DELETE FROM purged_leaves"),
    )
    with changes_allowed():
        for purging, statement in refused:
            with engine.connect() as conn:
                if purging:
                    conn.execute(text("SET LOCAL evenhand.purging = 'on'"))
                with pytest.raises(DBAPIError, match="insert-only"):
                    conn.execute(text(statement))
                conn.rollback()
        with engine.connect() as conn:  # the purge's own DELETEs go through
            conn.execute(text("SET LOCAL evenhand.purging = 'on'"))
            conn.execute(text("DELETE FROM final_decisions"))
            assert conn.execute(text("SELECT count(*) FROM final_decisions")).scalar() == 0
            conn.rollback()
    assert int(scalar(engine, "SELECT count(*) FROM final_decisions")) == 1


def test_cli_purge(
    client: TestClient,
    make_key: Callable[..., str],
    session_factory: sessionmaker[Session],
    database_url: str,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    write_every_kind(client, make_key)
    seal(session_factory)
    monkeypatch.setenv("EVENHAND_DATABASE_URL", database_url)
    assert main(["log", "purge", "--through", str(THIS_MONTH), "--yes"]) == 2
    assert "within_retention" in capsys.readouterr().err
    assert main(["log", "purge", "--through", "13-2020"]) == 2
    old = str(THIS_MONTH.shifted(-7))
    assert main(["log", "purge", "--through", old, "--dry-run"]) == 0
    assert "nothing to purge" in capsys.readouterr().out
    monkeypatch.setenv("EVENHAND_RETENTION_MONTHS", "3")
    assert main(["log", "purge", "--through", old]) == 2  # one line, no traceback
    assert "Art. 26(6)" in capsys.readouterr().err
    monkeypatch.setenv("EVENHAND_RETENTION_MONTHS", "6")
    assert main(["log", "purge", "--through", old, "--yes"]) == 0
    assert "nothing to purge" in capsys.readouterr().out
