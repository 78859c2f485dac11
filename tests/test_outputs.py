"""The output module: atomic writes, inputs never replaced, spreadsheet-safe CSV text."""

from __future__ import annotations

import os
from pathlib import Path

import polars as pl
import pytest

from disagg.errors import OutputError
from disagg.present.outputs import neutralise_csv_text, write_atomically

# OWASP "CSV Injection" page (from memory; docs/references.md section 10): cells starting with
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
    assert str(exc.value) == (f"{tmp_path}: cannot write the outputs (No space left on device); "
                              "the previous files are left as they were")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["breakdown.csv"]
    assert (tmp_path / "breakdown.csv").read_text() == "previous run\n"


def test_an_output_that_would_replace_an_input_is_refused(tmp_path):
    meter = tmp_path / "breakdown.csv"
    meter.write_text("t,v\n")
    with pytest.raises(OutputError):
        write_atomically(tmp_path, {"breakdown.csv": lambda p: p.write_text("x")}, [meter])
    assert meter.read_text() == "t,v\n"


def test_a_failing_move_into_place_puts_the_previous_run_back(tmp_path, monkeypatch):
    # The second file's move into place fails (a full disk, a file locked by a spreadsheet):
    # the first new file is taken out again and both previous files are back.
    import disagg.present.outputs as outputs

    for name in ("breakdown.csv", "fit.json"):
        (tmp_path / name).write_text(f"previous {name}\n")
    real_replace = os.replace
    calls = []

    def flaky(src, dst):
        calls.append((Path(src).name, Path(dst).parent == tmp_path))
        if Path(dst) == tmp_path / "fit.json" and Path(src).parent.name.startswith(".disagg-tmp"):
            raise OSError(28, "No space left on device", str(dst))
        return real_replace(src, dst)

    monkeypatch.setattr(outputs.os, "replace", flaky)
    with pytest.raises(OutputError) as exc:
        write_atomically(tmp_path, {"breakdown.csv": lambda p: p.write_text("new\n"),
                                    "fit.json": lambda p: p.write_text("{}")}, [])
    assert "cannot write the outputs (No space left on device)" in str(exc.value)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["breakdown.csv", "fit.json"]
    for name in ("breakdown.csv", "fit.json"):
        assert (tmp_path / name).read_text() == f"previous {name}\n"
    assert ("breakdown.csv", True) in calls  # the first new file had been placed


def test_a_folder_in_the_way_of_an_output_is_named_and_nothing_changes(tmp_path):
    (tmp_path / "breakdown.csv").write_text("previous\n")
    (tmp_path / "breakdown.xlsx").mkdir()
    with pytest.raises(OutputError) as exc:
        write_atomically(tmp_path, {"breakdown.csv": lambda p: p.write_text("new\n"),
                                    "breakdown.xlsx": lambda p: p.write_text("x")}, [])
    assert str(exc.value) == (f"{tmp_path / 'breakdown.xlsx'}: is a folder, so the file "
                              "breakdown.xlsx cannot be written there; move the folder or "
                              "choose another --out")
    assert (tmp_path / "breakdown.csv").read_text() == "previous\n"


def test_a_residual_that_would_print_as_minus_zero_is_written_as_zero():
    from disagg.present.outputs import for_csv

    frame = pl.DataFrame({"equipment": ["=x", "unexplained"], "kwh": [-1e-10, -2.5e-6]})
    out = for_csv(frame)
    assert out["kwh"].to_list() == [0.0, -2.5e-6]  # only what prints as -0.000000 changes
    assert out["equipment"].to_list() == ["'=x", "unexplained"]
    assert out.write_csv(float_precision=6).splitlines()[1:] == ["'=x,0.000000",
                                                                 "unexplained,-0.000003"]
