"""The log over HTTP (keys, heads, verify, proofs), from the CLI, and the server's periodic
sealer. Proof paths are checked against the tree recomputed by ``tests/test_log_seal.py``'s
RFC 9162 functions."""

from __future__ import annotations

import asyncio
import json
import os
import stat
from collections.abc import Callable
from pathlib import Path

import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey
from fastapi.testclient import TestClient
from pydantic import SecretStr
from sqlalchemy import Engine
from sqlalchemy.orm import Session, sessionmaker

from service.cli.main import main
from service.settings import Settings
from service.store.periodic_sealer import PeriodicSealer
from tests.helpers import bearer, make_request
from tests.log_helpers import SIGNER, scalar, seal, tamper, write_every_kind
from tests.test_log_seal import _h, _head_bytes, _verify_consistency, _verify_inclusion


def test_keys_heads_verify_and_proofs_over_http(
    client: TestClient,
    engine: Engine,
    make_key: Callable[..., str],
    session_factory: sessionmaker[Session],
) -> None:
    recs = write_every_kind(client, make_key).recommendation_ids
    audit, scoring = bearer(make_key("audit")), bearer(make_key("scoring"))
    seal(session_factory)
    client.post("/v1/recommendations", json=make_request(case_id="more"), headers=scoring)
    seal(session_factory)

    keys = client.get("/v1/log/keys").json()  # public: anyone may check a head
    assert [k["key_id"] for k in keys] == [SIGNER.key_id]
    public = Ed25519PublicKey.from_public_bytes(bytes.fromhex(keys[0]["public_key"]))
    heads = client.get("/v1/log/heads", headers=audit).json()
    assert [h["head"]["seal_id"] for h in heads] == list(range(1, len(heads) + 1))
    for h in heads:
        public.verify(bytes.fromhex(h["signature"]), _head_bytes(h["head"]))

    body = client.get("/v1/log/verify", headers=audit).json()
    assert body["ok"] is True and body["problem"] is None and body["head"] == heads[-1]
    assert set(body["unsealed"].values()) == {0}, body["unsealed"]

    r = client.get("/v1/log/proofs/inclusion", params={"recommendation_id": recs[2]}, headers=audit)
    assert r.status_code == 200, r.text
    proof = r.json()
    assert json.loads(proof["record"])["recommendation_id"] == recs[2]
    leaf = _h(b"\x00" + proof["record"].encode("utf-8"))
    assert proof["leaf_hash"] == leaf.hex()
    head = proof["head"]["head"]
    assert _verify_inclusion(
        proof["leaf_index"],
        head["tree_size"],
        leaf,
        [bytes.fromhex(p) for p in proof["path"]],
        bytes.fromhex(head["root"]),
    )
    r = client.get(
        "/v1/log/proofs/consistency", params={"first": 1, "second": len(heads)}, headers=audit
    )
    assert r.status_code == 200, r.text
    c = r.json()
    assert _verify_consistency(
        c["first"]["head"]["tree_size"],
        c["second"]["head"]["tree_size"],
        bytes.fromhex(c["first"]["head"]["root"]),
        bytes.fromhex(c["second"]["head"]["root"]),
        [bytes.fromhex(p) for p in c["path"]],
    )

    # Refusals: unknown record, unknown seal, both ids, a seal order backwards.
    for params, status in (
        ({"recommendation_id": "00000000-0000-0000-0000-000000000000"}, 404),
        ({"recommendation_id": "not-a-uuid"}, 404),
        ({"kind": "outcome", "id": 10**9}, 404),
        ({"kind": "nothing", "id": 1}, 422),
        ({"id": 1, "recommendation_id": recs[0]}, 422),
        ({"id": 1, "seal": 10**6}, 404),
    ):
        r = client.get("/v1/log/proofs/inclusion", params=params, headers=audit)
        assert r.status_code == status, (params, r.text)
        assert "error" in r.json()
    r = client.get("/v1/log/proofs/consistency", params={"first": 2, "second": 1}, headers=audit)
    assert r.status_code == 422

    target = int(scalar(engine, "SELECT max(id) FROM outcome_records"))
    tamper(engine, "UPDATE outcome_records SET outcome = 1 - outcome WHERE id = :id", id=target)
    body = client.get("/v1/log/verify", headers=audit).json()
    assert body["ok"] is False
    assert (body["problem"]["kind"], body["problem"]["id"]) == ("outcome", target)


@pytest.mark.parametrize("role", ["scoring", "admin"])
def test_the_log_is_for_the_audit_role(
    client: TestClient, make_key: Callable[..., str], role: str
) -> None:
    for path in ("/v1/log/verify", "/v1/log/heads", "/v1/log/proofs/consistency"):
        response = client.get(path, headers=bearer(make_key(role)))
        assert response.status_code == 403
        assert response.json()["error"]["code"] == "forbidden"
        assert client.get(path).status_code == 401


def test_cli_keygen_seal_verify_heads_and_proofs(
    client: TestClient,
    engine: Engine,
    database_url: str,
    make_key: Callable[..., str],
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
    tmp_path: Path,
) -> None:
    monkeypatch.setenv("EVENHAND_DATABASE_URL", database_url)
    key_file = tmp_path / "signing.key"
    assert main(["log", "keygen", "--out", str(key_file)]) == 0
    assert stat.S_IMODE(os.stat(key_file).st_mode) == 0o600
    assert main(["log", "keygen", "--out", str(key_file)]) == 2  # never overwritten
    assert "never overwritten" in capsys.readouterr().err
    monkeypatch.delenv("EVENHAND_SIGNING_KEY", raising=False)
    monkeypatch.setenv("EVENHAND_SIGNING_KEY_FILE", str(key_file))
    mirror = tmp_path / "heads.jsonl"
    monkeypatch.setenv("EVENHAND_HEAD_MIRROR", str(mirror))

    write_every_kind(client, make_key, cases=4)
    capsys.readouterr()
    assert main(["log", "seal", "--tally-now"]) == 0
    out = capsys.readouterr().out
    assert "seal 1:" in out and "decision 4" in out
    assert main(["log", "seal"]) == 0
    assert "nothing to seal" in capsys.readouterr().out
    assert main(["log", "verify", "--heads", str(mirror)]) == 0
    assert "ok:" in capsys.readouterr().out
    assert main(["log", "heads"]) == 0
    printed = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert printed == [json.loads(line) for line in mirror.read_text().splitlines()]

    assert main(["log", "proof", "inclusion", "--kind", "policy_event", "--id", "1"]) == 0
    proof = json.loads(capsys.readouterr().out)
    assert json.loads(proof["record"])["kind"] == "policy_event"
    assert main(["log", "proof", "consistency", "1", "1"]) == 0
    assert json.loads(capsys.readouterr().out)["path"] == []
    assert main(["log", "proof", "inclusion", "--id", "999999"]) == 2
    assert "not_sealed" in capsys.readouterr().err

    tamper(engine, "DELETE FROM seals WHERE id = (SELECT max(id) FROM seals)")
    assert main(["log", "verify", "--heads", str(mirror), "--json"]) == 1
    result = json.loads(capsys.readouterr().out)
    assert result["ok"] is False and "cut back" in result["problem"]["reason"]
    assert main(["log", "verify", "--heads", str(tmp_path / "missing.jsonl")]) == 2
    assert "missing.jsonl" in capsys.readouterr().err

    # Without any trusted key the CLI refuses rather than trusting the database's.
    monkeypatch.delenv("EVENHAND_SIGNING_KEY_FILE")
    assert main(["log", "verify"]) == 2
    assert "no trusted public key" in capsys.readouterr().err


def test_seal_and_verify_draw_progress_only_on_a_terminal(
    client: TestClient,
    database_url: str,
    make_key: Callable[..., str],
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    monkeypatch.setenv("EVENHAND_DATABASE_URL", database_url)
    monkeypatch.delenv("EVENHAND_PROGRESS", raising=False)
    write_every_kind(client, make_key, cases=3)
    capsys.readouterr()
    assert main(["log", "seal", "--tally-now"]) == 0
    assert main(["log", "verify"]) == 0
    captured = capsys.readouterr()
    assert "ok:" in captured.out
    assert captured.err == ""  # stderr is not a terminal here: no bar, no step lines

    monkeypatch.setenv("EVENHAND_PROGRESS", "1")  # as on a terminal
    scoring = bearer(make_key("scoring"))
    client.post("/v1/recommendations", json=make_request(case_id="one-more"), headers=scoring)
    assert main(["log", "seal"]) == 0
    err = capsys.readouterr().err
    assert "sealing: " in err and " step(s) [" in err
    assert main(["log", "verify"]) == 0
    err = capsys.readouterr().err
    assert "verifying: " in err and " step(s) [" in err  # tqdm draws the last message it had


def test_the_server_refuses_to_start_without_a_signing_key(settings: Settings) -> None:
    from service.app import create_app
    from service.log.heads import SigningKeyError

    keyless = settings.model_copy(update={"signing_key": None, "signing_key_file": None})
    with (
        pytest.raises(SigningKeyError, match="no signing key"),
        TestClient(create_app(keyless)),
    ):
        pass
    for weak in ("00" * 32, "abc"):
        weak_key = settings.model_copy(update={"signing_key": SecretStr(weak)})
        with pytest.raises(SigningKeyError), TestClient(create_app(weak_key)):
            pass


def test_periodic_sealer_seals_new_records_and_stops(
    client: TestClient, make_key: Callable[..., str], session_factory: sessionmaker[Session]
) -> None:
    write_every_kind(client, make_key, cases=4)
    scoring = bearer(make_key("scoring"))

    def unsealed() -> int:
        from tests.log_helpers import verify

        return verify(session_factory).unsealed_records

    async def scenario() -> int:
        sealer = PeriodicSealer(session_factory, SIGNER, "UTC", interval_seconds=0.02)
        sealer.start()
        for _ in range(500):  # bounded wait: the sealer runs in a worker thread
            if unsealed() == 0:
                break
            await asyncio.sleep(0.01)
        client.post("/v1/recommendations", json=make_request(case_id="n"), headers=scoring)
        for _ in range(500):
            if unsealed() == 0:
                break
            await asyncio.sleep(0.01)
        await sealer.stop()
        return unsealed()

    assert asyncio.run(scenario()) == 0
