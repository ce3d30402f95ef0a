"""Derivation and scoring read a record's attributes the same way: the same group.

A record read from CSV by the loader of ``evenhand derive`` and the same record sent to the
scoring API land in the same group key (service.policy.attributes is the one reading); what
one refuses, the other refuses too.
"""

from __future__ import annotations

import csv
import re
from collections.abc import Callable
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from service.cli.calibration_csv import load_calibration
from service.cli.common import CliError
from tests.helpers import bearer, make_policy, make_request

NFD_E = "e\u0301"  # e + combining acute: NFC makes it U+00E9
# (language cell, flag cell) exactly as a records system writes them.
RECORDS = [
    (" en", "TRUE"),
    ("en", "1.0"),
    ("en", "1"),
    ("en ", "true"),
    (f"caf{NFD_E}", "TRUE"),
    ("caf\u00e9", "1.0"),
    ("Zürich\u00a0", "1"),
    ("\u00a0es", "true"),
]


def _csv(tmp_path: Path, rows: list[tuple[str, str]]) -> Path:
    path = tmp_path / "records.csv"
    with path.open("w", newline="", encoding="utf-8") as f:
        out = csv.writer(f)
        out.writerow(["score", "outcome", "language", "flag"])
        for i, (language, flag) in enumerate(rows):
            out.writerow([f"0.{i + 1}", i % 2, language, flag])
    return path


def test_csv_and_api_give_the_same_group(
    tmp_path: Path,
    client: TestClient,
    tokens: dict[str, str],
    publish: Callable[..., int],
) -> None:
    data = load_calibration(_csv(tmp_path, RECORDS), "score", "outcome", ["language", "flag"])
    derived = [data.group_keys[c] for c in data.group_codes]
    # Padding and Unicode forms fold; case and spelling ("TRUE"/"true", "1"/"1.0") do not.
    assert derived[:4] == ["en|TRUE", "en|1.0", "en|1", "en|true"]
    assert derived[4:6] == ["caf\u00e9|TRUE", "caf\u00e9|1.0"]
    assert derived[6:] == ["Zürich|1", "es|true"]
    known = sorted(set(derived))
    rule = {"steps": [{"from": 0.5, "probability": 1.0}]}
    publish(
        make_policy(
            name="reading",
            groups={
                "attributes": ["language", "flag"],
                "known": known,
                "fallback": {"unknown_groups": "refuse"},
            },
            rules=dict.fromkeys(known, rule),
        )
    )
    h = bearer(tokens["scoring"])
    for (language, flag), key in zip(RECORDS, derived, strict=True):
        body = make_request(policy="reading", attributes={"language": language, "flag": flag})
        r = client.post("/v1/recommendations", json=body, headers=h)
        assert r.status_code == 201, r.text
        assert r.json()["group"] == key

    # JSON booleans and numbers are not read as "true"/"1.0": the API says to send a string.
    for value in (True, 1.0, 1):
        body = make_request(policy="reading", attributes={"language": "en", "flag": value})
        r = client.post("/v1/recommendations", json=body, headers=h)
        assert r.status_code == 422, r.text
        err = r.json()["error"]
        assert err["field"] == "attributes.flag"
        assert "attribute values are strings" in err["message"]

    # A missing value is refused by both.
    body = make_request(policy="reading", attributes={"language": "en"})
    r = client.post("/v1/recommendations", json=body, headers=h)
    assert r.status_code == 422
    assert (r.json()["error"]["code"], r.json()["error"]["field"]) == (
        "missing_attribute",
        "attributes.flag",
    )
    with pytest.raises(CliError, match="line 3: column 'flag' is empty"):
        load_calibration(
            _csv(tmp_path, [("en", "TRUE"), ("en", "  ")]), "score", "outcome", ["language", "flag"]
        )


@pytest.mark.parametrize(
    ("cell", "says"),
    [("a|b", "contains '|'"), ("\ten", "control character U+0009"), ("x" * 65, "longer than 64")],
)
def test_csv_refuses_what_the_api_refuses(
    tmp_path: Path, client: TestClient, tokens: dict[str, str], cell: str, says: str
) -> None:
    with pytest.raises(CliError, match=f"line 2: column 'language' .*{re.escape(says)}"):
        load_calibration(_csv(tmp_path, [(cell, "TRUE")]), "score", "outcome", ["language", "flag"])
    body = make_request(attributes={"region": "north", "language": cell})
    r = client.post("/v1/recommendations", json=body, headers=bearer(tokens["scoring"]))
    assert r.status_code == 422 and r.json()["error"]["field"] == "attributes.language"
    assert says in r.json()["error"]["message"]
