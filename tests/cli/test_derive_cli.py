"""``evenhand derive`` end to end: outputs, report keys, holdout intervals, bad inputs."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
from statsmodels.stats.proportion import proportion_confint

from service.cli.main import main
from service.demo.fernhollow import generate, write_csv
from service.policy.document import PolicyDocument, content_hash


@pytest.fixture(scope="module")
def demo_csv(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("data") / "fernhollow.csv"
    write_csv(generate(4000, seed=7), path)
    return path


def _argv(csv: Path, out_dir: Path, *extra: str) -> list[str]:
    return [
        "derive",
        str(csv),
        "--score",
        "score",
        "--outcome",
        "readmitted",
        "--group",
        "community",
        "--criterion",
        "equal-opportunity",
        "--cost-fp",
        "1",
        "--cost-fn",
        "4",
        "--out",
        str(out_dir / "policy.json"),
        "--report",
        str(out_dir / "report.json"),
        "--html",
        str(out_dir / "report.html"),
        *extra,
    ]


def test_derive_writes_policy_report_and_page(
    demo_csv: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(_argv(demo_csv, tmp_path, "--name", "fh-test", "--holdout", "0.25")) == 0
    policy = PolicyDocument.model_validate_json((tmp_path / "policy.json").read_text())
    assert policy.name == "fh-test" and policy.favourable == "action"
    report = json.loads((tmp_path / "report.json").read_text())
    assert report["policy_hash"] == content_hash(policy)
    for key in ("criterion", "tolerance", "expected_cost", "groups", "comparison", "frontier"):
        assert key in report
    assert set(report["groups"]) == {"millbrook", "quarry-hill", "saltmarsh"}
    for g in report["groups"].values():
        assert set(g) >= {"n", "prevalence", "action_rate", "tpr", "fpr", "ppv"}
    # equal opportunity at tolerance 0: the promised TPRs agree
    tprs = [g["tpr"] for g in report["groups"].values()]
    assert max(tprs) - min(tprs) < 1e-9
    assert policy.targets is not None
    for key, g in report["groups"].items():
        assert policy.targets.groups[key].tpr == g["tpr"]
    assert next(r["criterion"] for r in report["comparison"]) == "max-utility"
    assert [p["tolerance"] for p in report["frontier"]["points"]] == [0, 0.01, 0.02, 0.05, 0.1]
    # Holdout intervals: Wilson 95% as computed by statsmodels proportion_confint
    # (Seabold & Perktold 2010), method "wilson", on the held-out rate and row count.
    held = report["holdout"]["groups"]["saltmarsh"]["action_rate"]
    low, high = proportion_confint(held["value"] * held["trials"], held["trials"], method="wilson")
    assert (held["low"], held["high"]) == pytest.approx((low, high), abs=1e-12)
    page = (tmp_path / "report.html").read_text()
    assert page.count("<svg") == 2 and "42 U.S.C. 2000e-2(l)" in page
    assert not re.search(r"(src|href)=\"(https?:)?//", page)  # self-contained: nothing fetched
    table = capsys.readouterr().out
    assert "equal-opportunity" in table and "saltmarsh" in table and "price" in table


def _write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "in.csv"
    path.write_text(text)
    return path


GOOD_HEADER = "score,readmitted,community\n"
# Groups a and b, 20 rows each, outcomes alternating, scores 0.1 .. 0.9.
GOOD_ROWS = "".join(f"0.{i % 9 + 1},{i % 2},{'ab'[i // 20]}\n" for i in range(40))


@pytest.mark.parametrize(
    ("text", "extra", "message"),
    [
        ("", [], "the file is empty"),
        (GOOD_HEADER, [], "no data rows"),
        ("score,outcome,community\n0.5,1,a\n", [], "column 'readmitted' not found"),
        (GOOD_HEADER + "0.5,1,a\nabc,0,a\n", [], "line 3: column 'score': 'abc' is not a number"),
        (GOOD_HEADER + "0.5,1,a\nnan,0,a\n", [], "line 3: column 'score': 'nan' is not a number"),
        (GOOD_HEADER + "1.5,1,a\n", [], "line 2: column 'score': '1.5' is outside [0, 1]"),
        (GOOD_HEADER + "0.5,yes,a\n", [], "line 2: column 'readmitted': 'yes' is not 0 or 1"),
        (GOOD_HEADER + "0.5,1,\n", [], "line 2: column 'community' is empty"),
        (GOOD_HEADER + GOOD_ROWS + "0.3,0,c\n0.4,0,c\n", [], "group 'c' has no positive"),
        (GOOD_HEADER + GOOD_ROWS + "0.3,1,c\n0.4,1,c\n", [], "group 'c' has no negative"),
        (
            GOOD_HEADER + GOOD_ROWS + "0.3,1,c\n0.4,0,c\n",
            ["--min-group-size", "10"],
            "group 'c' has 2 rows, below --min-group-size 10",
        ),
        (GOOD_HEADER + GOOD_ROWS, ["--tolerance", "-0.1"], "--tolerance -0.1: infeasible"),
        (GOOD_HEADER + "0.5,1,a,extra\n", [], "line 2: 4 fields, the header has 3"),
    ],
)
def test_bad_input_is_one_line_exit_2_and_writes_nothing(
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    text: str,
    extra: list[str],
    message: str,
) -> None:
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    csv = _write(tmp_path, text)
    code = main([*_argv(csv, out_dir), "--min-group-size", "1", *extra])
    err = capsys.readouterr().err
    last = err.strip().splitlines()[-1]
    assert code == 2
    assert last.startswith("evenhand: error: ") and message in last, err
    assert list(out_dir.iterdir()) == []  # no output, no temporary file left behind


def test_missing_output_directory_is_refused_before_reading(
    demo_csv: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(_argv(demo_csv, tmp_path / "nowhere")) == 2
    assert "does not exist" in capsys.readouterr().err


def test_demo_data_is_reproducible(tmp_path: Path) -> None:
    a, b = tmp_path / "a.csv", tmp_path / "b.csv"
    assert main(["demo-data", "--rows", "300", "--seed", "5", "--out", str(a)]) == 0
    assert main(["demo-data", "--rows", "300", "--seed", "5", "--out", str(b)]) == 0
    assert a.read_bytes() == b.read_bytes()
    assert a.read_text().splitlines()[0] == (
        "case_id,community,language,score,readmitted,discharged_at"
    )
    assert len(a.read_text().splitlines()) == 301
