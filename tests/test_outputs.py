"""The output module: atomic writes, inputs never replaced, spreadsheet-safe CSV text."""

from __future__ import annotations

from pathlib import Path

import polars as pl
import pytest

from disagg.errors import OutputError
from disagg.outputs import neutralise_csv_text, write_atomically

# OWASP "CSV Injection" page (from memory; references.md section 10): cells starting with
# =, +, -, @, tab or carriage return get a leading single quote.
FORMULA_CASES = {"=SUM(A1:A3)": "'=SUM(A1:A3)", "+1": "'+1", "-2": "'-2", "@cmd": "'@cmd",
                 "\tx": "'\tx", "\rx": "'\rx", "AHU-1": "AHU-1", "": ""}


def test_formula_like_text_cells_are_neutralised():
    frame = pl.DataFrame({"equipment": list(FORMULA_CASES), "kwh": [-1.0] * len(FORMULA_CASES)})
    out = neutralise_csv_text(frame)
    assert out["equipment"].to_list() == list(FORMULA_CASES.values())
    assert out["kwh"].to_list() == frame["kwh"].to_list()  # numbers stay numbers


def test_a_failing_writer_leaves_no_file_and_no_temp_folder(tmp_path):
    (tmp_path / "breakdown.csv").write_text("previous run\n")

    def boom(path: Path) -> None:
        path.write_text("half")
        raise OSError(28, "No space left on device")

    with pytest.raises(OutputError) as exc:
        write_atomically(tmp_path, {"fit.json": lambda p: p.write_text("{}"),
                                    "breakdown.csv": boom}, [])
    assert str(exc.value) == f"{tmp_path}: cannot write the outputs (No space left on device)"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["breakdown.csv"]
    assert (tmp_path / "breakdown.csv").read_text() == "previous run\n"


def test_an_output_that_would_replace_an_input_is_refused(tmp_path):
    meter = tmp_path / "breakdown.csv"
    meter.write_text("t,v\n")
    with pytest.raises(OutputError):
        write_atomically(tmp_path, {"breakdown.csv": lambda p: p.write_text("x")}, [meter])
    assert meter.read_text() == "t,v\n"
