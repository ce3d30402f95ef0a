"""Safe repeats: activate, rollback and shadow on/off with the state the caller expects.

A repeat of a request that was carried out (a double click, a client retrying after a lost
answer) gets the same answer and changes nothing; a request whose expectation is stale is a
409 ``current_changed`` that names the current state; ``expected_current`` is required (422
without it; the CLI's ``--expect-current``). Over HTTP, and through the CLI on the database
and over HTTP. Each event records the expectation its request carried.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient

from service.cli import policy_backends
from service.cli.main import main
from tests.helpers import bearer, make_policy

P = "/v1/policies/readmission"


def _switches(client: TestClient, token: str) -> list[tuple[str, int | None, int | None]]:
    events = client.get(f"{P}/history", headers=bearer(token)).json()
    return [
        (e["action"], e["from_version"], e["to_version"])
        for e in events
        if e["action"] in ("activate", "rollback", "shadow", "unshadow")
    ]


def test_activate_repeat_and_stale(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    admin = bearer(tokens["admin"])
    publish()
    publish(activate=False)
    first = client.post(f"{P}/activate", json={"version": 2, "expected_current": 1}, headers=admin)
    assert first.status_code == 200 and first.json()["status"] == "active"
    again = client.post(f"{P}/activate", json={"version": 2, "expected_current": 1}, headers=admin)
    assert again.status_code == 200 and again.json() == first.json()
    assert _switches(client, tokens["admin"]) == [("activate", None, 1), ("activate", 1, 2)]

    publish(activate=False)  # v3, approved
    stale = client.post(f"{P}/activate", json={"version": 3, "expected_current": 1}, headers=admin)
    assert stale.status_code == 409
    error = stale.json()["error"]
    assert error["code"] == "current_changed" and error["field"] == "expected_current"
    state = {d["code"]: d for d in error["details"]}
    assert state["active_version"]["value"] == 2
    assert state["shadow_version"]["value"] is None
    assert state["last_change"]["value"]["to_version"] == 2
    assert "v2 is" in error["message"]
    # Without expected_current nothing is done: it is required.
    missing = client.post(f"{P}/activate", json={"version": 3}, headers=admin)
    assert missing.status_code == 422 and missing.json()["error"]["field"] == "expected_current"
    ok = client.post(f"{P}/activate", json={"version": 3, "expected_current": 2}, headers=admin)
    assert ok.status_code == 200
    assert _switches(client, tokens["admin"])[-1] == ("activate", 2, 3)
    events = client.get(f"{P}/history", headers=admin).json()
    assert [(e["expected_sent"], e["expected_current"]) for e in events[-1:]] == [(True, 2)]
    assert all(not e["expected_sent"] for e in events if e["action"] in ("submit", "approve"))


def test_first_activation_expecting_none(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    admin = bearer(tokens["admin"])
    publish(activate=False)
    body = {"version": 1, "expected_current": None}
    assert client.post(f"{P}/activate", json=body, headers=admin).status_code == 200
    assert client.post(f"{P}/activate", json=body, headers=admin).status_code == 200
    assert _switches(client, tokens["admin"]) == [("activate", None, 1)]
    last = client.get(f"{P}/history", headers=admin).json()[-1]
    assert (last["action"], last["expected_sent"], last["expected_current"]) == (
        "activate",
        True,
        None,
    )


def test_rollback_double_click_changes_once(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    admin = bearer(tokens["admin"])
    for _ in range(3):
        publish()
    body = {"reason": "v3 offers too few visits", "expected_current": 3}
    first = client.post(f"{P}/rollback", json=body, headers=admin)
    again = client.post(f"{P}/rollback", json=body, headers=admin)
    assert first.status_code == again.status_code == 200
    assert first.json()["version"] == again.json()["version"] == 2
    assert _switches(client, tokens["admin"])[-1] == ("rollback", 3, 2)
    assert [a for a, _, _ in _switches(client, tokens["admin"])].count("rollback") == 1
    # Expecting a version that is not active and did not just roll back: stale.
    stale = client.post(f"{P}/rollback", json={**body, "expected_current": 1}, headers=admin)
    assert stale.status_code == 409 and stale.json()["error"]["code"] == "current_changed"
    # Without expected_current a second click would act again: it is required.
    legacy = client.post(f"{P}/rollback", json={"reason": "again"}, headers=admin)
    assert legacy.status_code == 422
    assert _switches(client, tokens["admin"])[-1] == ("rollback", 3, 2)


def test_shadow_on_and_off_repeat_and_stale(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    admin = bearer(tokens["admin"])
    publish()
    publish(activate=False)
    publish(activate=False)
    on = {"version": 2, "expected_current": None}
    first = client.put(f"{P}/shadow", json=on, headers=admin)
    again = client.put(f"{P}/shadow", json=on, headers=admin)
    assert first.status_code == again.status_code == 200
    assert again.json() == first.json()
    stale = client.put(f"{P}/shadow", json={"version": 3, "expected_current": None}, headers=admin)
    assert stale.status_code == 409
    assert {d["code"]: d["value"] for d in stale.json()["error"]["details"]}["shadow_version"] == 2
    # Expecting the shadow it already is: refused, the version is the shadow already.
    same = client.put(f"{P}/shadow", json={"version": 2, "expected_current": 2}, headers=admin)
    assert same.status_code == 409 and same.json()["error"]["code"] == "invalid_transition"
    assert client.put(f"{P}/shadow", json={"version": 3}, headers=admin).status_code == 422

    wrong = client.delete(f"{P}/shadow", params={"expected_current": 3}, headers=admin)
    assert wrong.status_code == 409 and wrong.json()["error"]["code"] == "current_changed"
    off = client.delete(f"{P}/shadow", params={"expected_current": 2}, headers=admin)
    off_again = client.delete(f"{P}/shadow", params={"expected_current": 2}, headers=admin)
    assert off.status_code == off_again.status_code == 204
    assert client.delete(f"{P}/shadow", headers=admin).status_code == 422
    assert _switches(client, tokens["admin"])[1:] == [("shadow", None, 2), ("unshadow", 2, None)]


# -- the CLI -------------------------------------------------------------------------------


@pytest.fixture
def cli_env(monkeypatch: pytest.MonkeyPatch, database_url: str, engine: object) -> str:
    monkeypatch.setenv("EVENHAND_DATABASE_URL", database_url)
    monkeypatch.delenv("EVENHAND_URL", raising=False)
    monkeypatch.delenv("EVENHAND_TOKEN", raising=False)
    return database_url


def _cli(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out.strip(), err.strip()


@pytest.fixture
def over_http(
    client: TestClient, monkeypatch: pytest.MonkeyPatch, cli_env: str
) -> Iterator[tuple[str, ...]]:
    """``--url`` arguments whose requests go to the test app (no server process)."""

    def connect(self: Any, url: str, token: str) -> None:
        self._client = TestClient(client.app, headers={"Authorization": f"Bearer {token}"})

    monkeypatch.setattr(policy_backends.HttpBackend, "__init__", connect)
    yield ("--url", "http://testserver")


def _published(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> dict[str, str]:
    """v1 and v2 activated in turn, v3 and v4 approved; admins ana and ben. Returns the
    --token-file arguments' paths of each admin."""
    files = {}
    for name in ("ana", "ben"):
        out = _cli(capsys, "keys", "create", "--role", "admin", "--name", name)[1]
        files[name] = tmp_path / f"{name}.token"
        files[name].write_text(out.splitlines()[-1] + "\n")
    ana, ben = ("--token-file", str(files["ana"])), ("--token-file", str(files["ben"]))
    doc = tmp_path / "policy.json"
    doc.write_text(json.dumps(make_policy()))
    for v in (1, 2, 3, 4):
        assert _cli(capsys, "policy", "submit", str(doc), *ana)[0] == 0
        assert _cli(capsys, "policy", "approve", "readmission", str(v), *ben)[0] == 0
    for v in (1, 2):
        expect = ("--expect-current", "none" if v == 1 else str(v - 1))
        assert _cli(capsys, "policy", "activate", "readmission", str(v), *ana, *expect)[0] == 0
    return {name: str(path) for name, path in files.items()}


def test_cli_expect_current_on_the_database(
    cli_env: str, capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    ana = ("--token-file", _published(capsys, tmp_path)["ana"])
    rollback = ("policy", "rollback", "readmission", "--reason", "undo", *ana)
    for _ in range(2):
        code, out, _ = _cli(capsys, *rollback, "--expect-current", "2")
        assert (code, out) == (0, "readmission v1: active (by ana, approved by ben)")
    activate = ("policy", "activate", "readmission", "3", *ana)
    code, _, err = _cli(capsys, *activate, "--expect-current", "2")
    assert code == 2 and "current_changed" in err and "v1 is" in err
    for _ in range(2):
        assert _cli(capsys, *activate, "--expect-current", "1")[0] == 0
    shadow = ("policy", "shadow", "readmission", "4", *ana)
    for _ in range(2):
        code, out, _ = _cli(capsys, *shadow, "--expect-current", "none")
        assert (code, out) == (0, "readmission: v4 is the shadow")
    clear = ("policy", "shadow", "readmission", "--clear", *ana)
    for _ in range(2):
        assert _cli(capsys, *clear, "--expect-current", "4")[0] == 0
    code, out, _ = _cli(capsys, "policy", "history", "readmission")
    assert [line.split()[1] for line in out.splitlines()].count("rollback") == 1
    assert [line.split()[1] for line in out.splitlines()].count("unshadow") == 1
    with pytest.raises(SystemExit) as exited:
        main([*rollback, "--expect-current", "v2"])
    assert exited.value.code == 2 and "version number or 'none'" in capsys.readouterr().err
    # --expect-current is required on activate, rollback and shadow (on and off).
    for argv in (rollback, activate, shadow, clear):
        with pytest.raises(SystemExit) as exited:
            main(list(argv))
        assert exited.value.code == 2
        assert "--expect-current" in capsys.readouterr().err


def test_cli_expect_current_over_http(
    over_http: tuple[str, ...],
    capsys: pytest.CaptureFixture[str],
    tmp_path: Path,
) -> None:
    files = _published(capsys, tmp_path)
    http = (*over_http, "--token-file", files["ana"])
    rollback = ("policy", "rollback", "readmission", "--reason", "undo", *http)
    for _ in range(2):
        code, out, _ = _cli(capsys, *rollback, "--expect-current", "2")
        assert (code, out) == (0, "readmission v1: active (by ana, approved by ben)")
    code, _, err = _cli(capsys, *rollback, "--expect-current", "3")
    assert code == 2 and "current_changed" in err
    for _ in range(2):
        code, out, _ = _cli(
            capsys, "policy", "shadow", "readmission", "4", *http, "--expect-current", "none"
        )
        assert (code, out) == (0, "readmission: v4 is the shadow")
    clear = ("policy", "shadow", "readmission", "--clear", *http)
    for _ in range(2):
        assert _cli(capsys, *clear, "--expect-current", "4")[0] == 0
    code, out, _ = _cli(capsys, "policy", "history", "readmission", *http)
    assert [line.split()[1] for line in out.splitlines()].count("unshadow") == 1
