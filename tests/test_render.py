"""Report rendering from a snapshot: CSV into pandas, one self-contained HTML page."""

from __future__ import annotations

import html as html_lib
import io
import json
import re

import pandas as pd
import pytest

from service.audit.render import CSV_COLUMNS, to_csv, to_html, to_json
from service.audit.snapshot import CALIBRATION_CONFLICT
from tests.test_snapshot import snapshot


def test_json_round_trips() -> None:
    s = snapshot()
    assert json.loads(to_json(s)) == s


def test_csv_loads_into_pandas_one_row_per_version_group_metric() -> None:
    s = snapshot()
    df = pd.read_csv(io.StringIO(to_csv(s)), keep_default_na=False, na_values=[""])
    assert tuple(df.columns) == CSV_COLUMNS
    assert df["value"].dtype == float
    key = ["month", "version", "section", "group", "kind", "metric"]
    assert not df.duplicated(key).any()
    a_tpr = df[(df.group == "a") & (df.kind == "rate") & (df.metric == "tpr")].iloc[0]
    assert a_tpr.value == pytest.approx(140 / 200)
    assert a_tpr.low == s["versions"][0]["groups"][0]["rates"]["tpr"]["low"]
    c_tp = df[(df.group == "c") & (df.kind == "count") & (df.metric == "tp")].iloc[0]
    assert pd.isna(c_tp.value) and c_tp.note == "<11"
    c_tpr = df[(df.group == "c") & (df.kind == "rate") & (df.metric == "tpr")].iloc[0]
    assert pd.isna(c_tpr.value) and c_tpr.note == "small-cell"


def test_html_is_self_contained_with_alerts_first() -> None:
    s = snapshot()
    html = to_html(s)
    assert html.startswith("<!DOCTYPE html>")
    assert html.index("Alerts") < html.index("Rates by group")
    assert html_lib.escape(s["alerts"][0]["message"]) in html
    assert html.count("<svg") >= 3  # rates, ROC space, trend
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:|//)""", html)
    assert "@media print" in html
    assert html_lib.escape(CALIBRATION_CONFLICT) in html
    assert "42 U.S.C. 2000e-2(l)" in html
