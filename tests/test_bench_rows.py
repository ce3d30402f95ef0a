"""The benchmarks' loader (benchmarks/log_load.py) writes the rows the service writes.

A few decisions and outcomes are written by the loader, and the same requests (other
request_ids of the same width) and the same outcomes are then sent through the HTTP routes.
Column by column, the stored values have the same type and width as the database reports
them (SQLite: ``typeof`` and byte length; PostgreSQL: ``pg_typeof`` and ``pg_column_size``),
and equal values except where they must differ: ids, the request's own id and fingerprint,
and the times (the loader's clock is in the audited month).
"""

from __future__ import annotations

import importlib.util
import sys
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path
from types import ModuleType
from typing import Any

import numpy as np
from fastapi.testclient import TestClient
from sqlalchemy import Engine, inspect, text

from tests.helpers import TEST_SECRET, bearer

CASES = 12


def _loader() -> ModuleType:
    path = Path(__file__).resolve().parents[1] / "benchmarks" / "log_load.py"
    spec = importlib.util.spec_from_file_location("log_load", path)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules["log_load"] = module
    spec.loader.exec_module(module)
    return module


def _stored(engine: Engine, table: str, order: str) -> list[dict[str, Any]]:
    """Each row of ``table``: per column (type, width, value) as the database holds them."""
    columns = [c["name"] for c in inspect(engine).get_columns(table)]
    parts = []
    for c in columns:
        if engine.dialect.name == "sqlite":
            parts += [f'typeof("{c}")', f'length(CAST("{c}" AS BLOB))', f'"{c}"']
        else:
            parts += [f'pg_typeof("{c}")::text', f'pg_column_size("{c}")', f'"{c}"']
    with engine.connect() as conn:
        rows = conn.execute(text(f"SELECT {', '.join(parts)} FROM {table} ORDER BY {order}"))
        return [
            {c: tuple(row[3 * i : 3 * i + 3]) for i, c in enumerate(columns)} for row in rows.all()
        ]


def _compare(loaded: dict[str, Any], served: dict[str, Any], may_differ: set[str]) -> None:
    assert loaded.keys() == served.keys()
    for column, (kind, width, value) in loaded.items():
        s_kind, s_width, s_value = served[column]
        assert kind == s_kind, column
        if column not in may_differ:
            assert (width, value) == (s_width, s_value), column
        elif kind not in ("integer", "bigint"):  # an integer's width follows its value
            assert width == s_width, column


def test_loader_rows_equal_rows_written_through_the_routes(
    engine: Engine, client: TestClient
) -> None:
    log_load = _loader()
    url = engine.url.render_as_string(hide_password=False)
    done = log_load.load(url, CASES, draw_secret=TEST_SECRET, progress=lambda _m: None)
    assert done.decisions == CASES
    # The same requests as the loader's (same random stream), each under another request_id
    # of the same width.
    items = log_load.request_items(0, CASES, np.random.default_rng(1))
    body = [
        {**i.model_dump(), "request_id": f"discharge-{900_000_000 + k:09d}"}
        for k, i in enumerate(items)
    ]
    scoring = bearer(done.scoring_token)
    r = client.post("/v1/recommendations/batch", json={"items": body}, headers=scoring)
    assert r.status_code == 201, r.text
    served_ids = [item["recommendation_id"] for item in r.json()["items"]]

    recs = _stored(engine, "recommendations", "id")
    assert len(recs) == 2 * CASES
    may_differ = {"id", "recommendation_id", "request_id", "request_fingerprint", "issued_at"}
    for loaded, served in zip(recs[:CASES], recs[CASES:], strict=True):
        _compare(loaded, served, may_differ)

    # The loader's outcomes, sent again for the served decisions through the batch route.
    outcomes = _stored(engine, "outcome_records", "id")
    assert outcomes, "the loader posted no outcome"
    pk_to_case = {rec["id"][2]: k for k, rec in enumerate(recs[:CASES])}
    now = datetime.now(UTC).isoformat()
    sent = [
        {
            "recommendation_id": served_ids[pk_to_case[o["recommendation_pk"][2]]],
            "outcome": int(o["outcome"][2]),
            "observed_at": now,
            "source": o["source"][2],
        }
        for o in outcomes
    ]
    r = client.post("/v1/outcomes/batch", json={"items": sent}, headers=scoring)
    assert r.status_code == 201, r.text
    both = _stored(engine, "outcome_records", "id")
    assert len(both) == 2 * len(outcomes)
    for loaded, served in zip(both[: len(outcomes)], both[len(outcomes) :], strict=True):
        _compare(loaded, served, {"id", "recommendation_pk", "observed_at", "recorded_at"})

    # The loader sealed and tallied its records with the sealer's own function.
    seals = _scalar(engine, "SELECT count(*) FROM seals")
    batches = _scalar(engine, "SELECT count(*) FROM tally_batches")
    assert seals >= 1 and batches >= 1


def _scalar(engine: Engine, statement: str) -> Any:
    with engine.connect() as conn:
        return conn.execute(text(statement)).scalar()


def test_loader_months_are_audited_like_the_routes_months(
    engine: Engine, client: TestClient, make_key: Callable[..., str]
) -> None:
    """The loaded month audits through the route: every decision counted once."""
    log_load = _loader()
    url = engine.url.render_as_string(hide_password=False)
    done = log_load.load(url, CASES, draw_secret=TEST_SECRET, progress=lambda _m: None)
    r = client.post(
        "/v1/audits",
        json={"policy": log_load.POLICY, "month": log_load.MONTH, "provisional": True},
        headers=bearer(make_key("audit")),
    )
    assert r.status_code == 201, r.text
    assert _scalar(engine, "SELECT recommendations FROM audit_snapshots") == done.decisions
    assert _scalar(engine, "SELECT outcomes FROM audit_snapshots") == done.outcomes
