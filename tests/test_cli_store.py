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
from service.store.models import ApiKey, KeyEvent
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
        (created,) = session.scalars(select(KeyEvent)).all()
    assert key.token_hash == hashlib.sha256(token.encode()).hexdigest()
    assert token not in key.token_hash
    assert (created.key_id, created.action, created.by_key_id) == (key.id, "create", None)
    assert created.by.startswith("operator:")
    code, _, err = run(capsys, "keys", "create", "--role", "admin", "--name", "ops")
    assert code == 2 and "already exists" in err
    code, _, err = run(capsys, "keys", "create", "--role", "admin", "--name", "two words")
    assert code == 2 and "key name" in err
    with pytest.raises(SystemExit):  # a reason is required
        main(["keys", "revoke", "ops"])
    capsys.readouterr()
    code, out, _ = run(capsys, "keys", "revoke", "ops", "--reason", "left the team")
    assert code == 0 and "revoked admin key 'ops'" in out
    assert "no live admin key is left" in out  # the operator may; the API may not
    again = run(capsys, "keys", "revoke", "ops", "--reason", "twice")
    assert again[0] == 0  # a repeat: nothing new recorded
    code, out, _ = run(capsys, "keys", "list")
    assert out.startswith("ops\tadmin\trevoked\tcreated ")
    assert "by operator:" in out and ": left the team" in out and "twice" not in out
    with session_factory() as session:
        actions = [e.action for e in session.scalars(select(KeyEvent).order_by(KeyEvent.id))]
    assert actions == ["create", "revoke"]
    assert run(capsys, "keys", "revoke", "nobody", "--reason", "x")[0] == 2


def _token_file(tmp_path: Path, out: str, name: str) -> tuple[str, str]:
    """``--token-file PATH`` for the token printed on the last line of ``keys create``."""
    path = tmp_path / f"{name}.token"
    path.write_text(out.strip().splitlines()[-1] + "\n")
    return "--token-file", str(path)


def test_policy_lifecycle_directly_on_the_database(
    cli_env: str,
    capsys: pytest.CaptureFixture[str],
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    ana = _token_file(
        tmp_path, run(capsys, "keys", "create", "--role", "admin", "--name", "ana")[1], "ana"
    )
    ben = _token_file(
        tmp_path, run(capsys, "keys", "create", "--role", "admin", "--name", "ben")[1], "ben"
    )
    svc = _token_file(
        tmp_path, run(capsys, "keys", "create", "--role", "scoring", "--name", "svc")[1], "svc"
    )
    doc = tmp_path / "policy.json"
    doc.write_text(json.dumps(make_policy()))
    code, _, err = run(capsys, "policy", "submit", str(doc))  # no token
    assert code == 2 and "--token-file" in err and "EVENHAND_TOKEN" in err
    code, _, err = run(capsys, "policy", "submit", str(doc), *svc)
    assert code == 2 and "forbidden" in err
    code, out, _ = run(capsys, "policy", "submit", str(doc), *ana)
    assert (code, out.strip()) == (0, "readmission v1: draft (by ana)")
    code, _, err = run(capsys, "policy", "approve", "readmission", "1", *ana)
    assert code == 2 and "four_eyes" in err
    # The token, not a name, is the identity: the same key through the environment too.
    monkeypatch.setenv("EVENHAND_TOKEN", Path(ana[1]).read_text().strip())
    code, _, err = run(capsys, "policy", "approve", "readmission", "1")
    assert code == 2 and "four_eyes" in err
    monkeypatch.delenv("EVENHAND_TOKEN")
    assert run(capsys, "policy", "approve", "readmission", "1", *ben)[0] == 0
    activate = ("policy", "activate", "readmission", "1", *ana, "--expect-current", "none")
    assert run(capsys, *activate)[0] == 0
    doc.write_text(json.dumps(make_policy(action_label="offer a nurse visit")))
    run(capsys, "policy", "submit", str(doc), *ben)
    run(capsys, "policy", "approve", "readmission", "2", *ana)
    run(capsys, "policy", "activate", "readmission", "2", *ben, "--expect-current", "1")
    code, out, _ = run(
        capsys,
        "policy",
        "rollback",
        "readmission",
        "--reason",
        "label",
        *ana,
        "--expect-current",
        "2",
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
    # A revoked key can no longer act.
    run(capsys, "keys", "revoke", "ben", "--reason", "rotated")
    code, _, err = run(capsys, "policy", "submit", str(doc), *ben)
    assert code == 2 and "unauthorized" in err


def test_no_actor_or_token_on_the_command_line(
    cli_env: str, capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    """One operator cannot approve their own draft under a second name: there is no name
    to give. ``--actor`` and ``--token`` are gone (argparse refuses them: exit 2)."""
    ana = _token_file(
        tmp_path, run(capsys, "keys", "create", "--role", "admin", "--name", "ana")[1], "ana"
    )
    run(capsys, "keys", "create", "--role", "admin", "--name", "ben")
    doc = tmp_path / "policy.json"
    doc.write_text(json.dumps(make_policy()))
    assert run(capsys, "policy", "submit", str(doc), *ana)[0] == 0
    token = Path(ana[1]).read_text().strip()
    for extra in (("--actor", "ben"), ("--token", token)):
        with pytest.raises(SystemExit) as exited:
            main(["policy", "approve", "readmission", "1", *ana, *extra])
        assert exited.value.code == 2
        assert "unrecognized arguments" in capsys.readouterr().err
    code, _, err = run(capsys, "policy", "approve", "readmission", "1", *ana)
    assert code == 2 and "four_eyes" in err
    empty = tmp_path / "empty.token"
    empty.write_text("\n")
    code, _, err = run(capsys, "policy", "approve", "readmission", "1", "--token-file", str(empty))
    assert code == 2 and "must hold the token alone" in err
    code, _, err = run(capsys, "policy", "approve", "readmission", "1", "--token-file", "/nope")
    assert code == 2 and "cannot read --token-file" in err
    code, _, err = run(capsys, "policy", "approve", "readmission", "1", "--token-file", token)
    assert code == 2 and "never the token itself" in err and token not in err


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
        tokens[name] = _token_file(tmp_path, out, name)
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
        code, out, _ = run(capsys, "policy", "submit", str(doc), *http, *tokens["ana"])
        assert (code, out.strip()) == (0, "readmission v1: draft (by ana)")
        code, _, err = run(capsys, "policy", "approve", "readmission", "1", *http, *tokens["ana"])
        assert code == 2 and "four_eyes" in err
        code, _, _ = run(capsys, "policy", "approve", "readmission", "1", *http, *tokens["ben"])
        assert code == 0
        code, out, _ = run(capsys, "policy", "show", "readmission", *http, *tokens["ben"])
        assert out.strip() == "readmission v1: approved (by ana, approved by ben)"
        wrong = tmp_path / "wrong.token"
        wrong.write_text("eh_wrong\n")
        code, _, err = run(
            capsys, "policy", "show", "readmission", *http, "--token-file", str(wrong)
        )
        assert code == 2 and "unauthorized" in err
        code, _, err = run(capsys, "policy", "show", "readmission", *http)
        assert code == 2 and "--token-file" in err
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
