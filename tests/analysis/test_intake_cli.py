"""Intake through the command line: bad files exit 2 with one line on stderr; a messy
file fits exactly like its clean twin (same scores, loadings and statistics).

Exit codes are the CLI contract in docs/design.md section 4 (0 success, 2 bad input).
The messy twin uses conventions of European lab exports (common practice: ';', decimal comma,
comment lines, a units row) and must give the same numbers as the plain CSV.
"""

from __future__ import annotations

import subprocess
import sys

import pandas as pd
import pytest

from webapp.cli import main

ROWS = [
    ("P-01", 4.1, 12.0, 0.51, 101.5),
    ("P-02", 3.9, 11.5, 0.48, 99.0),
    ("P-03", 4.6, 13.1, 0.55, 104.25),
    ("P-04", 5.0, 12.2, 0.61, 98.75),
    ("P-05", 3.5, 10.9, 0.44, 102.0),
    ("P-06", 4.4, 12.8, 0.05, 100.5),
    ("P-07", 4.8, 13.6, 0.58, 1003.0),
    ("P-08", 3.7, 11.1, 0.47, 97.5),
]
NAMES = ["Sample", "Hardness", "Silica", "Iron", "Sodium"]


def _clean_csv() -> bytes:
    lines = [",".join(NAMES)] + [",".join([r[0], *(repr(v) for v in r[1:])]) for r in ROWS]
    return ("\n".join(lines) + "\n").encode()


def _messy_csv() -> bytes:
    def eu(v: float) -> str:
        whole, _, frac = repr(v).partition(".")
        grouped = f"{int(whole):,}".replace(",", ".")
        return grouped + ("," + frac if frac and frac != "0" else "")

    lines = ["# invented plant, weekly export", ";".join(NAMES), ";°dH;mg/L;mg/L;mg/L"]
    for r in ROWS:
        cells = [r[0], *(eu(v) for v in r[1:])]
        if r[0] == "P-06":
            cells[3] = "<0,1"  # LOD 0.1 -> 0.05 with the default LOD/2
        lines.append(";".join(cells))
    return ("\r\n".join(lines) + "\r\n").encode("cp1252")


def _fit(tmp_path, name: str, raw: bytes) -> tuple[int, dict]:
    source = tmp_path / name
    source.write_bytes(raw)
    out = tmp_path / (name + "_out")
    code = main(["fit", str(source), "--components", "2", "--out", str(out)])
    return code, {f: pd.read_csv(out / f) for f in ("scores.csv", "loadings.csv", "samples.csv")}


def test_messy_file_fits_exactly_like_its_clean_twin(tmp_path):
    code_clean, clean = _fit(tmp_path, "clean.csv", _clean_csv())
    code_messy, messy = _fit(tmp_path, "messy.csv", _messy_csv())
    assert code_clean == code_messy == 0
    for name in clean:
        pd.testing.assert_frame_equal(clean[name], messy[name], rtol=1e-12, atol=1e-12)


BAD_FILES = [
    (b"", "empty.csv", "empty.csv: the file is empty"),
    (b"\x89PNG\r\n\x1a\n" + bytes(64), "photo.csv", "photo.csv: is a PNG image, not a table"),
    (b"Sample,a,b\nS1,1,2\nS2,12..5,3\nS3,4,5\nS4,2,2\n", "typo.csv", "typo.csv: 1 cell(s) in numeric columns are not numbers: row 3"),
    (b"Sample,a,b\nS1,1,2\nS2,2,3\nS1,4,5\n", "dup.csv", "dup.csv: duplicate sample ids in column 'Sample' (A): 'S1' (rows 2, 4)"),
    (b"PK\x03\x04" + bytes(40), "book.xlsx", "book.xlsx: is not a valid XLSX file"),
]


@pytest.mark.parametrize("raw, name, expected", BAD_FILES)
def test_bad_files_exit_2_with_one_line(tmp_path, capsys, raw, name, expected):
    source = tmp_path / name
    source.write_bytes(raw)
    code = main(["fit", str(source), "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and expected in lines[0], err
    assert not (tmp_path / "out").exists()


def test_bad_file_exit_code_from_a_real_process(tmp_path):
    raw, name, expected = BAD_FILES[1]
    source = tmp_path / name
    source.write_bytes(raw)
    result = subprocess.run(
        [sys.executable, "-m", "webapp.cli", "fit", str(source), "--out", str(tmp_path / "out")],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert result.returncode == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and expected in lines[0] and "Traceback" not in result.stderr
