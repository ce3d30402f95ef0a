"""The keys, migrate, policy and serve commands, on the database and over HTTP."""

from __future__ import annotations

import hashlib
import json
import os
import socket
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest
from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from service.cli.main import main
from service.store.models import ApiKey
from tests.helpers import TEST_SECRET, make_policy


@pytest.fixture
def cli_env(monkeypatch: pytest.MonkeyPatch, database_url: str, engine: object) -> str:
    monkeypatch.setenv("EVENHAND_DATABASE_URL", database_url)
    monkeypatch.setenv("EVENHAND_DRAW_SECRET", TEST_SECRET)
    monkeypatch.delenv("EVENHAND_URL", raising=False)
    monkeypatch.delenv("EVENHAND_TOKEN", raising=False)
    return database_url


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_keys_create_shows_token_once_and_stores_its_hash(
    cli_env: str, capsys: pytest.CaptureFixture[str], session_factory: sessionmaker[Session]
) -> None:
    code, out, _ = run(capsys, "keys", "create", "--role", "admin", "--name", "ops")
    assert code == 0
    token = out.strip().splitlines()[-1]
    assert token.startswith("eh_") and " " not in token
    with session_factory() as session:
        key = session.scalars(select(ApiKey)).one()
    assert key.token_hash == hashlib.sha256(token.encode()).hexdigest()
    assert token not in key.token_hash
    code, _, err = run(capsys, "keys", "create", "--role", "admin", "--name", "ops")
    assert code == 2 and "already exists" in err
    assert run(capsys, "keys", "revoke", "--name", "ops")[0] == 0
    code, out, _ = run(capsys, "keys", "list")
    assert "ops\tadmin\trevoked" in out
    assert run(capsys, "keys", "revoke", "--name", "nobody")[0] == 2


def test_policy_lifecycle_directly_on_the_database(
    cli_env: str, capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    run(capsys, "keys", "create", "--role", "admin", "--name", "ana")
    run(capsys, "keys", "create", "--role", "admin", "--name", "ben")
    run(capsys, "keys", "create", "--role", "scoring", "--name", "svc")
    doc = tmp_path / "policy.json"
    doc.write_text(json.dumps(make_policy()))
    assert run(capsys, "policy", "submit", str(doc))[0] == 2  # no --actor
    code, _, err = run(capsys, "policy", "submit", str(doc), "--actor", "svc")
    assert code == 2 and "not a live admin key" in err
    code, out, _ = run(capsys, "policy", "submit", str(doc), "--actor", "ana")
    assert (code, out.strip()) == (0, "readmission v1: draft (by ana)")
    code, _, err = run(capsys, "policy", "approve", "readmission", "1", "--actor", "ana")
    assert code == 2 and "four_eyes" in err
    assert run(capsys, "policy", "approve", "readmission", "1", "--actor", "ben")[0] == 0
    assert run(capsys, "policy", "activate", "readmission", "1", "--actor", "ana")[0] == 0
    doc.write_text(json.dumps(make_policy(action_label="offer a nurse visit")))
    run(capsys, "policy", "submit", str(doc), "--actor", "ben")
    run(capsys, "policy", "approve", "readmission", "2", "--actor", "ana")
    run(capsys, "policy", "activate", "readmission", "2", "--actor", "ben")
    code, out, _ = run(
        capsys, "policy", "rollback", "readmission", "--reason", "label", "--actor", "ana"
    )
    assert (code, out.strip()) == (0, "readmission v1: active (by ana, approved by ben)")
    code, out, _ = run(capsys, "policy", "history", "readmission")
    assert code == 0
    assert "rollback  by ana v2 -> v1: label" in out
    code, out, _ = run(capsys, "policy", "diff", "readmission", "1", "2")
    assert "action label changed from 'offer follow-up' to 'offer a nurse visit'" in out
    code, out, _ = run(capsys, "policy", "show", "readmission")
    assert out.splitlines() == [
        "readmission v1: active (by ana, approved by ben)",
        "readmission v2: retired (by ben, approved by ana)",
    ]
    code, out, _ = run(capsys, "policy", "show", "readmission", "2")
    assert '"action_label": "offer a nurse visit"' in out
    assert run(capsys, "policy", "show", "nothing")[0] == 2


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def test_serve_and_policy_cli_over_http(
    capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    # A real `evenhand serve` process on its own SQLite file (one backend is enough here).
    monkeypatch.setenv("EVENHAND_DATABASE_URL", f"sqlite:///{tmp_path}/served.db")
    monkeypatch.setenv("EVENHAND_DRAW_SECRET", TEST_SECRET)
    assert run(capsys, "migrate")[0] == 0
    tokens = {}
    for name in ("ana", "ben"):
        out = run(capsys, "keys", "create", "--role", "admin", "--name", name)[1]
        tokens[name] = out.strip().splitlines()[-1]
    port = _free_port()
    env = {**os.environ}
    proc = subprocess.Popen(
        [sys.executable, "-m", "service.cli.main", "serve", "--port", str(port)],
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
    )
    base = f"http://127.0.0.1:{port}"
    try:
        for _ in range(100):
            try:
                if httpx.get(f"{base}/readyz").status_code == 200:
                    break
            except httpx.HTTPError:
                time.sleep(0.1)
        assert httpx.get(f"{base}/healthz").json() == {"status": "ok"}
        doc = tmp_path / "p.json"
        doc.write_text(json.dumps(make_policy()))
        http = ("--url", base)
        code, out, _ = run(capsys, "policy", "submit", str(doc), *http, "--token", tokens["ana"])
        assert (code, out.strip()) == (0, "readmission v1: draft (by ana)")
        code, _, err = run(
            capsys, "policy", "approve", "readmission", "1", *http, "--token", tokens["ana"]
        )
        assert code == 2 and "four_eyes" in err
        code, _, _ = run(
            capsys, "policy", "approve", "readmission", "1", *http, "--token", tokens["ben"]
        )
        assert code == 0
        code, out, _ = run(capsys, "policy", "show", "readmission", *http, "--token", tokens["ben"])
        assert out.strip() == "readmission v1: approved (by ana, approved by ben)"
        code, _, err = run(capsys, "policy", "show", "readmission", *http, "--token", "eh_wrong")
        assert code == 2 and "unauthorized" in err
    finally:
        proc.terminate()
        proc.wait(timeout=10)


def test_serve_refuses_without_secret(
    cli_env: str, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.delenv("EVENHAND_DRAW_SECRET")
    code, _, err = run(capsys, "serve")
    assert code == 2 and "EVENHAND_DRAW_SECRET is not set" in err


def test_migrate_and_serve_refuses_an_unmigrated_database(
    capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    monkeypatch.setenv("EVENHAND_DATABASE_URL", f"sqlite:///{tmp_path}/fresh.db")
    monkeypatch.setenv("EVENHAND_DRAW_SECRET", TEST_SECRET)
    code, _, err = run(capsys, "serve")
    assert code == 2 and "evenhand migrate" in err
    assert run(capsys, "migrate")[0] == 0
    assert run(capsys, "migrate")[0] == 0  # idempotent
