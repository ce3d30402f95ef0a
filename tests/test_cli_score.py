"""``evenhand score``: CSV in, CSV out, through the same path as the streaming route."""

from __future__ import annotations

import csv
from collections.abc import Callable
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy.orm import Session, sessionmaker

from service.cli.main import main
from service.cli.score_csv import OUTPUT_FIELDS
from tests.helpers import TEST_SECRET, bearer, count_rows


@pytest.fixture
def cli_env(monkeypatch: pytest.MonkeyPatch, database_url: str, engine: object) -> str:
    monkeypatch.setenv("EVENHAND_DATABASE_URL", database_url)
    monkeypatch.setenv("EVENHAND_DRAW_SECRET", TEST_SECRET)
    monkeypatch.delenv("EVENHAND_PROGRESS", raising=False)
    return database_url


def _write_cases(path: Path, rows: list[list[str]]) -> None:
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["request_id", "case_id", "score", "region"])
        writer.writerows(rows)


def _cases(n: int) -> list[list[str]]:
    return [
        [f"csv-{i}", f"case-{i}", str((i % 10) / 10), ["north", "south"][i % 2]] for i in range(n)
    ]


def test_csv_round_trip_matches_the_http_answers_and_replays(
    cli_env: str,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    client: TestClient,
    tokens: dict[str, str],
    publish: Callable[..., int],
    session_factory: sessionmaker[Session],
) -> None:
    publish()
    source, out = tmp_path / "cases.csv", tmp_path / "decisions.csv"
    rows = _cases(23)
    _write_cases(source, rows)
    argv = ["score", "--in", str(source), "--out", str(out), "--policy", "readmission"]
    assert main([*argv, "--chunk", "5"]) == 0
    assert "23 new, 0 replayed" in capsys.readouterr().err
    with out.open(newline="", encoding="utf-8") as handle:
        decisions = list(csv.DictReader(handle))
    assert [d["request_id"] for d in decisions] == [r[0] for r in rows]
    assert list(decisions[0]) == list(OUTPUT_FIELDS)
    assert count_rows(session_factory, "recommendations") == 23
    # The same requests over HTTP are replays of exactly these decisions.
    for row, decision in zip(rows, decisions, strict=True):
        body = {
            "request_id": row[0],
            "case_id": row[1],
            "policy": "readmission",
            "score": float(row[2]),
            "attributes": {"region": row[3]},
        }
        r = client.post("/v1/recommendations", json=body, headers=bearer(tokens["scoring"]))
        assert r.status_code == 200, r.text
        answer = r.json()
        answer["action"] = "true" if answer["action"] else "false"
        assert {f: str(answer[f]) for f in OUTPUT_FIELDS} == decision
    # Run again: the same file, byte for byte, and nothing written.
    first = out.read_bytes()
    assert main(argv) == 0
    assert "0 new, 23 replayed" in capsys.readouterr().err
    assert out.read_bytes() == first
    assert count_rows(session_factory, "recommendations") == 23


def test_a_bad_row_is_named_by_file_line_and_column(
    cli_env: str,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    publish: Callable[..., int],
    session_factory: sessionmaker[Session],
) -> None:
    publish()
    source, out = tmp_path / "cases.csv", tmp_path / "decisions.csv"
    rows = _cases(8)
    rows[5][2] = "high"  # line 7 of the file (the header is line 1)
    _write_cases(source, rows)
    argv = ["score", "--in", str(source), "--out", str(out), "--policy", "readmission"]
    assert main([*argv, "--chunk", "3"]) == 2
    err = capsys.readouterr().err
    assert f"{source}: line 7, column score: " in err and "5 row(s) before it" in err
    assert count_rows(session_factory, "recommendations") == 5
    assert len(out.read_text().splitlines()) == 1 + 5

    rows[5][2] = "0.5"
    rows[6][3] = "east"  # a group the policy does not know
    _write_cases(source, rows)
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert f"{source}: line 8" in err and "unknown_group" in err

    source.write_text("request_id,case_id\nr,c\n", encoding="utf-8")
    assert main(argv) == 2
    assert "line 1: missing column(s): score" in capsys.readouterr().err
    source.write_text("request_id,case_id,score\nr,c\n", encoding="utf-8")
    assert main(argv) == 2
    assert "line 2: has 2 cells; the header has 3" in capsys.readouterr().err
    assert main(["score", "--in", str(tmp_path / "none.csv"), "--out", str(out)]) == 2
    assert "no such file" in capsys.readouterr().err
