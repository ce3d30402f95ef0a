"""The sealed log on SQLite and PostgreSQL, written through the service's routes.

Seal roots and proofs are recomputed here independently of ``service.log.merkle``, from the
text of RFC 9162 (Laurie, Messeri & Stradling, "Certificate Transparency Version 2.0", 2021):
the tree hash of section 2.1.1 and the proof verification of sections 2.1.3.2 and 2.1.4.2.
Head signatures are checked with the ``cryptography`` library's Ed25519 (RFC 8032). Tampering
is done with raw SQL, as someone with the database owner's rights would do it.
"""

from __future__ import annotations

import hashlib
import json
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey
from fastapi.testclient import TestClient
from sqlalchemy import Engine, select, text
from sqlalchemy.orm import Session, sessionmaker

from service.store.audit_models import Seal
from service.store.log_proofs import consistency, inclusion
from service.store.log_sources import KIND_ORDER, SOURCES, rows
from service.store.log_upkeep import UPKEEP_LOCK_KEY, keep_log
from service.store.sealing import seal_pending
from tests.helpers import bearer, make_request
from tests.log_helpers import SIGNER, scalar, seal, tamper, verify, write_every_kind


def _h(data: bytes) -> bytes:
    return hashlib.sha256(data).digest()


def _mth(leaves: list[bytes]) -> bytes:
    """RFC 9162 section 2.1.1: MTH of a list of entries."""
    n = len(leaves)
    if n == 0:
        return _h(b"")
    if n == 1:
        return _h(b"\x00" + leaves[0])
    k = 1 << ((n - 1).bit_length() - 1)  # the largest power of two smaller than n
    return _h(b"\x01" + _mth(leaves[:k]) + _mth(leaves[k:]))


def _verify_inclusion(
    index: int, size: int, leaf_hash: bytes, path: list[bytes], root: bytes
) -> bool:
    """RFC 9162 section 2.1.3.2, step by step."""
    if index >= size:
        return False
    fn, sn, r = index, size - 1, leaf_hash
    for p in path:
        if sn == 0:
            return False
        if fn & 1 or fn == sn:
            r = _h(b"\x01" + p + r)
            if not fn & 1:
                while not (fn & 1) and fn != 0:
                    fn, sn = fn >> 1, sn >> 1
        else:
            r = _h(b"\x01" + r + p)
        fn, sn = fn >> 1, sn >> 1
    return sn == 0 and r == root


def _verify_consistency(
    first: int, second: int, first_root: bytes, second_root: bytes, path: list[bytes]
) -> bool:
    """RFC 9162 section 2.1.4.2, step by step."""
    if first == second:
        return not path and first_root == second_root
    if not path:
        return False
    if first & (first - 1) == 0:  # an exact power of two
        path = [first_root, *path]
    fn, sn = first - 1, second - 1
    while fn & 1:
        fn, sn = fn >> 1, sn >> 1
    fr = sr = path[0]
    for c in path[1:]:
        if sn == 0:
            return False
        if fn & 1 or fn == sn:
            fr, sr = _h(b"\x01" + c + fr), _h(b"\x01" + c + sr)
            if not fn & 1:
                while not (fn & 1) and fn != 0:
                    fn, sn = fn >> 1, sn >> 1
        else:
            sr = _h(b"\x01" + sr + c)
        fn, sn = fn >> 1, sn >> 1
    return fr == first_root and sr == second_root and sn == 0


def _head_bytes(head: dict[str, Any]) -> bytes:
    # The head's signed bytes: its JSON, keys sorted, compact, UTF-8 (docs/decision-log.md).
    return json.dumps(head, sort_keys=True, separators=(",", ":")).encode("utf-8")


WRITTEN_KINDS = tuple(kind for kind in KIND_ORDER if kind != "purge")
"""The kinds :func:`write_every_kind` writes: a purge needs months of log and has its own
tests (``tests/test_retention.py``), its proofs and tampering included."""


def _entries(factory: sessionmaker[Session]) -> tuple[list[Seal], list[tuple[str, int, bytes]]]:
    """Every seal, and every sealed record as (kind, id, entry) in tree order."""
    with factory() as session:
        seals = list(session.scalars(select(Seal).order_by(Seal.id)))
        entries: list[tuple[str, int, bytes]] = []
        for s in seals:
            for kind in KIND_ORDER:
                after, through, _count = s.ranges[kind]
                for row in rows(session, SOURCES[kind], after, through):
                    entries.append((kind, int(row.id), SOURCES[kind].encode(row)))
        session.expunge_all()
    return seals, entries


@pytest.fixture
def written(
    client: TestClient, make_key: Callable[..., str], session_factory: sessionmaker[Session]
) -> list[str]:
    recs = write_every_kind(client, make_key).recommendation_ids
    assert seal(session_factory).seals
    return recs


def test_every_record_of_every_kind_is_a_leaf_and_every_head_is_signed(
    written: list[str], engine: Engine, session_factory: sessionmaker[Session]
) -> None:
    seals, entries = _entries(session_factory)
    kinds = {kind for kind, _id, _entry in entries}
    assert kinds == set(WRITTEN_KINDS)  # policies, events, keys, decisions, ..., tallies
    for kind in KIND_ORDER:
        stored = scalar(engine, f"SELECT count(*) FROM {SOURCES[kind].table.name}")
        assert sum(1 for k, _i, _e in entries if k == kind) == stored
    public = Ed25519PublicKey.from_public_bytes(SIGNER.public_key)
    for s in seals:
        assert bytes(s.root) == _mth([e for _k, _i, e in entries[: s.tree_size]])
        head = {
            "format": "evenhand.tree-head/1",
            "seal_id": s.id,
            "tree_size": s.tree_size,
            "root": bytes(s.root).hex(),
            "created_at": s.created_at.strftime("%Y-%m-%dT%H:%M:%S.%fZ"),
            "key_id": SIGNER.key_id,
        }
        public.verify(bytes(s.signature), _head_bytes(head))  # raises when it does not match
    # A decision's entry is its record as JSON, naming its kind (the reference: json.dumps).
    kind, _id, entry = next(e for e in entries if e[0] == "decision")
    decoded = json.loads(entry)
    assert decoded["kind"] == "decision" and decoded["recommendation_id"] in written
    assert entry == json.dumps(
        decoded, sort_keys=True, separators=(",", ":"), ensure_ascii=False
    ).encode("utf-8")
    assert verify(session_factory).ok


def test_proofs_verify_by_the_rfc_for_every_kind_and_every_pair_of_heads(
    written: list[str], session_factory: sessionmaker[Session]
) -> None:
    seals, entries = _entries(session_factory)
    latest = seals[-1]
    with session_factory() as session:
        for kind in WRITTEN_KINDS:
            record_id = next(i for k, i, _e in entries if k == kind)
            proof = inclusion(session, kind, record_id)
            index = entries.index((kind, record_id, proof.record))
            assert proof.leaf_index == index
            assert proof.leaf == _h(b"\x00" + proof.record)
            root = bytes.fromhex(proof.head["head"]["root"])
            assert root == bytes(latest.root)
            assert _verify_inclusion(index, latest.tree_size, proof.leaf, proof.path, root)
            assert not _verify_inclusion(
                index, latest.tree_size, _h(b"\x00" + proof.record + b" "), proof.path, root
            )
        sizes = {s.id: (s.tree_size, bytes(s.root)) for s in seals}
        for a in sizes:
            for b in sizes:
                if a > b:
                    continue
                proof_ab = consistency(session, a, b)
                (n1, r1), (n2, r2) = sizes[a], sizes[b]
                assert _verify_consistency(n1, n2, r1, r2, proof_ab.path), (a, b)
                if n1 < n2:
                    assert not _verify_consistency(n1, n2, r1, _h(r2), proof_ab.path)


# One change per kind: what a person with write access would edit to move a number or a
# decision, and which record verify must name.
EDITS: list[tuple[str, str]] = [
    ("policy_version", "UPDATE policy_versions SET author = 'someone-else' WHERE id = :id"),
    ("policy_event", "UPDATE policy_events SET reason = 'edited later' WHERE id = :id"),
    ("key_event", "UPDATE key_events SET by = 'nobody' WHERE id = :id"),
    ("decision", "UPDATE recommendations SET \"group\" = 'other|x' WHERE id = :id"),
    ("decision", "UPDATE recommendations SET action_label = 'edited' WHERE id = :id"),
    ("outcome", "UPDATE outcome_records SET outcome = 1 - outcome WHERE id = :id"),
    ("outcome", "UPDATE outcome_records SET correction_reason = NULL WHERE id = :id"),
    ("final", "UPDATE final_decisions SET final_action = NOT final_action WHERE id = :id"),
    ("snapshot", "UPDATE audit_snapshots SET created_by = 'x' WHERE id = :id"),
    ("snapshot", "UPDATE audit_snapshots SET recommendations = recommendations + 1 WHERE id = :id"),
    ("tally_batch", "UPDATE tally_batches SET time_zone = 'Europe/Paris' WHERE id = :id"),
]


@pytest.mark.parametrize(("kind", "statement"), EDITS)
def test_an_edit_of_any_kind_is_named(
    written: list[str],
    engine: Engine,
    session_factory: sessionmaker[Session],
    kind: str,
    statement: str,
) -> None:
    table = SOURCES[kind].table.name
    target = int(scalar(engine, f"SELECT max(id) FROM {table}"))
    tamper(engine, statement, id=target)
    problem = verify(session_factory).problem
    assert problem is not None
    assert (problem.kind, problem.id) == (kind, target), problem
    assert "changed" in problem.reason


def test_an_edited_key_is_named_by_its_event(
    written: list[str], engine: Engine, session_factory: sessionmaker[Session]
) -> None:
    tamper(engine, "UPDATE api_keys SET role = 'admin' WHERE name = 'spare-key'")
    problem = verify(session_factory).problem
    assert problem is not None and problem.kind == "key_event"


def test_a_key_inserted_without_its_creation_event_is_named(
    written: list[str], engine: Engine, session_factory: sessionmaker[Session]
) -> None:
    tamper(
        engine,
        "INSERT INTO api_keys (name, role, token_hash, created_at) "
        "SELECT 'backdoor', 'admin', :h, created_at FROM api_keys WHERE name = 'spare-key'",
        h="0" * 64,
    )
    problem = verify(session_factory).problem
    stray = int(scalar(engine, "SELECT id FROM api_keys WHERE name = 'backdoor'"))
    assert problem is not None and (problem.kind, problem.id) == ("api_key", stray), problem


DELETES = [
    ("policy_version", "policy_versions"),
    ("key_event", "key_events"),
    ("decision", "recommendations"),
    ("outcome", "outcome_records"),
    ("snapshot", "audit_snapshots"),
]


@pytest.mark.parametrize(("kind", "table"), DELETES)
def test_a_deleted_record_is_found(
    written: list[str],
    engine: Engine,
    session_factory: sessionmaker[Session],
    kind: str,
    table: str,
) -> None:
    target = int(scalar(engine, f"SELECT max(id) FROM {table}"))
    tamper(engine, f"DELETE FROM {table} WHERE id = :id", id=target)
    problem = verify(session_factory).problem
    assert problem is not None and "deleted" in problem.reason, problem


def test_a_record_inserted_into_a_sealed_range_is_named(
    client: TestClient,
    make_key: Callable[..., str],
    engine: Engine,
    session_factory: sessionmaker[Session],
) -> None:
    write_every_kind(client, make_key)
    last = int(scalar(engine, "SELECT max(id) FROM recommendations"))
    copy = (
        "INSERT INTO recommendations SELECT :new_id, {uuid}, request_id || '-x', "
        'request_fingerprint, case_id, policy, version, score, attributes, "group", rule, '
        "probability, draw, action, action_label, issued_at, shadow_version, "
        "shadow_probability, shadow_action FROM recommendations WHERE id = :id"
    )
    fresh = (
        "gen_random_uuid()" if engine.dialect.name == "postgresql" else "lower(hex(randomblob(16)))"
    )
    # A gap in the ids before sealing (a rolled-back insert leaves one too) ...
    tamper(engine, "DELETE FROM recommendations WHERE id = :id", id=last - 1)
    seal(session_factory)
    assert verify(session_factory).ok
    # ... filled in afterwards, and a row below the first id.
    tamper(engine, copy.format(uuid=fresh), new_id=last - 1, id=last)
    problem = verify(session_factory).problem
    assert problem is not None and (problem.kind, problem.id) == ("decision", last - 1)
    assert "inserted" in problem.reason
    tamper(engine, "DELETE FROM recommendations WHERE id = :id", id=last - 1)
    assert verify(session_factory).ok
    tamper(engine, copy.format(uuid=fresh), new_id=0, id=last)
    problem = verify(session_factory).problem
    assert problem is not None and (problem.kind, problem.id) == ("decision", 0)


def test_reordered_records_are_found(
    written: list[str], engine: Engine, session_factory: sessionmaker[Session]
) -> None:
    last = int(scalar(engine, "SELECT max(id) FROM recommendations"))
    for a, b in ((last, -7), (last - 1, last), (-7, last - 1)):  # swap the last two
        tamper(engine, "UPDATE recommendations SET id = :b WHERE id = :a", a=a, b=b)
    problem = verify(session_factory).problem
    assert problem is not None and problem.kind == "decision"
    assert problem.id in (last - 1, last)


def test_tallies_and_tree_nodes_are_checked(
    written: list[str], engine: Engine, session_factory: sessionmaker[Session]
) -> None:
    vector = json.loads(
        str(scalar(engine, "SELECT vector FROM tallies ORDER BY batch_id, position LIMIT 1"))
    )
    vector[0] += 1
    tamper(
        engine,
        "UPDATE tallies SET vector = :v WHERE batch_id = (SELECT min(batch_id) FROM tallies) "
        "AND position = (SELECT min(position) FROM tallies)",
        v=json.dumps(vector),
    )
    problem = verify(session_factory).problem
    assert problem is not None and problem.kind in ("tally", "tally_batch"), problem


def test_seal_edits_and_a_foreign_key_are_found(
    written: list[str], engine: Engine, session_factory: sessionmaker[Session]
) -> None:
    seal_id = int(scalar(engine, "SELECT max(id) FROM seals"))
    signature = scalar(engine, "SELECT signature FROM seals WHERE id = :id", id=seal_id)
    forged = bytes(signature)[:-1] + bytes([bytes(signature)[-1] ^ 1])
    tamper(engine, "UPDATE seals SET signature = :s WHERE id = :id", s=forged, id=seal_id)
    problem = verify(session_factory).problem
    assert problem is not None and (problem.kind, problem.id) == ("seal", seal_id)
    tamper(engine, "UPDATE seals SET signature = :s WHERE id = :id", s=signature, id=seal_id)
    assert verify(session_factory).ok
    # A head signed with a key the verifier was not given is not trusted.
    problem = verify(session_factory, trusted={}).problem
    assert problem is not None and problem.kind == "seal"


def test_a_cut_back_log_is_found_by_the_heads_kept_elsewhere(
    client: TestClient,
    make_key: Callable[..., str],
    engine: Engine,
    session_factory: sessionmaker[Session],
    tmp_path: Path,
) -> None:
    mirror = tmp_path / "heads.jsonl"
    write_every_kind(client, make_key)
    seal(session_factory, mirror=str(mirror))
    client.post(
        "/v1/recommendations",
        json=make_request(case_id="late"),
        headers=bearer(make_key("scoring")),
    )
    seal(session_factory, mirror=str(mirror))
    heads = [json.loads(line) for line in mirror.read_text().splitlines()]
    assert verify(session_factory, heads=heads).ok
    last = int(scalar(engine, "SELECT max(id) FROM seals"))
    tamper(engine, "DELETE FROM seals WHERE id = :id", id=last)
    # Without the mirrored heads a cut-back log looks whole (its earlier heads still verify);
    # with them, the missing seal is named.
    assert verify(session_factory).ok
    problem = verify(session_factory, heads=heads).problem
    assert problem is not None and (problem.kind, problem.id) == ("seal", last)
    assert "cut back" in problem.reason


def test_unreadable_values_are_reported_not_raised(
    written: list[str], engine: Engine, session_factory: sessionmaker[Session]
) -> None:
    if engine.dialect.name != "sqlite":
        pytest.skip("PostgreSQL's column types refuse these values")
    target = int(scalar(engine, "SELECT max(id) FROM recommendations"))
    for statement in (
        "UPDATE recommendations SET attributes = '{not json' WHERE id = :id",
        "UPDATE recommendations SET score = 'abc' WHERE id = :id",
        "UPDATE recommendations SET issued_at = 'yesterday' WHERE id = :id",
    ):
        tamper(engine, statement, id=target)
        problem = verify(session_factory).problem
        assert problem is not None and (problem.kind, problem.id) == ("decision", target)


def test_concurrent_sealers_and_writers_seal_each_record_once(
    client: TestClient,
    make_key: Callable[..., str],
    engine: Engine,
    session_factory: sessionmaker[Session],
) -> None:
    write_every_kind(client, make_key, cases=4)
    scoring = bearer(make_key("scoring"))
    stop = threading.Event()
    errors: list[BaseException] = []

    def write() -> None:
        try:
            for i in range(40):
                body = make_request(case_id=f"w-{i}", request_id=f"w-{i}")
                assert client.post("/v1/recommendations", json=body, headers=scoring).is_success
        except BaseException as exc:  # reported below
            errors.append(exc)
        finally:
            stop.set()

    def keep_sealing() -> None:
        try:
            while not stop.is_set():
                seal_pending(session_factory, SIGNER, max_leaves=7)
        except BaseException as exc:
            errors.append(exc)

    threads = [threading.Thread(target=write)] + [
        threading.Thread(target=keep_sealing) for _ in range(3)
    ]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    assert not errors, errors
    seal(session_factory)
    result = verify(session_factory)
    assert result.ok and set(result.unsealed.values()) == {0}, result
    total = sum(
        int(scalar(engine, f"SELECT count(*) FROM {SOURCES[k].table.name}")) for k in KIND_ORDER
    )
    assert result.records_checked == total


def test_a_lower_id_committed_late_is_sealed_not_skipped(
    client: TestClient,
    make_key: Callable[..., str],
    engine: Engine,
    session_factory: sessionmaker[Session],
) -> None:
    if engine.dialect.name != "postgresql":
        pytest.skip("SQLite has one writer at a time: ids commit in order")
    write_every_kind(client, make_key, cases=4)
    seal(session_factory)
    copy = text(
        "INSERT INTO recommendations (recommendation_id, request_id, request_fingerprint, "
        'case_id, policy, version, score, attributes, "group", rule, probability, draw, '
        "action, action_label, issued_at) SELECT gen_random_uuid(), request_id || :suffix, "
        'request_fingerprint, case_id, policy, version, score, attributes, "group", rule, '
        "probability, draw, action, action_label, issued_at FROM recommendations "
        "WHERE id = (SELECT min(id) FROM recommendations) RETURNING id"
    )
    slow = engine.connect()
    slow_tx = slow.begin()
    low = int(slow.execute(copy, {"suffix": "-slow"}).scalar_one())  # not committed yet
    with engine.begin() as fast:
        high = int(fast.execute(copy, {"suffix": "-fast"}).scalar_one())
    assert low < high
    done: list[Any] = []
    sealer = threading.Thread(target=lambda: done.append(seal_pending(session_factory, SIGNER)))
    sealer.start()
    time.sleep(0.5)
    slow_tx.commit()  # the sealer waited for the open insert; now both are sealed in order
    slow.close()
    sealer.join(30)
    assert done and done[0] is not None
    seal(session_factory)
    result = verify(session_factory)
    assert result.ok and result.unsealed["decision"] == 0, result


def test_postgresql_refuses_updates_and_deletes_of_the_log(
    written: list[str], engine: Engine
) -> None:
    if engine.dialect.name != "postgresql":
        pytest.skip("the triggers are PostgreSQL's (the suite refuses such SQL on both)")
    from sqlalchemy import inspect
    from sqlalchemy.exc import DBAPIError

    from tests.insert_only import LOG_TABLES, changes_allowed

    with engine.connect() as conn:
        guarded = {
            row[0]
            for row in conn.execute(
                text(
                    "SELECT event_object_table FROM information_schema.triggers "
                    "WHERE action_statement LIKE '%evenhand_refuse_change%' "
                    "AND event_manipulation IN ('UPDATE', 'DELETE')"
                )
            )
        }
    assert guarded == LOG_TABLES
    with engine.connect() as conn:
        no_truncate = {
            row[0]
            for row in conn.execute(
                text(
                    "SELECT tgrelid::regclass::text FROM pg_trigger t JOIN pg_proc p "
                    "ON p.oid = t.tgfoid WHERE p.proname = 'evenhand_refuse_change' "
                    "AND (t.tgtype & 32) <> 0"  # TRIGGER_TYPE_TRUNCATE (pg_trigger.h)
                )
            )
        }
    assert no_truncate == LOG_TABLES
    inspector = inspect(engine)
    for table in sorted(LOG_TABLES):
        if not scalar(engine, f"SELECT count(*) FROM {table}"):
            continue  # tree nodes: only once a block of 1,024 leaves is complete
        column = inspector.get_columns(table)[0]["name"]
        one_row = f"ctid = (SELECT min(ctid) FROM {table})"
        for statement in (
            f'UPDATE {table} SET "{column}" = "{column}" WHERE {one_row}',
            f"DELETE FROM {table} WHERE {one_row}",
            f"TRUNCATE {table} CASCADE",
        ):
            with (
                changes_allowed(),
                pytest.raises(DBAPIError, match="insert-only"),
                engine.begin() as conn,
            ):
                conn.execute(text(statement))
                pytest.fail(f"{statement} was not refused")


def test_upkeep_skips_its_round_while_another_process_keeps_the_log(
    client: TestClient,
    make_key: Callable[..., str],
    engine: Engine,
    session_factory: sessionmaker[Session],
) -> None:
    if engine.dialect.name != "postgresql":
        pytest.skip("the upkeep lock is PostgreSQL's (SQLite has one writer)")
    write_every_kind(client, make_key, cases=2)
    with engine.connect() as other:  # another worker, in the middle of its round
        other.exec_driver_sql(f"SELECT pg_advisory_lock({UPKEEP_LOCK_KEY})")
        skipped = keep_log(session_factory, SIGNER, "UTC", wait=False)
        assert skipped.seals == [] and skipped.batches == []
        assert verify(session_factory).unsealed["decision"] > 0
        other.exec_driver_sql(f"SELECT pg_advisory_unlock({UPKEEP_LOCK_KEY})")
    done = keep_log(session_factory, SIGNER, "UTC", wait=False)
    assert done.sealed > 0
    result = verify(session_factory)
    assert result.ok and set(result.unsealed.values()) == {0}, result
    with engine.connect() as conn:  # the round let go of the lock
        assert conn.exec_driver_sql(f"SELECT pg_try_advisory_lock({UPKEEP_LOCK_KEY})").scalar()
        conn.exec_driver_sql(f"SELECT pg_advisory_unlock({UPKEEP_LOCK_KEY})")
