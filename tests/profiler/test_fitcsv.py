"""The CSV behind `infercost fit`: reading, per-curve verdicts, and one-line errors naming row and column."""

from __future__ import annotations

import json

import numpy as np
import pytest

from profiler.errors import InputError
from profiler.fitcsv import JSON_KEYS, fit_csv, format_fit_rows, read_fit_csv


def _write(tmp_path, text, name="m.csv"):
    p = tmp_path / name
    p.write_text(text)
    return p


def test_two_curves_in_file_order(tmp_path):
    """Each label gets its verdict, in order of first appearance, with the --json keys first."""
    rows = ["curve,size,cost,censored"]
    for n in (4, 6, 8, 12, 16, 24, 32, 48, 64):
        rows.append(f"quad,{n},{3 * n * n},0")
    for n in range(4, 26, 2):
        rows.append(f"expo,{n},{1e-5 * 1.8 ** n:.6g},{int(n > 22)}")
    out = fit_csv(_write(tmp_path, "\n".join(rows) + "\n"))
    assert [d["curve"] for d in out] == ["quad", "expo"]
    assert list(out[0])[: len(JSON_KEYS)] == list(JSON_KEYS)
    assert out[0]["growth"] == "polynomial" and abs(out[0]["degree"] - 2) < 0.02
    assert out[1]["growth"] == "exponential" and out[1]["n_points"] == 11
    json.dumps(out, allow_nan=False)


def test_defaults_without_optional_columns(tmp_path):
    """No curve column: one curve labelled "all"; custom column names work."""
    text = "n,seconds\n" + "".join(f"{n},{n ** 1.5}\n" for n in (2, 4, 8, 16, 32, 64))
    data = read_fit_csv(_write(tmp_path, text), size="n", cost="seconds")
    assert list(data) == ["all"]
    n, y, c = data["all"]
    assert n.tolist() == [2, 4, 8, 16, 32, 64] and not c.any()
    assert np.allclose(y, n ** 1.5)


@pytest.mark.parametrize("body, row, column", [
    ("size,cost\n4,1\n5,abc\n", "row 3", "cost"),
    ("size,cost\n4,1\n0.5,2\n", "row 3", "size"),
    ("size,cost\n4,1\n5,-2\n", "row 3", "cost"),
    ("size,cost\n4,1\n5,0\n", "row 3", "cost"),
    ("size,cost\n4,1\n5,nan\n", "row 3", "cost"),
    ("size,cost,censored\n4,1,0\n5,2,maybe\n", "row 3", "censored"),
    ("size,cost\n4,1\n5\n", "row 3", "cost"),
])
def test_bad_cells_name_row_and_column(tmp_path, body, row, column):
    p = _write(tmp_path, body)
    with pytest.raises(InputError) as err:
        read_fit_csv(p)
    msg = str(err.value)
    assert str(p) in msg and row in msg and repr(column) in msg and "\n" not in msg


def test_missing_column_and_empty_file(tmp_path):
    with pytest.raises(InputError, match="'cost'"):
        read_fit_csv(_write(tmp_path, "size,time\n1,2\n"))
    with pytest.raises(InputError, match="empty file"):
        read_fit_csv(_write(tmp_path, ""))
    with pytest.raises(InputError, match="readable"):
        read_fit_csv(tmp_path / "absent.csv")


def test_table_rows_for_the_cli(tmp_path):
    """format_fit_rows gives one row of strings per curve, the estimate matching the class."""
    text = "size,cost\n" + "".join(f"{n},{2 * n ** 3}\n" for n in (4, 6, 8, 12, 16, 24, 32, 48))
    columns, rows = format_fit_rows(fit_csv(_write(tmp_path, text)))
    assert len(rows) == 1 and len(rows[0]) == len(columns)
    assert rows[0][1] == "polynomial" and rows[0][2].startswith("degree 3")
    assert all(isinstance(x, str) for x in rows[0])


def test_nul_bytes_are_input_error(tmp_path):
    p = tmp_path / "nul.csv"
    p.write_bytes(b"size,cost\n1,\x002\n")
    with pytest.raises(InputError):
        read_fit_csv(p)
