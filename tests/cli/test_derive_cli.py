"""``evenhand derive`` end to end: outputs, report keys, cross-fitted intervals, bad inputs."""

from __future__ import annotations

import json
import re
from pathlib import Path
from typing import Any

import pytest
from statsmodels.stats.proportion import proportion_confint

from service.cli.main import main
from service.demo.fernhollow import generate, write_csv
from service.policy import crossfit
from service.policy.derive import Solution, solve
from service.policy.document import PolicyDocument, content_hash
from service.policy.errors import InternalDeriveError
from service.policy.targets import Criterion
from service.policy.units import Prepared


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
        "--tolerance",
        "0.05",
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
    assert main(_argv(demo_csv, tmp_path, "--name", "fh-test")) == 0
    policy = PolicyDocument.model_validate_json((tmp_path / "policy.json").read_text())
    assert policy.name == "fh-test" and policy.favourable == "action"
    report = json.loads((tmp_path / "report.json").read_text())
    assert report["policy_hash"] == content_hash(policy)
    assert set(report["groups"]) == {"millbrook", "quarry-hill", "saltmarsh"}
    targets = policy.targets
    assert targets is not None
    assert (targets.tolerance, targets.folds, targets.capacity) == (0.05, 5, None)
    assert report["folds"] == {
        "k": 5,
        "seed": 20261201,
        "stratified_by": ["group", "outcome"],
        "notes": [],
    }
    # Continuous scores: nine decile edges; each group's bins hold all its rows.
    assert targets.score_edges is not None and len(targets.score_edges) == 9
    for key, g in report["groups"].items():
        target = targets.groups[key]
        counts = target.out_of_sample
        assert counts is not None and target.score_counts is not None
        assert counts.n == g["n"] == target.n == sum(target.score_counts)
        # The promise is the ratio of the cross-fitted counts, and the report shows it.
        assert target.tpr == pytest.approx(counts.tp / counts.positives, rel=1e-12)
        assert target.fpr == pytest.approx(counts.fp / (counts.n - counts.positives), rel=1e-12)
        assert target.action_rate == pytest.approx((counts.tp + counts.fp) / counts.n, rel=1e-12)
        assert g["promised"]["tpr"]["value"] == pytest.approx(target.tpr, rel=1e-12)
        assert target.outside_promise is None
    # In sample, equal opportunity at tolerance 0.05 holds exactly.
    tprs = [g["in_sample"]["tpr"] for g in report["groups"].values()]
    assert max(tprs) - min(tprs) <= 0.05 + 1e-9
    assert targets.expected_cost == pytest.approx(report["expected_cost"])
    rows = report["price_of_parity"]["rows"]
    assert rows[0]["criterion"] == "max-utility" and rows[0]["price"] == 0.0
    assert [r["criterion"] for r in rows if r["chosen"]] == ["equal-opportunity"]
    chosen = next(r for r in rows if r["chosen"])
    assert chosen["cross_fitted_cost"] == pytest.approx(report["expected_cost"])
    assert chosen["cross_fitted_low"] < chosen["cross_fitted_cost"] < chosen["cross_fitted_high"]
    assert chosen["price"] == pytest.approx(
        chosen["cross_fitted_cost"] - rows[0]["cross_fitted_cost"]
    )
    assert [p["tolerance"] for p in report["frontier"]["points"]] == [0, 0.01, 0.02, 0.05, 0.1]
    # Cross-fitted intervals: Wilson 95% as computed by statsmodels proportion_confint
    # (Seabold & Perktold 2010), method "wilson", on the cross-fitted rate and its trials.
    for metric in ("action_rate", "tpr", "fpr"):
        r = chosen["groups"]["saltmarsh"][metric]
        low, high = proportion_confint(r["value"] * r["trials"], r["trials"], method="wilson")
        assert (r["low"], r["high"]) == pytest.approx((low, high), abs=1e-12)
    page = (tmp_path / "report.html").read_text()
    assert page.count("<svg") == 2 and "42 U.S.C. 2000e-2(l)" in page
    assert "Price of parity" in page and "common practice" in page
    assert not re.search(r"(src|href)=\"(https?:)?//", page)  # self-contained: nothing fetched
    table = capsys.readouterr().out
    assert "equal-opportunity" in table and "saltmarsh" in table and "price of parity" in table
    assert "5-fold cross-fitted" in table


def test_reference_group_capacity_and_folds_are_recorded(demo_csv: Path, tmp_path: Path) -> None:
    extra = ["--criterion", "four-fifths", "--reference-group", "quarry-hill"]
    extra += ["--capacity", "0.2", "--folds", "3", "--folds-seed", "7"]
    assert main(_argv(demo_csv, tmp_path, *extra)) == 0
    policy = PolicyDocument.model_validate_json((tmp_path / "policy.json").read_text())
    assert policy.targets is not None
    assert policy.targets.reference_group == "quarry-hill"
    assert (policy.targets.capacity, policy.targets.folds) == (0.2, 3)
    report = json.loads((tmp_path / "report.json").read_text())
    assert report["folds"]["seed"] == 7
    assert report["workload"]["in_sample"] <= 0.2 + 1e-9
    for row in report["price_of_parity"]["rows"]:
        assert row["workload_in_sample"] <= 0.2 + 1e-9
    # Four-fifths against the reference, with no slack: every in-sample ratio >= 0.8.
    rates = {k: g["in_sample"]["action_rate"] for k, g in report["groups"].items()}
    assert min(rates.values()) >= 0.8 * rates["quarry-hill"] - 1e-9


def test_a_fallback_group_missing_the_criterion_is_warned_about_and_recorded(
    demo_csv: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    extra = ["--group", "language", "--min-group-size", "300", "--fallback", "parent"]
    extra += ["--tolerance", "0.02"]
    assert main(_argv(demo_csv, tmp_path, *extra)) == 0
    policy = PolicyDocument.model_validate_json((tmp_path / "policy.json").read_text())
    assert policy.targets is not None
    outside = {k: g.outside_promise for k, g in policy.targets.groups.items() if g.outside_promise}
    assert outside, "the scenario should have a fallback group outside the promise"
    err = capsys.readouterr().err
    report = json.loads((tmp_path / "report.json").read_text())
    for key, reason in outside.items():
        assert policy.targets.groups[key] is not None
        assert report["groups"][key]["outside_promise"] == reason
        assert f"warning: group {key!r} is outside the equal-opportunity promise" in err
        assert "parent rule" in reason and "beyond the tolerance 0.02" in reason
    units = {u["rule"]: u for u in report["units"]}
    parents = [u for u in units.values() if u["kind"] == "parent"]
    assert parents
    for unit in parents:
        fitted, governed = set(unit["fitted_on"]["groups"]), set(unit["governs"]["groups"])
        assert governed < fitted  # fitted on the whole parent population


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
        (GOOD_HEADER + GOOD_ROWS, ["--tolerance", "-0.1"], "--tolerance -0.1: must be > 0"),
        (GOOD_HEADER + GOOD_ROWS, ["--tolerance", "0"], "--tolerance 0.0: must be > 0"),
        (GOOD_HEADER + GOOD_ROWS, ["--tolerance", "0.6"], "and <= 0.5"),
        (GOOD_HEADER + GOOD_ROWS, ["--tolerance", "nan"], "--tolerance nan: must be > 0"),
        (GOOD_HEADER + GOOD_ROWS, ["--capacity", "0"], "--capacity 0.0: must be > 0"),
        (GOOD_HEADER + GOOD_ROWS, ["--capacity", "1.5"], "and <= 1"),
        (GOOD_HEADER + GOOD_ROWS, ["--folds", "1"], "--folds 1: must be at least 2"),
        (GOOD_HEADER + GOOD_ROWS, ["--folds", "41"], "--folds 41: more folds than rows (40)"),
        (
            GOOD_HEADER + GOOD_ROWS,
            ["--reference-group", "z"],
            "--reference-group 'z' is not a group in the data (groups: a, b)",
        ),
        (
            GOOD_HEADER + GOOD_ROWS + "0.3,1,c\n0.4,0,c\n",
            ["--reference-group", "c", "--min-group-size", "10", "--fallback", "default"],
            "reference group 'c' uses the fallback rule 'default'",
        ),
        (
            GOOD_HEADER + GOOD_ROWS + "0.3,0,c\n0.4,0,c\n",
            ["--fallback", "default"],
            "default rule (for groups c) has no positive outcomes to fit on",
        ),
        (
            GOOD_HEADER + GOOD_ROWS.replace(",1,a", ",0,a", 9),
            ["--folds", "20"],
            "of 20, fitted on the other folds: group 'a' has no positive outcomes (y = 1)",
        ),
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


def test_an_internal_error_in_cross_fitting_is_one_line_exit_2(
    demo_csv: Path,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # Injected: the second fold's equal-opportunity solve fails its consistency check.
    calls = {"n": 0}

    def second_fold_fails(
        prepared: Prepared, criterion: Criterion, *args: Any, **kw: Any
    ) -> Solution:
        if criterion is Criterion.EQUAL_OPPORTUNITY:
            calls["n"] += 1
            if calls["n"] == 2:
                raise InternalDeriveError("the rule for 'saltmarsh' misses the LP point by 0.03")
        return solve(prepared, criterion, *args, **kw)

    monkeypatch.setattr(crossfit, "solve", second_fold_fails)
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    assert main(_argv(demo_csv, out_dir)) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err
    [line] = [x for x in err.splitlines() if x.startswith("evenhand: error")]
    assert line == (
        "evenhand: error: internal error in cross-fitting fold 2 of 5 (equal-opportunity): "
        "the rule for 'saltmarsh' misses the LP point by 0.03 (a defect in evenhand, not in "
        "the data; please report it)"
    )
    assert list(out_dir.iterdir()) == []


def test_tolerance_is_required(demo_csv: Path, tmp_path: Path) -> None:
    argv = _argv(demo_csv, tmp_path)
    i = argv.index("--tolerance")
    with pytest.raises(SystemExit) as exc:
        main(argv[:i] + argv[i + 2 :])
    assert exc.value.code == 2


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


def test_resamples_store_standard_errors_and_zero_skips_them(
    demo_csv: Path,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    first, second, third = tmp_path / "a", tmp_path / "b", tmp_path / "c"
    for d in (first, second, third):
        d.mkdir()
    monkeypatch.delenv("EVENHAND_PROGRESS", raising=False)
    assert main(_argv(demo_csv, first, "--resamples", "12", "--resamples-seed", "3")) == 0
    err = capsys.readouterr().err  # stderr is not a terminal here: no bar
    assert "12/12" not in err and "resamples:" not in err and "\r" not in err
    policy = PolicyDocument.model_validate_json((first / "policy.json").read_text())
    assert policy.targets is not None and policy.targets.resamples == 12
    for target in policy.targets.groups.values():
        assert target.standard_errors is not None and target.standard_errors.tpr is not None
    report = json.loads((first / "report.json").read_text())
    assert report["resamples"] == {
        "asked": 12,
        "used": 12,
        "seed": 3,
        "stratified_by": ["group"],
        "method": "error",
    }
    # Seeded: the same run writes the same document (here with the bar forced on: tqdm draws
    # every resample's step up to 12 of 12).
    monkeypatch.setenv("EVENHAND_PROGRESS", "1")
    assert main(_argv(demo_csv, second, "--resamples", "12", "--resamples-seed", "3")) == 0
    err = capsys.readouterr().err
    assert "resamples: 100%" in err and "12/12" in err
    monkeypatch.delenv("EVENHAND_PROGRESS")
    assert (first / "policy.json").read_bytes() == (second / "policy.json").read_bytes()
    assert main(_argv(demo_csv, third, "--resamples", "0")) == 0
    plain = PolicyDocument.model_validate_json((third / "policy.json").read_text())
    assert plain.targets is not None and plain.targets.resamples is None
    assert all(t.standard_errors is None for t in plain.targets.groups.values())
    assert json.loads((third / "report.json").read_text())["resamples"] is None
    assert main(_argv(demo_csv, tmp_path, "--resamples", "1")) == 2
    assert "--resamples 1" in capsys.readouterr().err


def test_a_resample_that_fails_is_left_out_with_a_warning(
    demo_csv: Path,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # Injected: the 8th equal-opportunity solve of the cross-fitting module fails its
    # consistency check: 5 folds and the in-sample row of the comparison come first, so it is
    # in the first bootstrap resample.
    calls = {"n": 0}

    def eighth_fails(prepared: Prepared, criterion: Criterion, *args: Any, **kw: Any) -> Solution:
        if criterion is Criterion.EQUAL_OPPORTUNITY:
            calls["n"] += 1
            if calls["n"] == 8:
                raise InternalDeriveError("the rule for 'saltmarsh' misses the LP point by 0.03")
        return solve(prepared, criterion, *args, **kw)

    monkeypatch.setattr(crossfit, "solve", eighth_fails)
    assert main(_argv(demo_csv, tmp_path, "--resamples", "6")) == 0
    err = capsys.readouterr().err
    assert "Traceback" not in err
    assert "1 of 6 bootstrap resamples could not be cross-fitted" in err
    assert "resample 1: internal error in cross-fitting fold 2 of 5" in err
    report = json.loads((tmp_path / "report.json").read_text())
    assert report["resamples"]["used"] == 5


def test_the_demo_sample_that_once_missed_the_lp_point_derives(tmp_path: Path) -> None:
    # Once an internal error in cross-fitting fold 5 (saltmarsh|es, a hull segment of slope 1
    # whose ends had float gains one unit in the last place apart); the small reproducer is in
    # tests/policy/test_level_hull_segments.py.
    csv = tmp_path / "cal.csv"
    assert main(["demo-data", "--rows", "20000", "--seed", "20261579", "--out", str(csv)]) == 0
    argv = _argv(csv, tmp_path, "--group", "language", "--min-group-size", "800")
    argv += ["--fallback", "parent", "--resamples", "0"]
    assert main(argv) == 0
