"""Report rendering from a snapshot: CSV into pandas, one self-contained HTML page."""

from __future__ import annotations

import html as html_lib
import io
import re
import subprocess
import sys
import typing
from pathlib import Path

import pandas as pd
import pytest

from service.audit.render_csv import CSV_COLUMNS, NOTES, to_csv
from service.audit.render_html import to_html
from service.audit.snapshot import CALIBRATION_CONFLICT
from service.audit.snapshot_model import Withheld
from tests.test_snapshot import result, snapshot


def test_csv_loads_into_pandas_one_row_per_figure() -> None:
    s = snapshot()
    df = pd.read_csv(io.StringIO(to_csv(s)), keep_default_na=False, na_values=[""])
    assert tuple(df.columns) == CSV_COLUMNS
    assert df["value"].dtype == float
    key = ["month", "version", "section", "group", "kind", "metric"]
    assert not df.duplicated(key).any()
    a_tpr = df[(df.group == "a") & (df.kind == "rate") & (df.metric == "tpr")].iloc[0]
    assert a_tpr.value == pytest.approx(1400 / 2000)
    assert a_tpr.low == s.versions[0].groups[0].rates["tpr"].low
    c_tp = df[(df.group == "c") & (df.kind == "count") & (df.metric == "tp")].iloc[0]
    assert pd.isna(c_tp.value) and c_tp.note == "<11"
    c_tpr = df[(df.group == "c") & (df.kind == "rate") & (df.metric == "tpr")].iloc[0]
    assert pd.isna(c_tpr.value) and c_tpr.note == "small-cell"
    checks = df[df.section == "checks"]
    assert set(checks.status) <= {"breach", "holds", "undecided", "too-few"}
    assert (checks.status == "breach").any()
    # Every note the CSV writes is documented.
    assert set(df.note.dropna()) <= set(NOTES)


def test_the_internal_csv_says_so_and_hides_nothing() -> None:
    r = result()
    df = pd.read_csv(io.StringIO(to_csv(r.internal)), keep_default_na=False, na_values=[""])
    assert set(df.view) == {"internal"}
    counts = df[df.kind == "count"]
    assert counts.value.notna().all()


def test_html_is_self_contained_with_alerts_and_the_family_first() -> None:
    s = snapshot()
    html = to_html(s)
    assert html.startswith("<!DOCTYPE html>")
    assert (
        html.index("Alerts") < html.index("How statuses are decided") < html.index("Rates by group")
    )
    assert html_lib.escape(s.alerts[0].message) in html
    assert html.count("<svg") >= 2  # rates and ROC space
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:|//)""", html)
    assert "@media print" in html
    assert html_lib.escape(CALIBRATION_CONFLICT) in html
    assert "42 U.S.C. 2000e-2(l)" in html
    # Status words are spelled as in the JSON.
    assert ">too-few<" in html and ">breach<" in html
    assert f"issued from {s.cohort.from_} until {s.cohort.until}" in html
    assert "INTERNAL VIEW" not in html
    assert "INTERNAL VIEW" in to_html(result().internal)


def test_rendering_does_not_change_matplotlib_globals() -> None:
    code = (
        "import matplotlib; before = dict(matplotlib.rcParams);"
        "from tests.test_snapshot import snapshot;"
        "from service.audit.render_html import to_html; to_html(snapshot());"
        "changed = [k for k in before if matplotlib.rcParams[k] != before[k]];"
        "print(changed)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def test_every_csv_note_is_documented_and_every_withheld_reason_is_a_note() -> None:
    """docs/audit.md ("CSV") lists exactly the notes the CSV can carry."""
    text = (Path(__file__).resolve().parents[1] / "docs" / "audit.md").read_text()
    table = text.split("| note | meaning |", 1)[1].split("\n\n", 1)[0]
    documented = {
        line.split("`")[1]: line.split("|")[2].strip()
        for line in table.splitlines()
        if line.startswith("| `")
    }
    assert documented == NOTES
    assert set(typing.get_args(Withheld)) <= set(NOTES)
