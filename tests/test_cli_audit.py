"""`evenhand audit run` and `evenhand report list|show|export` on the configured database."""

from __future__ import annotations

import io
from collections.abc import Callable
from pathlib import Path

import pandas as pd
import pytest
from fastapi.testclient import TestClient

from service.cli.main import main
from tests.audit_helpers import POLICY, put_live
from tests.helpers import bearer
from tests.test_audit_e2e import _replay


def test_audit_and_report_commands(
    client: TestClient,
    make_key: Callable[..., str],
    database_url: str,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    put_live(client, make_key)
    rows = _replay(client, bearer(make_key("scoring")), 120, seed=9)
    month = rows[0]["issued_at"][:7]
    monkeypatch.setenv("EVENHAND_DATABASE_URL", database_url)

    assert main(["audit", "run", "--policy", POLICY, "--month", month]) == 0
    out, err = capsys.readouterr()
    assert f"of {POLICY} for {month} (provisional)" in out and "digest" in out
    assert "check(s) tested, holm at 0.05" in out
    assert "counted" in err and "done in" in err  # progress on stderr

    assert main(["report", "list", "--policy", POLICY]) == 0
    assert month in capsys.readouterr().out
    assert main(["report", "show", "--policy", POLICY, "--month", month]) == 0
    out = capsys.readouterr().out
    assert "recommendations" in out and "month provisional: the month has not ended" in out
    assert main(["report", "show", "--policy", POLICY, "--month", month, "--internal"]) == 0
    assert "INTERNAL VIEW" in capsys.readouterr().out

    target = tmp_path / "r.csv"
    argv = ["report", "export", "--policy", POLICY, "--month", month, "--format", "csv"]
    assert main([*argv, "-o", str(target)]) == 0
    df = pd.read_csv(io.StringIO(target.read_text()), keep_default_na=False, na_values=[""])
    assert set(df.month) == {month}

    assert main(["report", "show", "--policy", POLICY, "--month", "1999-01"]) == 2
    assert "no audit" in capsys.readouterr().err
    assert main(["audit", "run", "--policy", POLICY, "--month", "2026-13"]) == 2
    assert main(["audit", "run", "--policy", "nope", "--month", month]) == 2
    assert main(["audit", "run", "--policy", POLICY, "--month", "2001-01"]) == 2
    assert "nothing to audit" in capsys.readouterr().err
    argv = ["audit", "run", "--policy", POLICY, "--month", month, "--tolerance", "0"]
    assert main(argv) == 2
    assert "must be > 0" in capsys.readouterr().err
