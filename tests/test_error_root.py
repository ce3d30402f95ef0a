"""One error root: every refusal (the service's, the policy engine's, the CLI's) is a
``ServiceError``, answered by one mapping to HTTP and one to the CLI."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from service.api.errors import service_error_response
from service.cli.common import CliError
from service.cli.main import main
from service.errors import ServiceError
from service.policy.errors import PolicyError, UnknownGroup
from service.policy.units import DeriveError
from service.policy.values import MAX_TOLERANCE, checked_tolerance


def test_policy_errors_are_refusals_answered_422_in_the_one_shape() -> None:
    error = UnknownGroup("no rule for group 'west'", "attributes.region")
    assert isinstance(error, ServiceError)
    assert isinstance(error, ValueError)  # pydantic validators may raise it
    response = service_error_response(error)
    assert response.status_code == 422
    assert json.loads(response.body) == {
        "error": {
            "code": "unknown_group",
            "message": "no rule for group 'west'",
            "field": "attributes.region",
            "details": [],
        }
    }


def test_every_refusal_class_derives_from_the_root() -> None:
    for kind in (PolicyError, DeriveError, CliError):
        assert issubclass(kind, ServiceError), kind


def test_an_engine_refusal_reaches_the_cli_mapping_unconverted(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # A group without negative outcomes: the derive engine's own DeriveError, caught nowhere
    # in the command; main prints it as one line with its code and exits 2.
    csv = tmp_path / "in.csv"
    csv.write_text("score,readmitted,community\n" + "0.5,1,a\n0.4,1,a\n0.3,1,a\n0.2,1,a\n")
    argv = ["derive", str(csv), "--score", "score", "--outcome", "readmitted"]
    argv += ["--group", "community", "--criterion", "equal-opportunity", "--cost-fp", "1"]
    argv += ["--cost-fn", "1", "--tolerance", "0.05", "--folds", "2"]
    argv += ["--min-group-size", "1"]
    argv += ["--out", str(tmp_path / "p.json"), "--report", str(tmp_path / "r.json")]
    assert main(argv) == 2
    lines = capsys.readouterr().err.strip().splitlines()
    assert lines[-1].startswith("evenhand: error: ") and lines[-1].endswith("(derive_error)")


def test_a_month_argument_is_parsed_at_the_edge(capsys: pytest.CaptureFixture[str]) -> None:
    # Refused while the arguments are read, before any database is opened.
    assert main(["report", "show", "--policy", "p", "--month", "2026-13"]) == 2
    assert capsys.readouterr().err.strip() == (
        "evenhand: error: month '2026-13' is not of the form YYYY-MM (invalid_input)"
    )


@pytest.mark.parametrize("value", [0.0, -0.1, MAX_TOLERANCE + 1e-9, float("nan"), float("inf")])
def test_a_tolerance_outside_its_bounds_is_refused(value: float) -> None:
    with pytest.raises(PolicyError) as refused:
        checked_tolerance(value)
    assert refused.value.code == "invalid_tolerance"


@pytest.mark.parametrize("value", [1e-9, 0.05, MAX_TOLERANCE])
def test_a_tolerance_within_its_bounds_is_kept(value: float) -> None:
    assert checked_tolerance(value) == value
