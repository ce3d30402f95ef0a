"""The columnar CSV reading gives what the row reader gives, or leaves the file to it.

The reference is :func:`read_rows`: Python's ``csv`` module (RFC 4180 dialect) and ``float``
(correctly rounded, IEEE 754). Every file the columnar path accepts must give arrays equal
element for element; every file it declines (``None``) still gets the row reader's answer or
its one-line error from ``load_calibration``.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from service.cli.calibration_columnar import read_columnar
from service.cli.calibration_csv import load_calibration, read_rows
from service.cli.common import CliError
from service.demo.fernhollow import generate


def _same(a: object, b: object) -> None:
    for field in ("scores", "outcomes", "group_codes"):
        x, y = getattr(a, field), getattr(b, field)
        assert x.dtype == y.dtype, field
        assert np.array_equal(x, y), field
    assert a.group_keys == b.group_keys  # type: ignore[attr-defined]
    assert a.attributes == b.attributes  # type: ignore[attr-defined]


def _write(tmp_path: Path, content: bytes) -> Path:
    path = tmp_path / "data.csv"
    path.write_bytes(content)
    return path


def test_demo_file_reads_the_same(tmp_path: Path) -> None:
    cases = generate(3000, seed=11, id_prefix="t")
    lines = ["case_id,score,readmitted,community,language"]
    lines += [
        f"{cases.case_id[i]},{float(cases.score[i])!r},{i % 3 % 2},{cases.community[i]},"
        f"{cases.language[i]}"
        for i in range(3000)
    ]
    path = _write(tmp_path, ("\n".join(lines) + "\n").encode())
    fast = read_columnar(path, "score", "readmitted", ["community", "language"])
    assert fast is not None
    _same(fast, read_rows(path, "score", "readmitted", ["community", "language"]))
    assert len(fast.group_keys) > 3  # an intersection of two columns


ACCEPTED = [
    b"\xef\xbb\xbfs,y,g\n0.5,1,a\n0.25,0,b\n",  # byte-order mark
    b"s,y,g\r\n0.5,1,a\r\n0.1,0,b\r\n",  # CRLF
    b's , y,g\n 0.5 ,1,"a"\n.5,0,"b,c"\n',  # header and score padding, quoted cells
    b"s,y,g\n1e-1,1,a\n\n\n0.30000000000000004,0,a\n1,1,b\n0,0,b\n",  # blank lines, exponent
    b"s,y,g\n0.5,1,  caf\xc3\xa9  \n0.5,0,cafe\xcc\x81\n",  # NFC and stripping of groups
    b'x,s,y,g\n\xc3\xa9,0.5,1,a\n"q""q",0.75,0,a\n',  # UTF-8 and quotes in other columns
]


@pytest.mark.parametrize("content", ACCEPTED)
def test_small_files_read_the_same(tmp_path: Path, content: bytes) -> None:
    path = _write(tmp_path, content)
    fast = read_columnar(path, "s", "y", ["g"])
    assert fast is not None
    _same(fast, read_rows(path, "s", "y", ["g"]))


DECLINED = [
    b"",  # empty
    b"s,y,g\n",  # no rows
    b"s,y,s,g\n0.5,1,0.4,a\n",  # two columns of one name: the row reader takes the first
    b"s,y,g\n1.5,1,a\n",  # score outside [0, 1]
    b"s,y,g\nnan,1,a\n",  # not a number
    b"s,y,g\n1_0,1,a\n",  # a text float() reads and Arrow does not
    b"s,y,g\n0.5, 1,a\n",  # outcome padded: the row reader strips it
    b"s,y,g\n0.5,01,a\n",  # outcome not exactly 0 or 1
    b"s,y,g\n0.5,1,a|b\n",  # a group cell the attribute reading refuses
    b"s,y,g\n0.5,1,\n",  # empty group cell
    b"s,y,g\n0.5,1\n",  # short row
    b" , , \ns,y,g\n",  # header not where expected
    b"x,s,y,g\n\xff,0.5,1,a\n",  # not UTF-8 in a column not read
    b'"s",y,g\n0.5,1,a\n',  # quoted header: left to the row reader
    b"s,y,g\n0.5,1,a\n , , \n",  # a row of blanks: the row reader skips it
]


@pytest.mark.parametrize("content", DECLINED)
def test_declined_files_get_the_row_readers_answer(tmp_path: Path, content: bytes) -> None:
    path = _write(tmp_path, content)
    assert read_columnar(path, "s", "y", ["g"]) is None
    try:
        expected = read_rows(path, "s", "y", ["g"])
    except CliError as exc:
        with pytest.raises(CliError) as caught:
            load_calibration(path, "s", "y", ["g"])
        assert str(caught.value) == str(exc)
    else:
        _same(load_calibration(path, "s", "y", ["g"]), expected)


def test_missing_file_is_the_row_readers_error(tmp_path: Path) -> None:
    with pytest.raises(CliError, match="cannot read"):
        load_calibration(tmp_path / "absent.csv", "s", "y", ["g"])
