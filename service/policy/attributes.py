"""The one reading of a case's attributes, and the text rules every stored string follows.

A case's attributes (``{"community": "millbrook", "language": "es"}``) decide its group, so the
scoring API, the policy engine (:meth:`PolicyDocument.group_key`) and the calibration CSV
loader of ``evenhand derive`` must read a value the same way, or a case derived in one group
is scored in another. :func:`read_attribute` is that reading, and the only one:

- a value is **text**: a JSON string, or a CSV cell. JSON booleans, numbers and null are
  refused, never converted: ``true`` would have to become ``"true"`` to match a CSV cell but
  Python spells it ``"True"``, and ``1.0`` has several spellings (``1``, ``1.0``, ``1e0``) that
  JSON does not keep apart, so no conversion rule could be exact;
- control characters (U+0000 to U+001F) are refused: PostgreSQL cannot store U+0000, and the
  others are never part of a category's name;
- the text is put in Unicode normal form NFC, so an accent typed as one code point or as a
  letter plus a combining mark is the same value (Unicode Standard Annex #15);
- surrounding whitespace is removed (``str.strip()``: spaces, no-break spaces and the other
  Unicode white space): CSV files are often written ``a, b``, and a value is never meant to
  differ from another by its padding;
- what remains must be non-empty, at most ``MAX_VALUE_CHARS`` characters, and free of the
  group separator ``|``.

Letter case is kept (``"TRUE"`` and ``"true"`` are different values), and so is everything
else: ``"1.0"`` stays ``"1.0"``.
"""

from __future__ import annotations

import re
import unicodedata
from functools import lru_cache

GROUP_SEPARATOR = "|"
"""Joins attribute values into a group key: ``quarry-hill|es``."""

MAX_ATTRIBUTES = 32
"""Most attributes in one request, and most attributes a policy groups by."""
MAX_NAME_CHARS = 64
"""Longest attribute name."""
MAX_VALUE_CHARS = 64
"""Longest attribute value (after the canonical reading)."""
MAX_GROUP_KEY_CHARS = 256
"""Longest group key: values joined by ``|`` (the decision log's ``group`` column holds 256)."""

TEXT_PATTERN = r"^[^\x00-\x1f]*$"
"""Text without control characters (U+0000 to U+001F), as a regular expression: the pattern
of every free-text field of the API and the policy document (documented in the OpenAPI
schema, checked by pydantic)."""
NAME_PATTERN = r"^[^\x00-\x1f]+$"
VALUE_PATTERN = r"^[^\x00-\x1f|]+$"

_CONTROL = re.compile(r"[\x00-\x1f]")


class AttributeProblem(ValueError):
    """Why a value is not an attribute value; the message names no attribute."""


def control_character(text: str) -> str | None:
    """A description of the first control character in ``text`` ("U+0000 at position 3"), or
    None when there is none."""
    found = _CONTROL.search(text)
    if found is None:
        return None
    return f"U+{ord(found.group()):04X} at position {found.start()}"


def _json_spelling(value: object) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    return repr(value)


@lru_cache(maxsize=8192)
def _read_text(value: str) -> str | AttributeProblem:
    # Cached: a deployment sees a few dozen distinct values millions of times. A problem is
    # returned, not raised, so it is cached too.
    bad = control_character(value)
    if bad is not None:
        return AttributeProblem(f"contains the control character {bad}, which is not accepted")
    text = unicodedata.normalize("NFC", value).strip()
    if not text:
        return AttributeProblem("is empty (or only white space)")
    if GROUP_SEPARATOR in text:
        return AttributeProblem(
            f"contains {GROUP_SEPARATOR!r}, which separates the values of a group key"
        )
    if len(text) > MAX_VALUE_CHARS:
        return AttributeProblem(f"is longer than {MAX_VALUE_CHARS} characters")
    return text


def read_attribute(value: object) -> str:
    """The canonical text of one attribute value (see the module docstring for the rule).

    Raises :class:`AttributeProblem` for anything that is not an attribute value.
    """
    if not isinstance(value, str):
        if isinstance(value, bool | int | float) or value is None:
            spelled = _json_spelling(value)
            kind = "null" if value is None else "boolean" if isinstance(value, bool) else "number"
            hint = "leave it out" if value is None else f'send "{spelled}" if that is the value'
            raise AttributeProblem(
                f"is the JSON {kind} {spelled}: attribute values are strings ({hint})"
            )
        kind = "array" if isinstance(value, list | tuple) else "object"
        raise AttributeProblem(f"is a JSON {kind}: attribute values are strings")
    result = _read_text(value)
    if isinstance(result, AttributeProblem):
        raise AttributeProblem(str(result))
    return result


def is_canonical(value: str) -> bool:
    """Whether ``value`` is already its own canonical reading (a value a group key can hold)."""
    try:
        return read_attribute(value) == value
    except AttributeProblem:
        return False
