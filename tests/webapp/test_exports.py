"""Tests for webapp.services.exports: spreadsheet formula injection is neutralised, numbers stay numbers."""

import io

import numpy as np
import openpyxl
import pandas as pd
import pytest

from webapp.services.exports import neutralise_formula, to_csv_bytes, to_xlsx_bytes, write_csv

# OWASP "CSV Injection" / ASVS 5.0 requirement 1.2.10: text cells beginning with = + - @ tab or carriage return are
# prefixed with a single quote.
TRIGGERS = ["=SUM(A1:A2)", "+1+1", "-2+3", "@cmd", "\tx", "\rx"]


@pytest.mark.parametrize("text", TRIGGERS)
def test_trigger_characters_get_a_quote(text):
    assert neutralise_formula(text) == "'" + text


@pytest.mark.parametrize("value", ["plain", "a=b", "", " =x", 3, -2.5, True, None])
def test_everything_else_is_unchanged(value):
    assert neutralise_formula(value) == value or (value != value)


def _frame():
    return pd.DataFrame(
        {
            "sample": ["=HYPERLINK(\"http://x\")", "ok", "-5"],
            "group": pd.Series(["@a", None, "b"], dtype="object"),
            "score": [-1.25, 0.5, np.nan],
            "flag": [True, False, True],
            "=bad": [1, 2, 3],
        }
    )


def test_csv_text_is_neutralised_and_numbers_are_not():
    text = to_csv_bytes(_frame()).decode("utf-8")
    back = pd.read_csv(io.StringIO(text), keep_default_na=False)
    assert list(back.columns) == ["sample", "group", "score", "flag", "'=bad"]
    assert list(back["sample"]) == ["'=HYPERLINK(\"http://x\")", "ok", "'-5"]
    assert list(back["group"]) == ["'@a", "", "b"]
    assert back.loc[0, "score"] == "-1.25"  # written as a number, not as "'-1.25"
    assert text.splitlines()[1].endswith(",-1.25,True,1")


def test_write_csv_writes_the_same_bytes(tmp_path):
    path = tmp_path / "out.csv"
    write_csv(_frame(), path)
    assert path.read_bytes() == to_csv_bytes(_frame())
    assert [p.name for p in tmp_path.iterdir()] == ["out.csv"]  # no temporary file left behind


def test_xlsx_cells_are_text_or_numbers_never_formulas():
    # openpyxl reads a cell starting with "=" as a formula (data_type "f"); neutralised cells must be strings.
    book = openpyxl.load_workbook(io.BytesIO(to_xlsx_bytes(_frame())))
    sheet = book["data"]
    cells = list(sheet.iter_rows(values_only=False))
    assert all(cell.data_type != "f" for row in cells for cell in row)
    assert sheet["A2"].value == "'=HYPERLINK(\"http://x\")"
    assert sheet["C2"].value == -1.25 and sheet["C2"].data_type == "n"
    assert sheet["E1"].value == "'=bad"
