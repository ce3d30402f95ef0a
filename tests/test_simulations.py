"""The error-rate simulation scripts run end to end in their smoke mode and report every table
with the rows and fields ``docs/error-rates.md`` is built from (shapes only: the figures of a
smoke run are not meaningful)."""

from __future__ import annotations

import importlib.util
import json
import re
import sys
from pathlib import Path
from types import ModuleType
from typing import Any

import pytest

BENCHMARKS = Path(__file__).resolve().parents[1] / "benchmarks"


def script(name: str) -> ModuleType:
    if str(BENCHMARKS) not in sys.path:
        sys.path.insert(0, str(BENCHMARKS))
    spec = importlib.util.spec_from_file_location(name, BENCHMARKS / f"{name}.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module  # dataclasses look their module up there
    spec.loader.exec_module(module)
    return module


def run(name: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> tuple[Any, str]:
    out = tmp_path / f"{name}.json"
    assert script(name).main(["--quick", "--json", str(out)]) == 0
    return json.loads(out.read_text()), capsys.readouterr().out


def table_rows(text: str, header_start: str) -> list[list[str]]:
    """The body rows of the markdown table whose header begins with ``header_start``."""
    lines = text.splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith(header_start))
    rows = []
    for line in lines[start + 2 :]:
        if not line.startswith("|"):
            break
        cells = re.split(r"(?<!\\)\|", line.strip().removeprefix("|").removesuffix("|"))
        rows.append([cell.strip().replace("\\|", "|") for cell in cells])
    return rows


def test_sim_verdicts_reports_size_false_holds_power_and_the_old_rule(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    figures, text = run("sim_verdicts", tmp_path, capsys)
    size = table_rows(text, "| volume | promises | truth |")
    assert len(size) == len(figures["size"]) == 12  # 2 volumes x 2 promise kinds x 3 truths
    assert {tuple(r[:3]) for r in size} == {
        (v, p, t)
        for v in ("2,000", "4,000")
        for p in ("exact", "two-sample")
        for t in ("in control", "at the edge", "twice the tolerance")
    }
    assert all(len(r) == 9 for r in size)
    for row in figures["size"]:
        assert row["months"] == figures["months"] > 0
        assert 0 <= row["breach_holm"] <= row["months"]
        assert (row["false_holds_holm"] is None) == (row["truth"] == "in control")
    power = table_rows(text, "| group cases |")
    assert [r[0] for r in power] == ["50", "100", "192", "384", "500", "1,000", "2,000", "5,000"]
    assert all(len(r) == 9 for r in power)
    assert {"holm", "by", "unadjusted", "any_holm", "tested"} <= set(figures["power"][0])
    assert text.count("of months alerted (new rule") == 4
    assert "run time" in text and "seed" in text


def test_sim_monitoring_reports_false_alarms_the_matched_level_and_detection(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    figures, text = run("sim_monitoring", tmp_path, capsys)
    alarms = table_rows(text, "| true TPR gaps |")
    assert [r[0] for r in alarms] == ["0", "at the edge (+-0.05)"]
    assert all(r[2] == "16" for r in alarms)  # 8 non-reference groups x 2 sides
    pair = table_rows(text, "| reference cases / month |")
    assert [(r[0], r[1]) for r in pair] == [
        ("850", "+0.05"),
        ("850", "-0.05"),
        ("850,000", "+0.05"),
        ("850,000", "-0.05"),
    ]
    levels = table_rows(text, "| monthly level |")
    assert len(levels) == len(figures["levels"]) == 3
    assert all(0.0 < row["level"] <= 0.2 for row in figures["levels"])
    detection = table_rows(text, "| group | share |")
    assert [r[0] for r in detection] == ["quarry-hill|other", "millbrook|es", "millbrook|en"]
    assert all(len(r) == 7 for r in detection)
    for row in figures["detection"]:
        for name in ("chart", "matched", "design", "plan"):
            assert len(row[name]) == row["runs"]
            assert all(v is None or 1 <= v <= row["cap"] for v in row[name])
    assert "run time" in text and "seed" in text


def test_sim_promises_reports_promise_errors_per_rate_and_group_and_the_true_gaps(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    figures, text = run("sim_promises", tmp_path, capsys)
    groups = {f"{c}|{lang}" for c in ("quarry-hill", "millbrook", "saltmarsh")
              for lang in ("en", "es", "other")}  # fmt: skip
    for rate in ("tpr", "fpr", "action_rate"):
        start = text.index(f"## Promised minus true {rate},")
        rows = table_rows(text[start:], "| group | share |")
        assert {r[0] for r in rows} == groups
        assert all(len(r) == 12 for r in rows)
    assert len(figures["errors"]) == 27
    for row in figures["errors"]:
        for kind in ("in_sample", "cross_fitted"):
            s = row[kind]
            assert s["p10"] <= s["median"] <= s["p90"] and s["mean_low"] <= s["mean_high"]
    gaps = table_rows(text, "| gap | groups |")
    assert len(gaps) == len(figures["gaps"]) == 5
    assert all(r[-1].endswith(f"/{figures['samples']}") for r in gaps)
    assert "run time" in text and "seed" in text


def test_sim_calibration_reports_the_familys_size_and_power_by_group_size(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    figures, text = run("sim_calibration", tmp_path, capsys)
    size = table_rows(text, "| volume | months |")
    assert [r[0] for r in size] == ["2,000", "20,000"]
    assert all(len(r) == 6 for r in size)
    for row in figures["size"]:
        assert 0 <= row["holm"] <= row["months"] and 0 <= row["by"] <= row["months"]
        assert 0 < row["tested_per_month"] <= 9
    power = table_rows(text, "| group cases |")
    assert [r[0] for r in power] == ["50", "100", "192", "384", "1,000", "2,000", "5,000"]
    assert all(len(r) == 10 for r in power)
    for row in figures["power"]:
        assert row["holm"] <= row["tested"] <= row["months"]
        assert row["positives"] > row["expected"] > 0  # odds 1.5: more outcomes than scored
    assert "run time" in text and "seed" in text


def test_sim_score_charts_reports_false_alarms_and_both_detection_tables(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    figures, text = run("sim_score_charts", tmp_path, capsys)
    alarms = table_rows(text, "| true TPR gaps | scores |")
    assert [r[0] for r in alarms] == ["0", "at the edge (+-0.05)"]
    assert all(r[3] == "34" for r in alarms)  # 16 gap charts + 2 outcome charts x 9 groups
    for row in figures["false_alarms"]:
        assert row["years"] >= 1 and 0 <= row["signals"] <= row["years"]
    gaps = table_rows(text, "| group | share | TPR cases")
    assert [r[0] for r in gaps] == ["quarry-hill|other", "millbrook|es", "millbrook|en"]
    odds = table_rows(text, "| group | share | outcomes")
    assert [(r[0], r[3]) for r in odds] == [
        (g, o)
        for g in ("quarry-hill|other", "millbrook|es", "millbrook|en", "quarry-hill|en")
        for o in ("1.5", "2")
    ]
    for row in figures["odds_detection"]:
        for name in ("chart", "plan", "design"):
            assert len(row[name]) == row["runs"]
            assert all(v is None or 1 <= v <= row["cap"] for v in row[name])
    assert "run time" in text and "seed" in text


def test_sim_chart_years_reports_false_alarms_per_year_of_use_the_chain_and_detection(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    figures, text = run("sim_chart_years", tmp_path, capsys)
    years = table_rows(text, "| charts | year of use |")
    assert [(r[0], r[1]) for r in years] == [
        (c, y) for c in ("16 (no score sums)", "34 (score sums)") for y in ("1", "2", "3")
    ]
    assert [row["charts"] for row in figures["rows"]] == [16, 34]
    for row in figures["rows"]:
        for y in row["years"]:
            assert 0 <= y["first"] <= y["any"] <= row["versions"]
    chain = table_rows(text, "| H (months) |")
    assert [r[0] for r in chain] == ["12", "24", "36"]
    model = table_rows(text, "| year of use | any signal in the year |")
    assert [r[0] for r in model] == ["1", "2", "3"] and len(figures["windowed_model"]) == 3
    single = table_rows(text, "| yearly false-alarm rate |")
    assert [(r[0], r[2]) for r in single] == [
        (y, g) for y in ("0.0184", "0.025", "0.05") for g in ("millbrook|es", "millbrook|en")
    ]
    found = table_rows(text, "| group | share | TPR cases")
    assert [r[0] for r in found] == ["quarry-hill|other", "millbrook|es", "millbrook|en"]
    for row in figures["detection"]:
        assert len(row["chart"]) == row["runs"]
        assert all(v is None or 1 <= v <= row["cap"] for v in row["chart"])
    assert "run time" in text and "seed" in text


def test_sim_warnings_reports_false_warnings_by_volume_and_power_by_group_size(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    figures, text = run("sim_warnings", tmp_path, capsys)
    null = table_rows(text, "| decisions / day |")
    assert [r[0] for r in null] == ["65", "500", "5,000"]
    assert all(len(r) == 12 for r in null)
    for row in figures["null"]:
        assert row["days"] == 365 * row["years"] and row["years_warned"] <= row["years"]
        assert row["any_warning"] <= row["days"]
        assert row["draws"] >= row["tested_groups"]  # every drift test draws at least once
    power = table_rows(text, "| group cases | day volume |")
    assert [(r[0], r[2]) for r in power] == [
        (c, f) for c in ("20", "50", "100", "200", "500", "1,000", "2,000") for f in ("1", "1.3")
    ]
    assert all(len(r) == 10 for r in power)
    for row in figures["power"]:
        assert row["either"] <= row["days"] and row["drift"] <= row["either"]
    assert "run time" in text and "seed" in text


def test_sim_promise_size_reports_false_breaches_by_volume_and_scenario(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    figures, text = run("sim_promise_size", tmp_path, capsys)
    rows = table_rows(text, "| volume | truth |")
    assert [(r[0], r[1]) for r in rows] == [
        (v, s) for v in ("2,000", "20,000", "200,000") for s in ("truth", "at the edge")
    ]
    assert all(len(r) == 11 for r in rows)
    assert figures["resamples"] >= 2
    for row in figures["rows"]:
        shares = row["per_policy"]
        assert len(shares["any"]) == len(shares["binomial"]) == figures["policies"] > 0
        for name in ("tpr", "fpr", "action_rate"):  # a promise breach is a false breach
            assert all(a >= b for a, b in zip(shares["any"], shares[name], strict=True))
    assert "run time" in text and "seed" in text
