"""Month bundles: exported through the CLI from a month written through the routes, checked by
the standalone verifier; every kind of tampering with the file is found and named, and the
verifier runs in a bare interpreter with the standard library and ``cryptography`` only.

The Merkle checks are the RFC 9162 algorithms (section 2.1), already checked against the
Certificate Transparency test vectors in ``tests/test_merkle.py``; here the bundle's heads are
also recomputed independently, with ``tests/test_log_seal.py``'s own implementation of the RFC.
"""

from __future__ import annotations

import hashlib
import io
import json
import random
import subprocess
import sys
import sysconfig
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path

import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey
from fastapi.testclient import TestClient
from sqlalchemy.orm import Session, sessionmaker

from service.audit.month import Month
from service.cli.main import main
from service.errors import Unprocessable
from service.log.bundle_format import encode_line
from service.log.bundle_verify import Result, verify_bundle
from service.store.audit_models import LogPurge
from service.store.bundle_export import export_month
from service.store.db import begin_read_only
from tests.audit_helpers import POLICY
from tests.helpers import bearer, make_request
from tests.log_helpers import SIGNER, seal, write_every_kind
from tests.test_log_seal import _h, _head_bytes, _verify_consistency

ROOT = Path(__file__).resolve().parents[1]


def _month() -> str:
    return datetime.now(UTC).strftime("%Y-%m")


def _export(factory: sessionmaker[Session]) -> bytes:
    out = io.BytesIO()
    with factory() as session:
        begin_read_only(session)
        export_month(session, POLICY, Month.parse(_month()), out)
        session.rollback()
    return out.getvalue()


def _check(data: bytes) -> Result:
    return verify_bundle(io.BytesIO(data))


@pytest.fixture
def bundle(
    client: TestClient, make_key: Callable[..., str], session_factory: sessionmaker[Session]
) -> bytes:
    write_every_kind(client, make_key)
    seal(session_factory)
    # A second audit of the month: the bundle holds the latest snapshot; the first one and
    # the tally batch are leaves of the tree the bundle gives only as subtree roots.
    r = client.post(
        "/v1/audits",
        json={"policy": POLICY, "month": _month(), "provisional": True},
        headers=bearer(make_key("audit")),
    )
    assert r.status_code == 201, r.text
    seal(session_factory)
    # Later work on the log: the bundle's newest head extends the snapshot's seal.
    scoring = bearer(make_key("scoring"))
    r = client.post("/v1/recommendations", json=make_request(case_id="later"), headers=scoring)
    assert r.status_code == 201, r.text
    seal(session_factory)
    return _export(session_factory)


def _lines(data: bytes) -> list[dict[str, object]]:
    return [json.loads(line) for line in data.splitlines()]


def test_a_month_round_trips_and_recounts(bundle: bytes) -> None:
    result = _check(bundle)
    assert result.ok, result.problem
    lines = _lines(bundle)
    types = [line["type"] for line in lines]
    assert types[0] == "header" and types[-1] == "manifest"
    assert types[-3:-1] == ["view", "view"] and "latest" in types
    kinds = {str(line["kind"]) for line in lines if line["type"] == "record"}
    assert kinds >= {"decision", "outcome", "final", "snapshot", "policy_version"}
    # 12 decisions of the policy in the month, plus the later one, which is not in the
    # snapshot's seal: the bundle holds the 12 the report counted.
    assert result.records["decision"] == 12
    assert result.records["outcome"] == 7  # six first reports and one correction
    assert result.records["final"] == 1
    # Independently of the verifier: every record's leaf is SHA-256(0x00 || bytes) (RFC 9162).
    for line in lines:
        if line["type"] == "record":
            assert line["leaf"] == _h(b"\x00" + str(line["data"]).encode()).hex()
    assert result.key_ids == [SIGNER.key_id]
    # The heads and the consistency proof, checked with this suite's own implementation of
    # RFC 9162 section 2.1.4.2 and Ed25519 from `cryptography` directly.
    public = Ed25519PublicKey.from_public_bytes(SIGNER.public_key)
    heads = [line for line in lines if line["type"] in ("head", "latest")]
    for h in heads:
        public.verify(bytes.fromhex(str(h["signature"])), _head_bytes(h["head"]))  # type: ignore[arg-type]
    last, newest = heads[-2]["head"], heads[-1]["head"]
    assert _verify_consistency(
        last["tree_size"],  # type: ignore[index]
        newest["tree_size"],  # type: ignore[index]
        bytes.fromhex(last["root"]),  # type: ignore[index]
        bytes.fromhex(newest["root"]),  # type: ignore[index]
        [bytes.fromhex(p) for p in heads[-1]["path"]],  # type: ignore[attr-defined]
    )


def test_the_cli_writes_the_bundle_and_the_standalone_verifier_accepts_it(
    bundle: bytes, tmp_path: Path, database_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("EVENHAND_DATABASE_URL", database_url)
    target = tmp_path / "month.ehb"
    assert (
        main(["log", "bundle", "--policy", POLICY, "--month", _month(), "--out", str(target)]) == 0
    )
    assert (
        main(["log", "bundle", "--policy", POLICY, "--month", _month(), "--out", str(target)]) == 2
    )
    run = _standalone(target)
    assert run.returncode == 0, run.stdout + run.stderr
    assert run.stdout.startswith(f"OK: {POLICY} {_month()}")


def test_a_month_without_a_snapshot_or_not_sealed_is_refused(
    client: TestClient,
    make_key: Callable[..., str],
    session_factory: sessionmaker[Session],
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    database_url: str,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.setenv("EVENHAND_DATABASE_URL", database_url)
    write_every_kind(client, make_key)
    target = tmp_path / "m.ehb"
    argv = ["log", "bundle", "--policy", POLICY, "--month", _month(), "--out", str(target)]
    assert main(argv) == 2
    assert "not sealed yet" in capsys.readouterr().err
    assert not target.exists()
    argv_other = [*argv[:5], "1999-01", *argv[6:]]
    assert main(argv_other) == 2
    assert "no report snapshot" in capsys.readouterr().err


def _standalone(path: Path, *extra: str) -> subprocess.CompletedProcess[str]:
    """The verifier in an isolated interpreter (``-I``: no user site, no PYTHONPATH, no
    environment settings), with only the service's source directory on the path."""
    code = (
        "import sys; sys.path.insert(0, sys.argv.pop(1)); "
        "from service.log.bundle_verify import main; sys.exit(main(sys.argv[1:]))"
    )
    return subprocess.run(
        [sys.executable, "-I", "-c", code, str(ROOT), str(path), *extra],
        capture_output=True,
        text=True,
        timeout=120,
        env={"PATH": "/usr/bin:/bin"},
    )


def test_the_verifier_imports_only_the_standard_library_and_cryptography() -> None:
    """Every module the verifier loads comes from the standard library, from the
    ``cryptography`` distribution, or from ``service/log`` (judged by where its file is)."""
    code = (
        "import sys, json; sys.path.insert(0, sys.argv[1]); before = set(sys.modules); "
        "import service.log.bundle_verify; "
        "print(json.dumps({n: getattr(sys.modules[n], '__file__', None) "
        "for n in sorted(set(sys.modules) - before)}))"
    )
    run = subprocess.run(
        [sys.executable, "-I", "-c", code, str(ROOT)], capture_output=True, text=True, check=True
    )
    loaded: dict[str, str | None] = json.loads(run.stdout)
    import cryptography

    allowed = [
        sysconfig.get_paths()["stdlib"],
        sysconfig.get_paths()["platstdlib"],
        str(Path(cryptography.__file__).parent),
        str(ROOT / "service" / "__init__.py"),
        str(ROOT / "service" / "log"),
    ]
    site = sysconfig.get_paths()["purelib"]
    foreign = {
        name: path
        for name, path in loaded.items()
        if path is not None
        and not any(path.startswith(prefix) for prefix in allowed)
        and not (path.startswith(site) and Path(path).name.startswith("_cffi_backend"))
    }
    assert foreign == {}, foreign
    ours = sorted(n for n in loaded if n.startswith("service"))
    assert all(n == "service" or n.startswith("service.log") for n in ours), ours


def _edit(data: bytes, index: int, change: Callable[[dict[str, object]], None]) -> bytes:
    lines = data.splitlines(keepends=True)
    value = json.loads(lines[index])
    change(value)
    lines[index] = encode_line(value)
    return b"".join(lines)


def _first(data: bytes, kind: str, record_kind: str | None = None) -> int:
    for i, line in enumerate(_lines(data)):
        if line["type"] == kind and (record_kind is None or line.get("kind") == record_kind):
            return i
    raise AssertionError(f"no {kind} line")


def _reseal(data: bytes) -> bytes:
    """The manifest recomputed over the (edited) lines: what a careful forger would do."""
    lines = data.splitlines(keepends=True)
    body = [line for line in lines if json.loads(line)["type"] != "manifest"]
    counts: dict[str, int] = {}
    records: dict[str, int] = {}
    for line in body:
        value = json.loads(line)
        counts[value["type"]] = counts.get(value["type"], 0) + 1
        if value["type"] == "record":
            records[value["kind"]] = records.get(value["kind"], 0) + 1
    counts["manifest"] = 1
    digest = hashlib.sha256(b"".join(body)).hexdigest()
    manifest = {"type": "manifest", "lines": counts, "records": records, "sha256": digest}
    return b"".join(body) + encode_line(manifest)


def _record_edit(field: str, value: object, rehash: bool) -> Callable[[dict[str, object]], None]:
    def change(line: dict[str, object]) -> None:
        record = json.loads(str(line["data"]))
        record[field] = value
        line["data"] = encode_line(record)[:-1].decode()
        if rehash:
            line["leaf"] = _h(b"\x00" + str(line["data"]).encode()).hex()

    return change


def _set(path: tuple[str, ...], value: object) -> Callable[[dict[str, object]], None]:
    def change(line: dict[str, object]) -> None:
        target: dict[str, object] = line
        for part in path[:-1]:
            target = target[part]  # type: ignore[assignment]
        target[path[-1]] = value

    return change


def _group_count(view: str) -> Callable[[dict[str, object]], None]:
    def change(line: dict[str, object]) -> None:
        content = line["content"]
        group = content["versions"][0]["groups"][0]  # type: ignore[index]
        group["counts"]["n"] = group["counts"]["n"] + 1 if view == "internal" else 999

    return change


_RECORD_EDITS = {
    "decision": ("score", 0.999),
    "outcome": ("source", "edited"),
    "final": ("overridden", False),
    "snapshot": ("created_by", "someone else"),
    "policy_version": ("author", "someone else"),
    "policy_event": ("reason", "edited"),
    "key_event": ("key_name", "edited"),
}


def _cases(data: bytes) -> dict[str, tuple[bytes, str | None]]:
    """Tampered copies of ``data`` and a text the verifier's message must contain (None: any)."""
    lines = data.splitlines(keepends=True)
    parsed = _lines(data)
    cases: dict[str, tuple[bytes, str | None]] = {}
    for kind, (field, value) in _RECORD_EDITS.items():
        i = _first(data, "record", kind)
        where = f"{kind} record at leaf {parsed[i]['index']}"
        cases[f"edit {kind}"] = (_edit(data, i, _record_edit(field, value, False)), where)
        # Leaf hash and manifest recomputed too: the head after it no longer verifies.
        edited = _reseal(_edit(data, i, _record_edit(field, value, True)))
        cases[f"edit {kind}, rehashed"] = (edited, "do not give the signed root")
    decision = _first(data, "record", "decision")
    rid = json.loads(str(parsed[decision]["data"]))["recommendation_id"]
    cases["edit decision names it"] = (
        _edit(data, decision, _record_edit("action", True, False)),
        str(rid),
    )
    head = _first(data, "head")
    cases["edit header"] = (_edit(data, 0, _set(("policy",), "other")), None)
    cases["edit key"] = (_edit(data, 1, _set(("public_key",), "00" * 32)), "key")
    cases["edit subtree"] = (_edit(data, _first(data, "subtree"), _set(("hash",), "11" * 32)), None)
    cases["edit head root"] = (_edit(data, head, _set(("head", "root"), "22" * 32)), "signature")
    cases["edit head size"] = (_edit(data, head, _set(("head", "tree_size"), 3)), None)
    other = Ed25519PrivateKey.generate()
    cases["wrong signature"] = (
        _edit(data, head, _set(("signature",), other.sign(b"x").hex())),
        "signature does not verify",
    )
    latest = _first(data, "latest")
    cases["edit latest proof"] = (
        _edit(data, latest, _set(("path",), ["33" * 32])),
        "consistency proof",
    )
    views = [i for i, line in enumerate(parsed) if line["type"] == "view"]
    cases["edit published view"] = (_edit(data, views[0], _group_count("published")), "digest")
    cases["edit internal view"] = (_edit(data, views[1], _group_count("internal")), "digest")
    cases["edit manifest"] = (_edit(data, len(lines) - 1, _set(("sha256",), "44" * 32)), "SHA")
    for name, index in (
        ("record", decision),
        ("subtree", _first(data, "subtree")),
        ("head", head),
        ("key", 1),
        ("view", views[0]),
        ("manifest", len(lines) - 1),
        ("latest", latest),
    ):
        cases[f"delete {name}"] = (b"".join(lines[:index] + lines[index + 1 :]), None)
        if name in ("manifest", "latest"):  # resealed, these are whole bundles again (the
            continue  # newest head is optional: a bundle without it says less, nothing false)
        cases[f"delete {name}, resealed"] = (
            _reseal(b"".join(lines[:index] + lines[index + 1 :])),
            None,
        )
    cases["duplicate record"] = (
        _reseal(b"".join([*lines[: decision + 1], lines[decision], *lines[decision + 1 :]])),
        None,
    )
    cases["duplicate head"] = (
        _reseal(b"".join([*lines[: head + 1], lines[head], *lines[head + 1 :]])),
        None,
    )
    swapped = list(lines)
    swapped[decision], swapped[decision + 1] = swapped[decision + 1], swapped[decision]
    cases["reorder two records"] = (_reseal(b"".join(swapped)), None)
    # Two lines swapped with their leaf indexes swapped too: the tree changes.
    a, b = json.loads(lines[decision]), json.loads(lines[decision + 1])
    a["index"], b["index"] = b["index"], a["index"]
    swapped[decision], swapped[decision + 1] = encode_line(b), encode_line(a)
    cases["reorder two records, indexes kept"] = (_reseal(b"".join(swapped)), "signed root")
    cases["truncated in half"] = (data[: len(data) // 2], None)
    cases["truncated at a line end"] = (b"".join(lines[: len(lines) // 2]), None)
    cases["empty"] = (b"", None)
    cases["garbage"] = (bytes(range(256)) * 8, None)
    cases["garbage inside"] = (
        b"".join(lines[:5]) + b"\xff\xfe\x00garbage\n" + b"".join(lines[5:]),
        None,
    )
    cases["bad json"] = (b"".join(lines[:3]) + b'{"type": "record",\n' + b"".join(lines[3:]), None)
    cases["not canonical"] = (
        b"".join(lines[:2])
        + json.dumps(json.loads(lines[2])).encode()
        + b"\n"
        + b"".join(lines[3:]),
        "canonical",
    )
    cases["appended line"] = (data + lines[-1], "after the manifest")
    return cases


def test_every_kind_of_tampering_is_found_and_never_crashes(bundle: bytes) -> None:
    cases = _cases(bundle)
    assert len(cases) >= 40
    for name, (data, expected) in cases.items():
        result = _check(data)
        assert not result.ok, name
        assert result.problem is not None, name
        assert "cannot be checked here" not in result.problem, (name, result.problem)
        if expected is not None:
            assert expected in result.problem, (name, result.problem)


def test_the_standalone_verifier_exits_1_or_2_without_a_traceback(
    bundle: bytes, tmp_path: Path
) -> None:
    cases = _cases(bundle)
    for name in (
        "edit decision names it",
        "garbage",
        "empty",
        "truncated in half",
        "wrong signature",
    ):
        path = tmp_path / "t.ehb"
        path.write_bytes(cases[name][0])
        run = _standalone(path)
        assert run.returncode in (1, 2), (name, run.returncode, run.stdout, run.stderr)
        assert "Traceback" not in run.stderr, (name, run.stderr)
        assert run.stdout.startswith("PROBLEM at line"), (name, run.stdout)
    assert _standalone(tmp_path / "missing.ehb").returncode == 2
    (tmp_path / "g.ehb").write_bytes(cases["garbage"][0])
    assert _standalone(tmp_path / "g.ehb").returncode == 2


def test_a_bundle_re_signed_with_another_key_fails_against_the_trusted_key(
    bundle: bytes, tmp_path: Path
) -> None:
    path = tmp_path / "ok.ehb"
    path.write_bytes(bundle)
    trusted = SIGNER.public_key.hex()
    assert _standalone(path, "--trust-key", trusted).returncode == 0
    other = Ed25519PrivateKey.generate().public_key().public_bytes_raw().hex()
    run = _standalone(path, "--trust-key", other)
    assert run.returncode == 1 and "not one of the keys you trust" in run.stdout


def test_a_decision_left_out_is_found_by_the_recount(bundle: bytes) -> None:
    """A forger who gives a decision of the month only as its leaf hash (a subtree of one
    leaf) keeps every head valid; the recount against the sealed snapshot finds it."""
    lines = bundle.splitlines(keepends=True)
    parsed = _lines(bundle)
    last = max(i for i, line in enumerate(parsed) if line.get("kind") == "decision")
    hidden = parsed[last]
    subtree = {"type": "subtree", "start": hidden["index"], "size": 1, "hash": hidden["leaf"]}
    forged = _reseal(b"".join([*lines[:last], encode_line(subtree), *lines[last + 1 :]]))
    result = _check(forged)
    assert not result.ok
    assert result.problem is not None and result.problem.startswith("recount:"), result.problem
    assert "recommendations is 12 in the published view; the records give 11" in result.problem


def test_the_audit_role_downloads_the_same_bundle_over_http(
    client: TestClient, make_key: Callable[..., str], session_factory: sessionmaker[Session]
) -> None:
    write_every_kind(client, make_key)
    audit = bearer(make_key("audit"))
    params = {"policy": POLICY, "month": _month()}
    r = client.get("/v1/log/bundle", params=params, headers=audit)
    assert r.status_code == 422 and r.json()["error"]["code"] == "not_sealed", r.text
    seal(session_factory)
    r = client.get("/v1/log/bundle", params=params, headers=audit)
    assert r.status_code == 200, r.text
    assert r.headers["content-type"].startswith("application/x-ndjson")
    assert r.content == _export(session_factory)
    result = _check(r.content)
    assert result.ok, result.problem
    r = client.get("/v1/log/bundle", params=params, headers=bearer(make_key("scoring")))
    assert r.status_code == 403
    r = client.get("/v1/log/bundle", params={**params, "month": "1999-01"}, headers=audit)
    assert r.status_code == 404 and r.json()["error"]["code"] == "no_snapshot"
    r = client.get("/v1/log/bundle", params={**params, "month": "2026-13"}, headers=audit)
    assert r.status_code == 422


def test_any_byte_changed_is_found(bundle: bytes) -> None:
    """Flip one byte at 300 random places (seeded): every copy fails, none crashes."""
    rng = random.Random(20261205)
    for _ in range(300):
        at = rng.randrange(len(bundle))
        flipped = bytes([bundle[at] ^ (1 << rng.randrange(8))])
        data = bundle[:at] + flipped + bundle[at + 1 :]
        result = _check(data)
        assert not result.ok, (at, bundle[max(0, at - 40) : at + 40])
        assert result.problem is not None and "cannot be checked here" not in result.problem, (
            at,
            result.problem,
        )


def test_heads_between_seals_place_a_rehashed_edit_between_them(
    client: TestClient,
    make_key: Callable[..., str],
    session_factory: sessionmaker[Session],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    write_every_kind(client, make_key)
    seal(session_factory)
    scoring = bearer(make_key("scoring"))
    for round_ in range(3):  # three more seals of three decisions each
        items = [make_request(case_id=f"r{round_}-{i}") for i in range(3)]
        r = client.post("/v1/recommendations/batch", json={"items": items}, headers=scoring)
        assert r.status_code == 201, r.text
        seal(session_factory)
    r = client.post(
        "/v1/audits",
        json={"policy": POLICY, "month": _month(), "provisional": True},
        headers=bearer(make_key("audit")),
    )
    assert r.status_code == 201, r.text
    seal(session_factory)
    monkeypatch.setattr("service.store.bundle_export.CHECKPOINT_RECORDS", 2)
    data = _export(session_factory)
    assert _check(data).ok
    parsed = _lines(data)
    heads = [i for i, line in enumerate(parsed) if line["type"] == "head"]
    assert len(heads) >= 4, heads
    # The last decision of the second round, edited with its leaf hash and the manifest redone.
    target = [i for i, line in enumerate(parsed) if line.get("kind") == "decision"][-4]
    edited = _reseal(_edit(data, target, _record_edit("score", 0.123, True)))
    result = _check(edited)
    assert not result.ok and result.problem is not None
    before = max(h for h in heads if h < target) + 1
    after = min(h for h in heads if h > target) + 1
    assert f"between lines {before} and {after}" in result.problem, result.problem
    assert after - before <= 5


def test_a_purged_month_is_refused(bundle: bytes, session_factory: sessionmaker[Session]) -> None:
    with session_factory() as session:
        session.add(LogPurge(through_seal=1, through_month=_month(), counts={}, by="test"))
        session.commit()
    with pytest.raises(Unprocessable) as refused:
        _export(session_factory)
    assert refused.value.code == "purged_month"


def test_the_bundle_export_draws_progress_only_on_a_terminal(
    bundle: bytes,
    tmp_path: Path,
    database_url: str,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    monkeypatch.setenv("EVENHAND_DATABASE_URL", database_url)
    monkeypatch.delenv("EVENHAND_PROGRESS", raising=False)
    argv = ["log", "bundle", "--policy", POLICY, "--month", _month(), "--out"]
    assert main([*argv, str(tmp_path / "quiet.ehb")]) == 0
    assert capsys.readouterr().err == ""  # stderr is not a terminal here
    monkeypatch.setenv("EVENHAND_PROGRESS", "1")
    assert main([*argv, str(tmp_path / "shown.ehb")]) == 0
    err = capsys.readouterr().err
    assert "exporting: 2 step(s) [" in err
