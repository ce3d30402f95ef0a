"""The one reading of attribute values (service.policy.attributes) and the group key built on it."""

from __future__ import annotations

import unicodedata
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st

from service.policy.attributes import (
    MAX_VALUE_CHARS,
    AttributeProblem,
    is_canonical,
    read_attribute,
)
from service.policy.document import PolicyDocument
from service.policy.errors import InvalidAttribute, MissingAttribute

NFD_E_ACUTE = "e\u0301"  # e + combining acute accent: NFC composes it to U+00E9
NBSP = "\u00a0"


@pytest.mark.parametrize(
    ("raw", "expected"),
    [
        ("en", "en"),
        (" en", "en"),
        ("en  ", "en"),
        (f"{NBSP}en{NBSP}", "en"),  # Unicode white space too (str.strip)
        ("TRUE", "TRUE"),  # letter case is kept
        ("true", "true"),
        ("1.0", "1.0"),  # text, never a number: "1.0" and "1" stay apart
        ("1", "1"),
        ("quarry hill", "quarry hill"),  # inner white space is kept
        (f"caf{NFD_E_ACUTE}", "caf\u00e9"),  # NFC (Unicode Standard Annex #15)
        ("Zürich", "Zürich"),
        ("x" * MAX_VALUE_CHARS, "x" * MAX_VALUE_CHARS),
    ],
)
def test_reading(raw: str, expected: str) -> None:
    assert read_attribute(raw) == expected
    assert is_canonical(expected)


@pytest.mark.parametrize(
    ("raw", "says"),
    [
        (True, 'the JSON boolean true: attribute values are strings (send "true"'),
        (False, "the JSON boolean false"),
        (1, 'the JSON number 1: attribute values are strings (send "1"'),
        (1.0, 'the JSON number 1.0: attribute values are strings (send "1.0"'),
        (None, "the JSON null"),
        (["en"], "a JSON array"),
        ({"a": "b"}, "a JSON object"),
        ("", "is empty"),
        ("   ", "is empty"),
        ("a|b", "contains '|'"),
        ("\x00en", "control character U+0000 at position 0"),
        ("\ten", "control character U+0009 at position 0"),  # refused, not trimmed
        ("en\n", "control character U+000A at position 2"),
        ("x" * (MAX_VALUE_CHARS + 1), f"longer than {MAX_VALUE_CHARS}"),
    ],
)
def test_refusals(raw: Any, says: str) -> None:
    with pytest.raises(AttributeProblem) as info:
        read_attribute(raw)
    assert says in str(info.value)


@given(st.text(max_size=80))
def test_reading_is_idempotent(raw: str) -> None:
    # A canonical value reads as itself: the API, the engine and the CSV loader may each read a
    # value again without moving it to another group.
    try:
        once = read_attribute(raw)
    except AttributeProblem:
        return
    assert read_attribute(once) == once
    assert once == unicodedata.normalize("NFC", once) and once == once.strip()


def _policy(known: list[str], attributes: list[str] | None = None) -> PolicyDocument:
    attrs = attributes or ["language"]
    return PolicyDocument.model_validate(
        {
            "name": "p",
            "score_meaning": "P(y)",
            "action_label": "act",
            "no_action_label": "wait",
            "favourable": "action",
            "costs": {"false_positive": 1, "false_negative": 4},
            "groups": {"attributes": attrs, "known": known},
            "rules": {k: {"steps": [{"from": 0.5, "probability": 1}]} for k in known},
        }
    )


def test_group_key_uses_the_reading() -> None:
    doc = _policy(["en", "caf\u00e9"])
    assert doc.group_key({"language": " en "}) == "en"
    assert doc.group_key({"language": f"caf{NFD_E_ACUTE}"}) == "caf\u00e9"
    with pytest.raises(InvalidAttribute, match="JSON boolean true") as info:
        doc.group_key({"language": True})
    assert info.value.field == "attributes.language"
    with pytest.raises(MissingAttribute):
        doc.group_key({})
    with pytest.raises(MissingAttribute):
        doc.group_key({"language": None})
    with pytest.raises(InvalidAttribute, match=r"contains '\|'"):
        doc.group_key({"language": "a|b"})


def test_group_key_length_is_bounded() -> None:
    attrs = [f"a{i}" for i in range(5)]
    doc = _policy(["x|x|x|x|x"], attrs)
    long = {a: "y" * MAX_VALUE_CHARS for a in attrs}  # 5 * 64 + 4 = 324 characters
    with pytest.raises(InvalidAttribute, match="longer than 256"):
        doc.group_key(long)


@pytest.mark.parametrize("value", [" en", "TRUE ", f"caf{NFD_E_ACUTE}", "a\x00", "x" * 65])
def test_known_groups_must_be_canonical(value: str) -> None:
    # A known group that no request could ever read into would silently never match.
    with pytest.raises(ValueError, match=r"groups\.known(\[0\]|\.0)"):
        _policy([value])
