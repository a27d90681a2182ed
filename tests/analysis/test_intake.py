"""Intake of realistic messy files, each parsed back to the numbers that were written.

Every file is made here, from a known table of numbers, in the way a lab or
survey tool would write it (delimiters, decimal marks, encodings, title rows,
units rows, detection limits, missing markers). The expected values are the
numbers we wrote, never intake's own output.

Conventions checked are facts of the trade (common practice): European lab
exports write ';' and a decimal comma; "<0.05" is a value below a detection
limit, replaced by LOD/2 or LOD/sqrt(2) for multivariate screening.
"""

from __future__ import annotations

import codecs
import io
import math
import re

import numpy as np
import openpyxl
import pytest

from analysis.errors import InputError
from analysis.intake import IntakeError, IntakeReport, read_path, read_table
from analysis.table import Table

IDS = ["QC-001", "QC-002", "QC-003", "QC-004", "QC-005"]
SITES = ["Basin A", "Basin B", "Basin A", "Basin C", "Basin B"]
VARIABLES = ["Lead µg/L", "Cadmium µg/L", "Turbidity NTU"]
VALUES = np.array(
    [
        [12.5, 0.31, 1234.5],
        [0.75, 0.08, 987.25],
        [3.0, 1.2, 15.0],
        [101.25, 0.5, 2500.0],
        [7.125, 0.02, 0.5],
    ]
)


def _eu(x: float) -> str:
    """A number as a European LIMS writes it: decimal comma, '.' grouping thousands."""
    whole, _, frac = f"{x:.6f}".rstrip("0").rstrip(".").partition(".")
    grouped = f"{int(whole):,}".replace(",", ".")
    return grouped + ("," + frac if frac else "")


def _check_table(table: Table, values=VALUES, ids=IDS, variables=VARIABLES):
    assert table.sample_ids == ids
    assert table.variables == variables
    np.testing.assert_allclose(table.values, values, rtol=0, atol=1e-12)


# --- the corpus ---------------------------------------------------------------------------


def test_european_lims_export_semicolon_decimal_comma_thousands_and_comments():
    # common practice: ';' delimiter, ',' decimal mark, '.' thousands, comment lines on top.
    lines = ["# LIMS export, lab 2", "# exported by: system"]
    lines.append(";".join(["Sample ID", "Site", *VARIABLES]))
    for sid, site, row in zip(IDS, SITES, VALUES):
        lines.append(";".join([sid, site, *(_eu(v) for v in row)]))
    raw = ("\r\n".join(lines) + "\r\n").encode("utf-8")
    table, report = read_table(raw, "lims_export.csv")
    _check_table(table)
    assert table.metadata["Site"].tolist() == SITES
    assert table.id_column == "Sample ID"
    assert (report.delimiter, report.decimal, report.header_row) == (";", ",", 3)
    assert report.roles == {"Sample ID": "id", "Site": "metadata", **{v: "variable" for v in VARIABLES}}


def test_survey_export_with_units_row_and_missing_markers():
    header = "respondent,age,income,score"
    units = ",years,EUR,points"
    rows = ["R1,34,\"52,000\",7", "R2,NA,\"48,500.50\",8", "R3,29,N/A,-", "R4,41,\"61,250\",9", "R5,?,\"39,900\",6"]
    raw = "\n".join([header, units, *rows]).encode()
    table, report = read_table(raw, "survey.csv")
    expected = np.array(
        [[34, 52000, 7], [np.nan, 48500.5, 8], [29, np.nan, np.nan], [41, 61250, 9], [np.nan, 39900, 6]], dtype=float
    )
    _check_table(table, expected, ["R1", "R2", "R3", "R4", "R5"], ["age", "income", "score"])
    assert report.units == {"age": "years", "income": "EUR", "score": "points"}
    assert report.missing_counts == {"age": 2, "income": 1, "score": 1}
    # header = row 1, units = row 2, so the first sample is spreadsheet row 3
    raw_bad = "\n".join([header, units, "R1,34,1,oops", *rows[1:]]).encode()
    with pytest.raises(IntakeError, match=r"row 3, column 'score' \(D\): 'oops'"):
        read_table(raw_bad, "survey.csv")


def test_units_row_found_when_many_cells_below_are_missing_markers():
    # Missing markers say nothing about a column's type (common practice in lab exports): a third of
    # the cells being "NA" must not hide the units row. Found by the fuzz test of lab export habits.
    rows = [f"W{i:02d},1.00,1.00" for i in range(8)] + [f"W{i:02d},NA,NA" for i in range(8, 12)]
    raw = "\n".join(["Sample,P0,P1", ",mg/L,mg/L", *rows]).encode()
    table, report = read_table(raw, "habits.csv")
    assert report.units == {"P0": "mg/L", "P1": "mg/L"}
    assert table.n_samples == 8 and np.all(table.values == 1.0)


def test_spreadsheet_title_row_above_header_counts_in_row_numbers():
    lines = ["Water quality, quarter 3,,,,", ",,,,", "Sample ID,Site," + ",".join(VARIABLES)]
    for sid, site, row in zip(IDS, SITES, VALUES):
        lines.append(",".join([sid, site, *(repr(float(v)) for v in row)]))
    table, report = read_table("\n".join(lines).encode(), "titled.csv")
    _check_table(table)
    assert report.header_row == 3
    lines[5] = lines[5].replace("3.0", "3,,0").replace(",,0", "..0")  # QC-003, spreadsheet row 6
    with pytest.raises(IntakeError, match=r"row 6, column 'Lead µg/L' \(C\): '3\.\.0'"):
        read_table("\n".join(lines).encode(), "titled.csv")


def _tab_text(decimal=","):
    lines = ["\t".join(["Sample ID", "Site", *VARIABLES])]
    for sid, site, row in zip(IDS, SITES, VALUES):
        cells = [repr(float(v)).replace(".", decimal) for v in row]
        lines.append("\t".join([sid, site, *cells]))
    return "\r\n".join(lines) + "\r\n"


@pytest.mark.parametrize("codec", ["utf-16", "utf-16-le", "utf-16-be"])
def test_utf16_unicode_text_export(codec):
    raw = _tab_text().encode(codec)
    if codec == "utf-16-le":
        raw = codecs.BOM_UTF16_LE + raw  # spreadsheet "Unicode text" writes a BOM
    table, report = read_table(raw, "unicode_text.txt")
    _check_table(table)
    assert report.encoding.startswith("utf-16")
    assert report.delimiter == "\t"


def test_utf16_without_bom_is_recognised():
    table, report = read_table(_tab_text(".").encode("utf-16-le"), "nobom.txt")
    _check_table(table)
    assert report.encoding == "utf-16-le"


def test_cp1252_file_keeps_micro_sign_in_header():
    raw = _tab_text().replace("\t", ";").encode("cp1252")
    assert b"\xb5g/L" in raw  # the micro sign as one cp1252 byte
    table, report = read_table(raw, "latin.csv")
    _check_table(table)
    assert report.encoding == "cp1252"
    assert "Lead µg/L" in table.variables


def test_utf8_with_bom():
    raw = codecs.BOM_UTF8 + _tab_text(".").replace("\t", ",").encode("utf-8")
    table, report = read_table(raw, "bom.csv")
    _check_table(table)
    assert table.id_column == "Sample ID"  # the BOM is not glued to the first name


@pytest.mark.parametrize("delimiter", [",", ";", "\t", "|"])
def test_every_delimiter(delimiter):
    lines = [delimiter.join(["Sample ID", *VARIABLES])]
    for sid, row in zip(IDS, VALUES):
        lines.append(delimiter.join([sid, *(repr(float(v)) for v in row)]))
    table, report = read_table("\n".join(lines).encode(), "t.csv")
    _check_table(table)
    assert report.delimiter == delimiter


def test_detection_limits_policies_and_above_range():
    raw = (
        "id;A;B\n"
        "s1;<0,05;1\n"
        "s2;< 0,2;2\n"
        "s3;0,4;> 1000\n"
        "s4;<LOD;3\n"
        "s5;1,5;>1.000\n"
    ).encode()
    expected_a = {"half": [0.025, 0.1], "sqrt2": [0.05 / math.sqrt(2), 0.2 / math.sqrt(2)], "missing": [np.nan, np.nan]}
    for policy, first_two in expected_a.items():
        table, report = read_table(raw, "lod.csv", below_limit=policy)
        np.testing.assert_allclose(table.data["A"].to_numpy(), [*first_two, 0.4, np.nan, 1.5], atol=1e-15)
        np.testing.assert_allclose(table.data["B"].to_numpy(), [1, 2, 1000, 3, 1000])
        assert report.below_limit_counts == {"A": 2}
        assert report.above_range_counts == {"B": 2}
        assert report.below_limit_policy == policy
        assert any("'<LOD'" in w for w in report.warnings)
        assert any("kept as the bound" in w for w in report.warnings)


def test_mixed_decimal_marks_warn():
    raw = "id;x;y\na;0,5;1\nb;0.75;2\nc;1,25;4\n".encode()
    table, report = read_table(raw, "mixed.csv")
    np.testing.assert_allclose(table.data["x"], [0.5, 0.75, 1.25])
    assert any("mixes decimal marks" in w and "'x'" in w for w in report.warnings)


def test_space_and_apostrophe_thousands():
    raw = "id;x;y\na;1 234,5;1\nb;12\u00a0000;2\nc;2'500,25;4\n".encode()
    table, _ = read_table(raw, "groups.csv")
    np.testing.assert_allclose(table.data["x"], [1234.5, 12000, 2500.25])


def test_xlsx_with_title_units_formula_and_text_limits():
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "Results"
    ws.append(["Quarterly results, invented site"])
    ws.append([])
    ws.append(["Sample ID", "Site", *VARIABLES])
    ws.append([None, None, "µg/L", "µg/L", "NTU"])
    for sid, site, row in zip(IDS, SITES, VALUES):
        ws.append([sid, site, *map(float, row)])
    ws["D6"] = "<0.16"  # QC-002 cadmium: a text cell, below a limit of 0.16 -> 0.08 with LOD/2
    ws["C9"] = "=1+1"  # a formula without a cached value: never evaluated -> missing
    wb.create_sheet("Notes").append(["nothing here"])
    buf = io.BytesIO()
    wb.save(buf)
    table, report = read_table(buf.getvalue(), "results.xlsx")
    expected = VALUES.copy()
    expected[4, 0] = np.nan  # C9 = QC-005 lead
    _check_table(table, expected)
    assert report.file_type == "xlsx" and report.sheet == "Results" and report.header_row == 3
    assert report.units == {"Lead µg/L": "µg/L", "Cadmium µg/L": "µg/L", "Turbidity NTU": "NTU"}
    assert report.below_limit_counts == {"Cadmium µg/L": 1}
    with pytest.raises(IntakeError, match="no sheet named 'Missing'.*'Results', 'Notes'"):
        read_table(buf.getvalue(), "results.xlsx", sheet="Missing")


def test_xlsx_header_and_units_cells_wrapped_over_lines():
    # Alt+Enter in a spreadsheet cell stores a line break; the column keeps a one-line name (common practice).
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.append(["Sample\nID", "Lead\r\nlevel", "Cadmium level", "Turbidity"])
    ws.append([None, "µg/L", "micro-\ngrams/L", "NTU"])
    for sid, row in zip(IDS, VALUES):
        ws.append([sid, *map(float, row)])
    buf = io.BytesIO()
    wb.save(buf)
    table, report = read_table(buf.getvalue(), "wrapped.xlsx")
    _check_table(table, variables=["Lead level", "Cadmium level", "Turbidity"])
    assert report.id_column == "Sample ID"
    assert report.units == {"Lead level": "µg/L", "Cadmium level": "micro- grams/L", "Turbidity": "NTU"}


def test_xlsx_named_sheet_and_numeric_ids_as_given():
    wb = openpyxl.Workbook()
    wb.active.append(["cover page"])
    ws = wb.create_sheet("Data")
    ws.append(["Batch", "x", "y"])
    for b, x, y in [(101, 1.0, 2.0), (102, 3.0, 5.0), (103, 4.0, 4.5)]:
        ws.append([b, x, y])
    buf = io.BytesIO()
    wb.save(buf)
    table, report = read_table(buf.getvalue(), "b.xlsx", sheet="Data", id_column="Batch")
    assert table.sample_ids == ["101", "102", "103"]
    np.testing.assert_allclose(table.values, [[1, 2], [3, 5], [4, 4.5]])


def test_no_id_column_generates_row_ids():
    table, report = read_table(b"a,b\n1,2\n3,4\n5,7\n", "plain.csv")
    assert table.sample_ids == ["row 2", "row 3", "row 4"]
    assert table.id_column is None and report.id_column is None


def test_id_column_given_keeps_leading_zeros_and_group_columns_are_metadata():
    raw = b"code,line,a,b\n007,1,1.5,2\n008,2,2.5,3\n009,1,3.5,5\n"
    table, report = read_table(raw, "codes.csv", id_column="code", group_columns=["line"])
    assert table.sample_ids == ["007", "008", "009"]
    assert table.metadata["line"].tolist() == ["1", "2", "1"]
    assert report.roles == {"code": "id", "line": "metadata", "a": "variable", "b": "variable"}


def test_roles_override_and_ignore():
    raw = b"id,a,b,c,d,comment\nx,1,2,9,1,ok\ny,2,3,9,0,ok\nz,4,4,9,1,no\n"
    table, report = read_table(raw, "r.csv", roles={"c": "ignore", "b": "metadata", "comment": "ignore"})
    assert table.variables == ["a", "d"]
    assert table.metadata_columns == ["b"]
    assert report.roles == {"id": "id", "a": "variable", "b": "metadata", "c": "ignore", "d": "variable", "comment": "ignore"}


def test_all_missing_rows_dropped_and_blank_lines_ignored():
    raw = b"id,a,b\nx,1,2\n\ny,NA,-\nz,3,4\nw,5,7\n,,\n"
    table, report = read_table(raw, "gaps.csv")
    assert table.sample_ids == ["x", "z", "w"]
    assert report.dropped_rows == [4]
    assert any("left out" in w and "rows 4" in w for w in report.warnings)


def test_read_path_uses_base_name(tmp_path):
    path = tmp_path / "plant_7.csv"
    path.write_bytes(b"id,a,b\nx,1,2\ny,2,3\nz,4,6\n")
    table, report = read_path(path)
    assert report.filename == "plant_7.csv"
    path.write_bytes(b"")
    with pytest.raises(IntakeError, match=r"^plant_7\.csv: the file is empty"):
        read_path(path)


def test_report_is_json_safe():
    import json

    _, report = read_table("id;a;b\nx;<1;2\ny;2;3\nz;4;> 6\n".encode(), "r.csv")
    assert isinstance(report, IntakeReport)
    assert json.loads(json.dumps(report.to_dict())) == report.to_dict()


# --- refusals ------------------------------------------------------------------------------


def test_intake_error_is_an_input_error():
    assert issubclass(IntakeError, InputError)


@pytest.mark.parametrize(
    "raw, name, pattern",
    [
        (b"", "e.csv", r"e\.csv: the file is empty"),
        (b"id,a,b\n", "h.csv", r"h\.csv: has a header \(row 1\) but no data rows"),
        (b"\x89PNG\r\n\x1a\n" + bytes(100), "photo.csv", r"photo\.csv: is a PNG image, not a table"),
        (b"id,a\x00,b\n1,2,3\n", "nul.csv", r"nul\.csv: contains binary data \(a NUL byte at byte 4\)"),
        (b"just some words\nand more words\n", "prose.csv", r"prose\.csv: no columns found"),
        (b"id,a,b\nx,1,2\ny,2,3\n", "two.csv", r"two\.csv: only 2 sample\(s\).*at least 3"),
        (b"id,a,t\nx,1,p\ny,2,q\nz,3,r\n", "one.csv", r"one\.csv: only 1 numeric variable \('a'\); at least 2"),
        (b"id,a,a\nx,1,2\n", "dupcol.csv", r"names a column twice: 'a' \(columns B and C\)"),
        (b"id,a,b\nx,1,2\ny,1,2,3,4\nz,1,1\n", "ragged.csv", r"ragged\.csv: row 3 has a value \('3'\) in column D, beyond the 3 columns"),
        (b"id,a,b\n" + b"x,1,2\n" * 300 + b"y,1,2,3,4\n", "late.csv", r"late\.csv: row 302 has 5 fields but the header \(row 1\) has 3"),
        (b"not a zip at all", "fake.xlsx", r"fake\.xlsx: is not a valid XLSX file"),
        (b"PK\x03\x04" + bytes(60), "broken.xlsx", r"broken\.xlsx: is not a valid XLSX file"),
    ],
)
def test_refusals_name_file_and_problem(raw, name, pattern):
    with pytest.raises(IntakeError, match=pattern):
        read_table(raw, name)


def test_size_and_column_limits():
    raw = b"id,a,b\nx,1,2\ny,2,3\nz,4,6\n"
    with pytest.raises(IntakeError, match=rf"over the limit of .*\({len(raw) - 1} bytes\)"):
        read_table(raw, "big.csv", max_bytes=len(raw) - 1)
    with pytest.raises(IntakeError, match=r"row 1 has 3 columns, more than the limit of 2"):
        read_table(raw, "wide.csv", max_columns=2)


def test_duplicate_ids_are_named_with_rows():
    raw = b"Sample ID,a,b\nS1,1,2\nS2,2,3\nS1,4,6\nS3,1,1\nS2,0,0\n"
    with pytest.raises(IntakeError, match=r"duplicate sample ids in column 'Sample ID' \(A\): 'S1' \(rows 2, 4\); 'S2' \(rows 3, 6\)"):
        read_table(raw, "d.csv")


def test_bad_cells_listed_up_to_ten_then_counted_or_read_as_missing():
    rows = [f"s{i},{'x' if i < 12 else i},1.5" for i in range(30)]
    raw = ("id,a,b\n" + "\n".join(rows) + "\ns30,inf,2\n").encode()
    raw = raw.replace(b"s13,13", b"s13,-Infinity")
    with pytest.raises(IntakeError) as err:
        read_table(raw, "typos.csv")
    message = str(err.value)
    assert message.startswith("typos.csv: 14 cell(s) in numeric columns are not numbers")
    assert message.count("row ") == 10 and "and 4 more" in message
    assert "row 2, column 'a' (B): 'x' (not a number)" in message
    table, report = read_table(raw.replace(b"x,", b"12..5,"), "typos.csv", bad_cells="missing")
    assert np.isnan(table.data["a"]).sum() == 14
    assert any("read as missing" in w for w in report.warnings)


def test_warnings_constant_and_mostly_missing():
    raw = b"id,a,b,c\nx,1,5,NA\ny,2,5,NA\nz,4,5,1\nw,3,5,NA\n"
    _, report = read_table(raw, "w.csv")
    assert any("'b' (C) is constant" in w for w in report.warnings)
    assert any("'c' (D) is 75% missing" in w for w in report.warnings)
    _, report = read_table(raw, "w.csv", mostly_missing=0.8)
    assert not any("missing" in w for w in report.warnings)


@pytest.mark.parametrize(
    "options, pattern",
    [
        ({"below_limit": "third"}, "below_limit must be one of half, sqrt2, missing"),
        ({"bad_cells": "drop"}, "bad_cells must be one of error, missing"),
        ({"roles": {"a": "target"}}, "role 'target' for column 'a'"),
        ({"id_column": "nope"}, r"no column named 'nope' in the header \(row 1\)"),
        ({"sheet": "Data"}, "text file without sheets"),
    ],
)
def test_bad_options(options, pattern):
    with pytest.raises(IntakeError, match=pattern):
        read_table(b"id,a,b\nx,1,2\ny,2,3\nz,4,6\n", "o.csv", **options)


# --- more of the corpus ---------------------------------------------------------------------


def _zip(members: dict[str, bytes], compression=None) -> bytes:
    import zipfile

    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression=compression or zipfile.ZIP_DEFLATED) as zf:
        for name, data in members.items():
            zf.writestr(name, data)
    return buf.getvalue()


def test_zip_bomb_refused_from_ratio_before_parsing():
    # Deflate reaches about 1000:1 on zeros; real sheet XML compresses far less (common practice).
    members = {"[Content_Types].xml": b"<Types/>", "xl/workbook.xml": b"<workbook/>", "xl/worksheets/sheet1.xml": bytes(4 * 1024**2)}
    raw = _zip(members)
    assert len(raw) < 64 * 1024
    with pytest.raises(IntakeError, match=r"bomb\.xlsx: part xl/worksheets/sheet1\.xml is compressed \d+:1, more than the plausible 200:1"):
        read_table(raw, "bomb.xlsx")


def test_zip_with_implausible_total_size_refused():
    # Many parts, each under the ratio check, together unpacking to more than 5x the size limit.
    members = {"[Content_Types].xml": b"<Types/>", "xl/workbook.xml": b"<workbook/>"}
    members.update({f"xl/worksheets/sheet{k}.xml": bytes(900_000) for k in range(8)})
    raw = _zip(members)
    with pytest.raises(IntakeError, match=r"huge\.xlsx: unpacks to \d+ bytes, more than the limit of 5000000 bytes"):
        read_table(raw, "huge.xlsx", max_bytes=1_000_000)


@pytest.mark.parametrize(
    "members, pattern",
    [
        ({"mimetype": b"application/vnd.oasis.opendocument.spreadsheet", "content.xml": b"<x/>"}, "is an OpenDocument file, not an Excel workbook"),
        ({"[Content_Types].xml": b"<Types/>", "word/document.xml": b"<w/>"}, "is a zip archive, not an Excel workbook"),
        ({"[Content_Types].xml": b"<Types/>", "xl/workbook.xml": b"not xml at all"}, "is a damaged XLSX file"),
    ],
)
def test_zip_that_is_not_a_workbook(members, pattern):
    with pytest.raises(IntakeError, match=pattern):
        read_table(_zip(members), "book.xlsx")


@pytest.mark.parametrize(
    "raw, name, pattern",
    [
        (b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + bytes(504), "old.xls", "old-style .xls workbook"),
        (b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + bytes(504), "locked.xlsx", "not a valid XLSX file.*old-style .xls"),
        (b"%PDF-1.7\n%...", "report.csv", "is a PDF document, not a table"),
        (b"<!DOCTYPE html>\n<html><body>Login</body></html>\n", "page.csv", "looks like a web page"),
        (b"   \r\n\t\n", "blank.csv", "the file is empty"),
        (b"id;a;b\n;mg/L;mg/L\n", "units_only.csv", "no numeric variables found"),
        (b"# only a comment\n# and another\n", "comments.csv", "no table found|no columns found"),
    ],
)
def test_more_refusals(raw, name, pattern):
    with pytest.raises(IntakeError, match=rf"^{re.escape(name)}: .*({pattern})"):
        read_table(raw, name)


def test_random_bytes_named_csv_are_refused_as_binary():
    raw = np.random.default_rng(3).bytes(5000)
    with pytest.raises(IntakeError, match=r"rand\.csv: (contains binary data|does not look like a text table)"):
        read_table(raw, "rand.csv")


def test_three_decimal_comma_values_are_not_read_as_thousands():
    # "%.3f" with a decimal comma: "12,345" alone is ambiguous; ';' settles it (common practice).
    raw = "id;x;y\na;12,345;1,500\nb;10,125;2,250\nc;11,875;3,125\n".encode()
    table, report = read_table(raw, "three.csv")
    assert report.decimal == ","
    np.testing.assert_allclose(table.values, [[12.345, 1.5], [10.125, 2.25], [11.875, 3.125]])


def test_comment_line_inside_data_and_quoted_delimiters():
    raw = b'id,label,a,b\nx,"north, upper",1.5,2\n# re-calibrated here\ny,"south",2.5,3\nz,"east ""new""",4,6\n'
    table, report = read_table(raw, "comments.csv")
    assert table.sample_ids == ["x", "y", "z"]
    assert table.metadata["label"].tolist() == ["north, upper", "south", 'east "new"']
    np.testing.assert_allclose(table.values, [[1.5, 2], [2.5, 3], [4, 6]])
    with pytest.raises(IntakeError, match=r"row 5, column 'a' \(C\): 'four'"):
        read_table(raw.replace(b",4,6", b",four,6"), "comments.csv")


def test_trailing_separators_and_blank_header_cells_vanish():
    raw = b"id;a;b;;\nx;1;2;;\ny;2;3;;\nz;4;7;;\n"
    table, report = read_table(raw, "trailing.csv")
    assert table.variables == ["a", "b"]
    assert not report.warnings


def test_missing_sample_id_is_refused_with_row():
    with pytest.raises(IntakeError, match=r"1 sample id\(s\) missing in column 'code' \(A\): rows 3"):
        read_table(b"code,a,b\nA1,1,2\n,2,3\nA3,4,6\n", "ids.csv", id_column="code")


def test_xlsx_dates_and_text_numbers_and_column_limit():
    import datetime as dt

    wb = openpyxl.Workbook()
    ws = wb.active
    ws.append(["Sample", "Taken", "pH", "Conductivity"])
    ws.append(["W1", dt.datetime(2026, 3, 1, 9, 30), "7,2", 512])
    ws.append(["W2", dt.datetime(2026, 3, 2, 9, 30), "6,9", "1.024,5"])
    ws.append(["W3", dt.datetime(2026, 3, 3, 9, 30), "7,05", 498])
    buf = io.BytesIO()
    wb.save(buf)
    table, report = read_table(buf.getvalue(), "water.xlsx")
    assert report.roles["Taken"] == "metadata"
    assert table.metadata["Taken"].tolist()[0].startswith("2026-03-01")
    np.testing.assert_allclose(table.values, [[7.2, 512], [6.9, 1024.5], [7.05, 498]])
    with pytest.raises(IntakeError, match=r"row 1 of sheet 'Sheet' has 4 columns, more than the limit of 3"):
        read_table(buf.getvalue(), "water.xlsx", max_columns=3)


def test_numeric_group_column_stays_metadata():
    raw = b"id,line,a,b\nx,1,1.5,2\ny,2,2.5,3\nz,2,4,6\n"
    table, report = read_table(raw, "g.csv", group_columns=("line",))
    assert table.variables == ["a", "b"] and table.metadata["line"].tolist() == ["1", "2", "2"]
    table, report = read_table(raw, "g.csv")
    assert table.variables == ["line", "a", "b"]


def test_wide_file_reads_and_counts_columns_against_the_limit():
    # More than one 64 KB sample of header: the sample grows to whole lines.
    p = 12_000
    rng = np.random.default_rng(11)
    values = rng.integers(0, 1000, size=(4, p)) / 8.0
    lines = ["id," + ",".join(f"var_{j:05d}" for j in range(p))]
    lines += [f"s{i}," + ",".join(repr(float(v)) for v in row) for i, row in enumerate(values)]
    raw = ("\n".join(lines) + "\n").encode()
    assert len(lines[0]) > 64 * 1024
    table, report = read_table(raw, "wide.csv")
    assert table.data.shape == (4, p)
    np.testing.assert_array_equal(table.values, values)
    with pytest.raises(IntakeError, match=rf"row 1 has {p + 1} columns, more than the limit of {p}"):
        read_table(raw, "wide.csv", max_columns=p)


def _rewrite_member(raw: bytes, member: str, edit) -> bytes:
    import zipfile

    src = zipfile.ZipFile(io.BytesIO(raw))
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as dst:
        for info in src.infolist():
            data = src.read(info.filename)
            dst.writestr(info.filename, edit(data) if info.filename == member else data)
    return out.getvalue()


def _small_book() -> bytes:
    wb = openpyxl.Workbook()
    ws = wb.active
    for row in (["id", "a", "b"], ["x", 1, 2], ["y", 3, 4], ["z", 5, "=B4*100"]):
        ws.append(row)
    buf = io.BytesIO()
    wb.save(buf)
    return buf.getvalue()


def test_xlsx_formula_gives_its_saved_value_never_an_evaluation():
    # A spreadsheet saves a formula with its last value: <f>B4*100</f><v>7</v>. Intake reads 7, not 500.
    raw = _rewrite_member(_small_book(), "xl/worksheets/sheet1.xml", lambda x: x.replace(b"<v />", b"<v>7</v>"))
    table, _ = read_table(raw, "cached.xlsx")
    np.testing.assert_array_equal(table.values, [[1, 2], [3, 4], [5, 7]])


def test_xlsx_with_entity_expansion_is_refused_not_expanded():
    # "Billion laughs": nested entities; expat >= 2.4 refuses the amplification (libexpat changelog 2.4.0).
    lol = b'<?xml version="1.0"?><!DOCTYPE lolz [<!ENTITY lol "lol">' + b"".join(
        b'<!ENTITY lol%d "%s">' % (k, (b"&lol%d;" % (k - 1) if k > 1 else b"&lol;") * 10) for k in range(1, 10)
    ) + b"]>"

    def inject(xml: bytes) -> bytes:
        body = xml.split(b"?>", 1)[1] if xml.startswith(b"<?xml") else xml
        return lol + body.replace(b"<v>1</v>", b"<v>&lol9;</v>")

    raw = _rewrite_member(_small_book(), "xl/worksheets/sheet1.xml", inject)
    with pytest.raises(IntakeError, match=r"^lol\.xlsx: (a sheet of this XLSX file is damaged|is a damaged XLSX file)"):
        read_table(raw, "lol.xlsx")


def test_numeric_first_column_named_like_ids_is_a_variable_with_a_warning():
    raw = b"Sample No,a,b\n1,1.5,2\n2,2.5,3\n3,4,6\n"
    table, report = read_table(raw, "n.csv")
    assert table.variables == ["Sample No", "a", "b"] and table.id_column is None
    assert any("'Sample No' (A) is named like sample ids" in w for w in report.warnings)
    table, report = read_table(raw, "n.csv", id_column="Sample No")
    assert table.sample_ids == ["1", "2", "3"] and not report.warnings


def test_read_path_refuses_missing_file_and_oversize_before_reading(tmp_path):
    with pytest.raises(IntakeError, match=r"^nothing\.csv: cannot be opened"):
        read_path(tmp_path / "nothing.csv")
    path = tmp_path / "big.csv"
    path.write_bytes(b"id,a,b\n" + b"x,1,2\n" * 100)
    with pytest.raises(IntakeError, match=r"^big\.csv: the file is .* over the limit of .*\(100 bytes\)"):
        read_path(path, max_bytes=100)


def test_empty_option_strings_mean_not_given():
    # Web forms send "" for an empty field.
    table, report = read_table(b"id,a,b\nx,1,2\ny,2,3\nz,4,6\n", "o.csv", sheet="", id_column="", group_columns=[""])
    assert report.roles == {"id": "id", "a": "variable", "b": "variable"}


# --- quoted cells spanning several lines: a row is a record, not a physical line --------------
# RFC 4180 ("Common Format and MIME Type for Comma-Separated Values (CSV) Files", Shafranovich 2005,
# section 2 rule 6): a field enclosed in double quotes may contain line breaks. LIMS and survey tools
# write comment cells that way; a spreadsheet shows such a record as ONE row (common practice), so
# every expected row number below counts records: header = row 1, the first sample = row 2, and a
# record whose comment cell spans two lines is still one row. Excel itself writes CRLF between
# records and a bare LF inside a cell (common practice), hence the ("\r\n", "\n") case.


def _multiline_records(delimiter=",", inner="\n", number=lambda v: repr(float(v)), comment_row=3):
    """Records of a LIMS export (header = row 1) whose comment cell in spreadsheet row ``comment_row`` spans two lines."""
    records = [delimiter.join(["Sample ID", "Comment", *VARIABLES])]
    for row, (sid, values) in enumerate(zip(IDS, VALUES), start=2):
        comment = f'"checked twice{delimiter}{inner}re-run"' if row == comment_row else "ok"
        records.append(delimiter.join([sid, comment, *(number(v) for v in values)]))
    return records


LINE_ENDS = [("\n", "\n"), ("\r\n", "\r\n"), ("\r\n", "\n")]  # (between records, inside the quoted cell)


@pytest.mark.parametrize("newline, inner", LINE_ENDS)
def test_multiline_cell_row_3_then_bad_number_is_named_in_row_6(newline, inner):
    records = _multiline_records(inner=inner)
    table, report = read_table((newline.join(records) + newline).encode(), "comments.csv")
    _check_table(table)
    assert table.metadata["Comment"].iloc[1].splitlines() == ["checked twice,", "re-run"]
    assert report.header_row == 1
    records[5] = records[5].replace(",7.125,", ",12..5,")  # QC-005: record 6 (physical line 7)
    raw = (newline.join(records) + newline).encode()
    with pytest.raises(IntakeError, match=r"comments\.csv: .*row 6, column 'Lead µg/L' \(C\): '12\.\.5' \(not a number\)"):
        read_table(raw, "comments.csv")
    table, report = read_table(raw, "comments.csv", bad_cells="missing")
    assert any("(first: row 6, '12..5')" in w for w in report.warnings), report.warnings
    assert np.isnan(table.data.loc["QC-005", "Lead µg/L"])


@pytest.mark.parametrize("newline, inner", LINE_ENDS)
def test_multiline_cell_in_european_semicolon_decimal_comma_file(newline, inner):
    # common practice: ';' delimiter and ',' decimal mark in European LIMS exports.
    records = _multiline_records(delimiter=";", inner=inner, number=_eu)
    table, report = read_table((newline.join(records) + newline).encode(), "eu.csv")
    _check_table(table)
    assert (report.delimiter, report.decimal) == (";", ",")
    records[5] = records[5].replace(";7,125;", ";12,,5;")
    with pytest.raises(IntakeError, match=r"eu\.csv: .*row 6, column 'Lead µg/L' \(C\): '12,,5'"):
        read_table((newline.join(records) + newline).encode(), "eu.csv")


def test_ragged_row_after_multiline_cells_is_named_by_record():
    # Within the detection sample: the extra field shows up as a value beyond the header.
    records = _multiline_records()
    records[4] += ",7"  # QC-004, row 5
    with pytest.raises(IntakeError, match=r"ragged\.csv: row 5 has a value \('7'\) in column F, beyond the 5 columns"):
        read_table("\n".join(records).encode(), "ragged.csv")
    # Past the sample: pandas' tokenizer finds it. Every tenth record holds a two-line comment.
    records = ["id,comment,a,b,c"]
    for k in range(300):
        comment = '"line one\nline two"' if k % 10 == 3 else "ok"
        records.append(f"S{k:03d},{comment},1.5,2.5,{k}")
    records[281] += ",9"  # the sample with k = 280: row 282, physical line 282 + 28
    with pytest.raises(IntakeError, match=r"late\.csv: row 282 has 6 fields but the header \(row 1\) has 5"):
        read_table("\n".join(records).encode(), "late.csv")


@pytest.mark.parametrize("newline", ["\n", "\r\n"])
def test_unclosed_quote_after_multiline_cell_names_the_row_where_it_opened(newline):
    records = _multiline_records()
    records[4] = records[4].replace(",ok,", ',"never closed,')  # QC-004, row 5
    with pytest.raises(IntakeError, match=r"open\.csv: a quote opened near row 5 is never closed"):
        read_table(newline.join(records).encode(), "open.csv")


def test_duplicate_id_after_multiline_cell_names_the_rows():
    records = _multiline_records()
    records[5] = records[5].replace("QC-005", "QC-001")
    with pytest.raises(IntakeError, match=r"duplicate sample ids in column 'Sample ID' \(A\): 'QC-001' \(rows 2, 6\)"):
        read_table("\n".join(records).encode(), "dup.csv")


def _titled_records(newline="\n"):
    """Title cell spanning two lines (row 1), two comment lines (rows 2-3), header (row 4), samples rows 5-9.

    QC-002's comment (row 6) spans two lines and the second starts with '#': inside the quotes it is
    cell text, not a comment line.
    """
    records = ['"Water quality report,\nquarter 3"', "# exported by the LIMS", "# units: see header"]
    records.append(",".join(["Sample ID", "Comment", *VARIABLES]))
    for sid, values in zip(IDS, VALUES):
        comment = f'"checked twice,{newline}#2 re-run"' if sid == "QC-002" else "ok"
        records.append(",".join([sid, comment, *(repr(float(v)) for v in values)]))
    return records


@pytest.mark.parametrize("newline", ["\n", "\r\n"])
def test_title_and_comment_rows_above_header_with_multiline_cells(newline):
    records = _titled_records(newline)
    table, report = read_table(newline.join(records).encode(), "titled.csv")
    _check_table(table)
    assert report.header_row == 4
    assert table.metadata["Comment"].iloc[1].splitlines() == ["checked twice,", "#2 re-run"]
    records[8] = records[8].replace(",7.125,", ",12..5,")  # QC-005: row 9
    with pytest.raises(IntakeError, match=r"titled\.csv: .*row 9, column 'Lead µg/L' \(C\): '12\.\.5'"):
        read_table(newline.join(records).encode(), "titled.csv")


@pytest.mark.parametrize("newline", ["\n", "\r\n"])
def test_comment_line_between_samples_after_a_multiline_cell_keeps_its_row(newline):
    records = _titled_records(newline)[3:]  # header row 1, QC-002 (row 3) spans two lines
    records.insert(3, "# re-calibrated here")  # row 4: a comment row still counts as a row
    table, report = read_table(newline.join(records).encode(), "recal.csv")
    _check_table(table)
    assert table.metadata["Comment"].iloc[1].splitlines() == ["checked twice,", "#2 re-run"]
    records[6] = records[6].replace(",7.125,", ",12..5,")  # QC-005: row 7
    with pytest.raises(IntakeError, match=r"recal\.csv: .*row 7, column 'Lead µg/L' \(C\): '12\.\.5'"):
        read_table(newline.join(records).encode(), "recal.csv")

def test_header_and_units_cells_spanning_lines():
    # Wrapped header cells ("Lead" / "µg/L" in one cell) are common in spreadsheet exports (common practice).
    header = 'Sample ID,"Lead\nlevel","Cadmium\nlevel",Turbidity'
    units = ',µg/L,"micrograms\nper litre",NTU'
    rows = [",".join([sid, *(repr(float(v)) for v in values)]) for sid, values in zip(IDS, VALUES)]
    table, report = read_table("\n".join([header, units, *rows]).encode(), "wrapped.csv")
    # A wrapped cell gives a one-line name and unit, as the spreadsheet shows it (common practice).
    _check_table(table, variables=["Lead level", "Cadmium level", "Turbidity"])
    assert report.header_row == 1
    assert report.units == {"Lead level": "µg/L", "Cadmium level": "micrograms per litre", "Turbidity": "NTU"}
    rows[3] = rows[3].replace("101.25", "1O1.25")  # QC-004: header row 1, units row 2, so row 6
    with pytest.raises(IntakeError, match=r"row 6, column 'Lead level' \(B\): '1O1\.25'"):
        read_table("\n".join([header, units, *rows]).encode(), "wrapped.csv")


def test_dropped_rows_and_row_ids_count_records():
    # No id column: samples are named by their spreadsheet row.
    raw = (
        "a,note,b,c\n"
        "1,ok,2,3\n"                 # row 2
        '2,"two\nlines",3,4\n'       # row 3
        "3,ok,4,5\n"                 # row 4
        'NA,"all\nmissing",NA,NA\n'  # row 5: no numbers, left out
        "4,ok,NA,NA\n"               # row 6: mostly missing
        "5,ok,6,7\n"                 # row 7
    ).encode()
    table, report = read_table(raw, "rows.csv")
    assert table.sample_ids == ["row 2", "row 3", "row 4", "row 6", "row 7"]
    assert report.dropped_rows == [5]
    assert any("(rows 5)" in w for w in report.warnings), report.warnings
    assert any("of their values missing: 'row 6'" in w for w in report.warnings), report.warnings


@pytest.mark.parametrize(
    "make",
    [
        lambda: "\n".join(_multiline_records()),
        lambda: "\r\n".join(_multiline_records(inner="\n")),
        lambda: "\n".join(_multiline_records(comment_row=2)),
        lambda: "\n".join(_titled_records()),
        lambda: "\r\n".join(_titled_records("\r\n")),
    ],
)
def test_file_with_multiline_cells_reads_like_its_clean_twin(make):
    text = make()
    twin = re.sub(r'"([^"]*)"', lambda m: m.group(1).replace(",", "").replace("\r", "").replace("\n", " "), text)
    assert '"' not in twin and len(twin.splitlines()) < len(text.splitlines())
    table, report = read_table(text.encode(), "multi.csv")
    clean, clean_report = read_table(twin.encode(), "clean.csv")
    np.testing.assert_array_equal(table.values, clean.values)
    assert table.sample_ids == clean.sample_ids == IDS
    assert table.variables == clean.variables
    assert (report.header_row, report.units, report.roles) == (clean_report.header_row, clean_report.units, clean_report.roles)


# -- a large text parsed in pieces reads exactly as in one piece ----------------------------
# Large texts are cut at line breaks and parsed by several threads (intake_text._parse); the
# cut must change nothing: same numbers, types, ids, warnings, rows named in messages (common
# practice: a faster path is checked against the plain one on the same input).

LARGE_ROWS = 180_000  # about 8.6 MB: above intake_text.PARALLEL_MIN_BYTES


def _large_lab_export(*, late_text: str | None = None, quoted_note: bool = False, crlf: bool = False) -> bytes:
    rng = np.random.default_rng(7)
    lines = ["Invented export for the intake tests", "batch,line,note,assay,impurity,water,ph,density",
             ",,,%,%,%,,g/mL"]
    values = rng.normal(50, 5, size=(LARGE_ROWS, 5)).round(3)
    for i in range(LARGE_ROWS):
        note = '"re-run,\nchecked"' if quoted_note and i == 120_000 else ("NA" if i % 997 == 0 else "ok")
        cells = [f"B{i:06d}", "AB"[i % 2], note] + [f"{v:.3f}" for v in values[i]]
        if i == 5:
            cells[3] = "ND"  # assay
        if late_text is not None and i == LARGE_ROWS - 10:
            cells[4] = late_text  # impurity: text far from the first rows
        lines.append(",".join(cells))
    newline = "\r\n" if crlf else "\n"
    return (newline.join(lines) + newline).encode()


def _in_one_piece(monkeypatch, raw: bytes):
    from analysis import intake_text

    with monkeypatch.context() as patch:
        patch.setattr(intake_text, "PARALLEL_MIN_BYTES", len(raw) + 1)
        return read_table(raw, "large.csv")


@pytest.mark.parametrize(
    "late_text, quoted_note, crlf",
    [(None, False, False), ("<0.05", False, False), (None, True, False), ("<0.05", False, True)],
)
def test_large_text_in_pieces_reads_as_in_one_piece(monkeypatch, late_text, quoted_note, crlf):
    from analysis import intake_text

    monkeypatch.setattr(intake_text, "_workers", lambda: 3)  # cut even where only one core is free
    raw = _large_lab_export(late_text=late_text, quoted_note=quoted_note, crlf=crlf)
    assert len(raw) > intake_text.PARALLEL_MIN_BYTES
    assert len(intake_text._pieces(raw, 3)) == (0 if quoted_note else 3)
    pieces, pieces_report = read_table(raw, "large.csv")
    whole, whole_report = _in_one_piece(monkeypatch, raw)
    assert pieces.data.equals(whole.data) and pieces.metadata.equals(whole.metadata)
    assert pieces_report.to_dict() == whole_report.to_dict()
    assert pieces.data.shape == (LARGE_ROWS, 5) and pieces_report.header_row == 2
    assert pieces_report.units["assay"] == "%"
    assert pieces_report.below_limit_counts == ({"impurity": 1} if late_text else {})
    assert np.isnan(pieces.data.loc["B000005", "assay"])  # "ND"
    assert pieces.metadata["note"].isna().sum() == len(range(0, LARGE_ROWS, 997))  # "NA"


@pytest.mark.parametrize("bad", ["12..5", "1,2,3"])  # text in a number; a row with too many fields
def test_large_text_in_pieces_names_a_late_bad_row(monkeypatch, bad):
    from analysis import intake_text

    monkeypatch.setattr(intake_text, "_workers", lambda: 2)
    raw = _large_lab_export(late_text=bad)
    row = LARGE_ROWS - 10 + 4  # rows: title 1, header 2, units 3, batch i in row i + 4
    expected = (rf"row {row}, column 'impurity' \(E\): '12\.\.5'" if bad == "12..5"
                else rf"row {row} has 10 fields but the header \(row 2\) has 8")
    with pytest.raises(IntakeError, match=expected):
        read_table(raw, "large.csv")
    with pytest.raises(IntakeError, match=expected):
        _in_one_piece(monkeypatch, raw)
