"""Committed files under service/policies/ must match what the code generates today."""

from __future__ import annotations

import json
import shlex
from pathlib import Path
from typing import Any

import pytest

from service.cli.main import main
from service.policy.document import PolicyDocument
from service.policy.schema import schema_text

ROOT = Path(__file__).resolve().parents[2]

# The exact commands documented in docs/derive.md ("The demo policy").
DEMO_DATA = "demo-data --rows 20000 --seed 20261201 --out {csv}"
DEMO_DERIVE = (
    "derive {csv} --score score --outcome readmitted --group community --group language "
    "--criterion equal-opportunity --cost-fp 1 --cost-fn 4 --tolerance 0.05 --min-group-size 800 "
    "--fallback parent --favourable action --name fernhollow-follow-up "
    '--description "Fernhollow Community Health (fictional): offer a nurse follow-up visit '
    'after discharge to patients at high risk of readmission." '
    '--score-meaning "estimated probability of readmission within 30 days of discharge" '
    '--action-label "offer nurse follow-up" --no-action-label "standard discharge" '
    "--out {out} --report {report}"
)


def test_committed_schema_is_current() -> None:
    committed = (ROOT / "service" / "policies" / "schema.json").read_text(encoding="utf-8")
    assert committed == schema_text(), (
        "service/policies/schema.json is stale: "
        "run `evenhand schema --out service/policies/schema.json`"
    )


def _close(a: Any, b: Any) -> bool:
    if isinstance(a, float) or isinstance(b, float):
        return abs(float(a) - float(b)) <= 1e-9 * max(1.0, abs(float(b)))
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(_close(a[k], b[k]) for k in a)
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(_close(x, y) for x, y in zip(a, b, strict=True))
    return bool(a == b)


def test_demo_policy_is_reproducible_from_the_documented_commands(tmp_path: Path) -> None:
    docs = (ROOT / "docs" / "derive.md").read_text(encoding="utf-8")
    for arg in (
        "--min-group-size 800",
        "--fallback parent",
        "--criterion equal-opportunity",
        "--tolerance 0.05",
    ):
        assert arg in docs
    csv, out, report = tmp_path / "d.csv", tmp_path / "p.json", tmp_path / "r.json"
    assert main(shlex.split(DEMO_DATA.format(csv=csv))) == 0
    assert main(shlex.split(DEMO_DERIVE.format(csv=csv, out=out, report=report))) == 0
    fresh = json.loads(out.read_text())
    committed = json.loads(
        (ROOT / "service" / "policies" / "fernhollow-follow-up.json").read_text()
    )
    assert _close(fresh, committed), "service/policies/fernhollow-follow-up.json is stale"
    policy = PolicyDocument.model_validate(committed)
    assert policy.action_label == "offer nurse follow-up"
    assert policy.groups.fallback.use_parent


@pytest.mark.parametrize("name", ["fernhollow-follow-up.json"])
def test_committed_policies_validate(name: str) -> None:
    PolicyDocument.model_validate_json((ROOT / "service" / "policies" / name).read_text())
