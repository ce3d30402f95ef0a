"""Reading calibration data from CSV, with one-line errors that name the line and column.

Group cells are read by :func:`service.policy.attributes.read_attribute`, the reading the
scoring API applies to a request's attributes, so a record derived in one group is scored in
the same group (surrounding white space removed, NFC, case kept; control characters, ``|`` and
empty cells refused).
"""

from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np
import numpy.typing as npt

from service.cli.common import CliError
from service.policy.attributes import GROUP_SEPARATOR, AttributeProblem, read_attribute
from service.policy.units import CalibrationData


def load_calibration(
    path: Path, score: str, outcome: str, group_columns: list[str]
) -> CalibrationData:
    """Score in [0, 1], outcome 0/1 and the group columns of every row of ``path``.

    Read by pyarrow's columnar reader (:mod:`service.cli.calibration_columnar`) when it
    can vouch for giving the same answer; otherwise, and for every error message, row by row
    with the standard library's ``csv`` module.
    """
    from service.cli.calibration_columnar import read_columnar

    fast = read_columnar(path, score, outcome, group_columns)
    if fast is not None:
        return fast
    return read_rows(path, score, outcome, group_columns)


def read_rows(path: Path, score: str, outcome: str, group_columns: list[str]) -> CalibrationData:
    """The row-by-row reading: every check, with the line and column of the first problem."""
    wanted = [score, outcome, *group_columns]
    try:
        f = path.open(newline="", encoding="utf-8-sig")
    except OSError as exc:
        raise CliError(f"{path}: cannot read: {exc.strerror}") from exc
    with f:
        reader = csv.reader(f)
        try:
            header = next(reader, None)
            if header is None:
                raise CliError(f"{path}: the file is empty")
            header = [h.strip() for h in header]
            for col in wanted:
                if col not in header:
                    raise CliError(
                        f"{path}: column {col!r} not found (columns: {', '.join(header)})"
                    )
            index = [header.index(col) for col in wanted]
            columns: list[list[str]] = [[] for _ in wanted]
            lines: list[int] = []
            for row in reader:
                if not row or all(not cell.strip() for cell in row):
                    continue  # blank line
                if len(row) != len(header):
                    raise CliError(
                        f"{path}: line {reader.line_num}: {len(row)} fields, "
                        f"the header has {len(header)}"
                    )
                for column, i in zip(columns, index, strict=True):
                    column.append(row[i])
                lines.append(reader.line_num)
        except csv.Error as exc:
            raise CliError(f"{path}: line {reader.line_num}: {exc}") from exc
        except UnicodeDecodeError as exc:
            raise CliError(f"{path}: not UTF-8 text ({exc.reason})") from exc
    if not lines:
        raise CliError(f"{path}: no data rows below the header")

    scores = _scores(path, score, [v.strip() for v in columns[0]], lines)
    outcomes = _outcomes(path, outcome, [v.strip() for v in columns[1]], lines)
    groups = [
        _group_values(path, col, cells, lines)
        for col, cells in zip(group_columns, columns[2:], strict=True)
    ]
    keys = [GROUP_SEPARATOR.join(parts) for parts in zip(*groups, strict=True)]
    known = sorted(set(keys))
    code_of = {k: c for c, k in enumerate(known)}
    codes = np.fromiter((code_of[k] for k in keys), dtype=np.intp, count=len(keys))
    return CalibrationData(scores, outcomes, codes, known, list(group_columns))


def _group_values(path: Path, col: str, cells: list[str], lines: list[int]) -> list[str]:
    """The canonical reading of every cell of a group column (each distinct cell read once)."""
    canonical: dict[str, str] = {}
    problems: dict[str, AttributeProblem] = {}
    for cell in set(cells):
        try:
            canonical[cell] = read_attribute(cell)
        except AttributeProblem as exc:
            problems[cell] = exc
    if problems:
        i = next(i for i, cell in enumerate(cells) if cell in problems)
        shown = "" if not cells[i].strip() else f" ({cells[i]!r})"
        raise CliError(f"{path}: line {lines[i]}: column {col!r}{shown} {problems[cells[i]]}")
    return [canonical[cell] for cell in cells]


def _scores(path: Path, col: str, values: list[str], lines: list[int]) -> npt.NDArray[np.float64]:
    try:
        scores = np.array(values, dtype=np.float64)
    except ValueError:
        for i, v in enumerate(values):
            try:
                float(v)
            except ValueError:
                raise CliError(
                    f"{path}: line {lines[i]}: column {col!r}: {v!r} is not a number"
                ) from None
        raise
    bad = ~(np.isfinite(scores) & (scores >= 0.0) & (scores <= 1.0))
    if bad.any():
        i = int(np.argmax(bad))
        what = "is not a number" if math.isnan(scores[i]) else "is outside [0, 1]"
        raise CliError(f"{path}: line {lines[i]}: column {col!r}: {values[i]!r} {what}")
    return scores


def _outcomes(path: Path, col: str, values: list[str], lines: list[int]) -> npt.NDArray[np.int8]:
    arr = np.array(values)
    ones = arr == "1"
    bad = ~(ones | (arr == "0"))
    if bad.any():
        i = int(np.argmax(bad))
        raise CliError(f"{path}: line {lines[i]}: column {col!r}: {values[i]!r} is not 0 or 1")
    out: npt.NDArray[np.int8] = ones.astype(np.int8)
    return out
