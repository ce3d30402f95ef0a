"""The fast reading of calibration CSV files: pyarrow's columnar CSV reader.

:func:`read_columnar` gives exactly what the row-by-row reader
(:func:`service.cli.calibration_csv.load_calibration`) gives for a file both accept, or
``None`` whenever it cannot vouch for that: a file it cannot parse, a header it cannot match
by the same rule, a value outside what the row reader accepts (a score outside [0, 1] or not
finite, an outcome other than ``0`` or ``1``, a group cell the attribute reading refuses), no
data rows. The row reader then reads the file again and either succeeds or names the line and
column at fault, so a user's file never gets a different answer or a vaguer error from this
path.

Why the answers agree on the files it accepts: both read RFC 4180 CSV with ``,`` and ``"``
(doubled quotes escaping a quote) and skip empty lines; the whole file is checked to be UTF-8
(as the row reader decodes it all, unused columns included), a leading byte-order mark is
dropped as ``utf-8-sig`` does; scores are parsed to the correctly rounded double (Python's
``float`` and Arrow's parser both round correctly; a text only one of them accepts makes the
file fall back) and surrounding white space is ignored by both; outcomes are compared as
exact text; every distinct group cell is read by the same
:func:`service.policy.attributes.read_attribute`, and the groups are numbered in the sorted
order of their keys.
"""

from __future__ import annotations

import codecs
import math
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

from service.policy.attributes import GROUP_SEPARATOR, AttributeProblem, read_attribute
from service.policy.units import CalibrationData


def read_columnar(
    path: Path, score: str, outcome: str, group_columns: list[str]
) -> CalibrationData | None:
    """The calibration data of ``path``, or ``None`` to leave the file to the row reader."""
    try:
        raw = path.read_bytes()
    except OSError:
        return None
    if raw.startswith(codecs.BOM_UTF8):
        raw = raw[len(codecs.BOM_UTF8) :]
    if not raw.isascii():
        try:
            raw.decode("utf-8")
        except UnicodeDecodeError:
            return None
    table = _read_table(raw, score, outcome, group_columns)
    if table is None or table.num_rows == 0:
        return None
    scores = table.column(0).to_numpy()
    if scores.dtype != np.float64 or not _scores_valid(scores):
        return None
    outcomes = _outcomes(table.column(1))
    if outcomes is None:
        return None
    group_codes: list[npt.NDArray[np.intp]] = []
    group_values: list[list[str]] = []
    for i in range(len(group_columns)):
        read = _group_column(table.column(2 + i))
        if read is None:
            return None
        group_values.append(read[0])
        group_codes.append(read[1])
    if math.prod(len(v) for v in group_values) >= 2**62:
        return None
    keys, codes = _group_keys(group_values, group_codes)
    return CalibrationData(np.ascontiguousarray(scores), outcomes, codes, keys, list(group_columns))


def _read_table(raw: bytes, score: str, outcome: str, group_columns: list[str]) -> Any:
    """The wanted columns as an Arrow table (score, outcome, groups, in that order)."""
    import pyarrow as pa
    import pyarrow.csv as pa_csv

    header = _header(raw)
    if header is None:
        return None
    stripped = [name.strip() for name in header]
    wanted = [score, outcome, *group_columns]
    if (
        len(set(stripped)) != len(stripped)
        or len(set(wanted)) != len(wanted)
        or any(c not in stripped for c in wanted)
    ):
        return None  # the row reader takes the first of equal names, or names the missing one
    names = [header[stripped.index(c)] for c in wanted]
    text = pa.dictionary(pa.int32(), pa.string())
    types = {names[0]: pa.float64(), **{n: text for n in names[1:]}}
    try:
        return pa_csv.read_csv(
            pa.py_buffer(raw),
            read_options=pa_csv.ReadOptions(column_names=header, skip_rows=1, use_threads=False),
            parse_options=pa_csv.ParseOptions(newlines_in_values=True),
            convert_options=pa_csv.ConvertOptions(
                column_types=types,
                include_columns=names,
                null_values=[],
                strings_can_be_null=False,
                quoted_strings_can_be_null=False,
            ),
            memory_pool=pa.system_memory_pool(),
        )
    except (pa.ArrowException, ValueError, OSError):
        return None


def _header(raw: bytes) -> list[str] | None:
    """The header cells, when the header is one line without quotes (else ``None``)."""
    end = len(raw)
    for mark in (b"\n", b"\r"):
        found = raw.find(mark)
        if found != -1:
            end = min(end, found)
    line = raw[:end]
    if b'"' in line or not line.strip():
        return None
    return line.decode("utf-8").split(",")


def _scores_valid(scores: npt.NDArray[np.float64]) -> bool:
    return bool(np.all((scores >= 0.0) & (scores <= 1.0)))  # NaN fails both


def _dictionary(column: Any) -> tuple[list[str], npt.NDArray[np.int32]]:
    """The distinct texts of a dictionary-encoded column and each row's index into them."""
    column = column.unify_dictionaries()
    values: list[str] = column.chunk(0).dictionary.to_pylist()
    indices = np.concatenate([chunk.indices.to_numpy() for chunk in column.chunks])
    return values, indices


def _outcomes(column: Any) -> npt.NDArray[np.int8] | None:
    values, indices = _dictionary(column)
    if not set(values) <= {"0", "1"}:
        return None
    lookup = np.array([1 if v == "1" else 0 for v in values], dtype=np.int8)
    out: npt.NDArray[np.int8] = lookup[indices]
    return out


def _group_column(column: Any) -> tuple[list[str], npt.NDArray[np.intp]] | None:
    """The distinct canonical values of a group column and each row's index into them."""
    values, indices = _dictionary(column)
    canonical: list[str] = []
    for cell in values:
        try:
            canonical.append(read_attribute(cell))
        except AttributeProblem:
            return None
    distinct = sorted(set(canonical))
    position = {v: i for i, v in enumerate(distinct)}
    lookup = np.array([position[v] for v in canonical], dtype=np.intp)
    return distinct, lookup[indices]


def _group_keys(
    values: list[list[str]], codes: list[npt.NDArray[np.intp]]
) -> tuple[list[str], npt.NDArray[np.intp]]:
    """The sorted group keys (values joined by ``|``) and each row's index into them."""
    combined = np.zeros(len(codes[0]), dtype=np.int64)  # mixed radix: < 2**63 (checked)
    for column_values, column_codes in zip(values, codes, strict=True):
        combined = combined * len(column_values) + column_codes
    present, inverse = np.unique(combined, return_inverse=True)
    keys: list[str] = []
    for number in present.tolist():
        parts = []
        for column_values in reversed(values):
            number, index = divmod(number, len(column_values))
            parts.append(column_values[index])
        keys.append(GROUP_SEPARATOR.join(reversed(parts)))
    order = sorted(range(len(keys)), key=keys.__getitem__)
    rank = np.empty(len(keys), dtype=np.intp)
    rank[order] = np.arange(len(keys), dtype=np.intp)
    return [keys[i] for i in order], rank[inverse.reshape(-1)]
