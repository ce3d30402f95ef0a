"""The demo story end to end on a small stream: real server, real HTTP, a verified log."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from sqlalchemy import create_engine, func, select

from service.demo.context import DemoContext, DemoError
from service.demo.story import prepare_output, run_demo
from service.store.log_sources import SOURCES
from service.store.models import Recommendation

pytestmark = pytest.mark.slow


def test_demo_runs_the_whole_story(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    ctx = run_demo(DemoContext(output_dir=tmp_path / "demo-output", cases=60))
    assert ctx.server is None  # stopped
    assert ctx.verify["ok"] is True and ctx.verify["problem"] is None
    assert set(ctx.verify["unsealed"].values()) == {0}
    reviewed, blind = ctx.versions["reviewed"], ctx.versions["group-blind"]
    phases = {(s.phase, s.version) for s in ctx.sent}
    assert phases == {
        ("reviewed policy", reviewed),
        ("group-blind trial", blind),
        ("after rollback", reviewed),
    }
    engine = create_engine(ctx.database_url)
    with engine.connect() as conn:
        stored = conn.scalar(select(func.count()).select_from(Recommendation))
        # every record of every kind is a leaf of the verified tree
        in_log = sum(
            conn.scalar(select(func.count()).select_from(source.table)) or 0
            for source in SOURCES.values()
        )
    engine.dispose()
    assert stored == 60
    assert ctx.verify["records_checked"] == in_log > 60
    out = capsys.readouterr().out
    assert "rollback" in out and "verified ok" in out and "advisory" in out
    # the last head mirrored outside the database is the head the verification ended at
    mirrored = (tmp_path / "demo-output" / "heads.jsonl").read_text().splitlines()
    assert json.loads(mirrored[-1]) == ctx.verify["head"]


def test_demo_refuses_to_replace_a_folder_it_did_not_make(tmp_path: Path) -> None:
    (tmp_path / "precious.txt").write_text("keep me")
    with pytest.raises(DemoError, match="not made by the demo"):
        prepare_output(DemoContext(output_dir=tmp_path, cases=10))
    assert (tmp_path / "precious.txt").exists()
