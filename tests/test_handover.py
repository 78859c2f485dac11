"""Files and messages for the hand-over: the .xlsx workbook, --json, --quiet and the progress
bar. The site is test_tariff's hand-computed month (invented data)."""

from __future__ import annotations

import io
import json
import zipfile

import polars as pl
import pytest
from polars.testing import assert_frame_equal
from typer.testing import CliRunner

from disagg.cli import app
from disagg.present.outputs import workbook_tables
from disagg.analyses.pipeline import CAUTION, breakdown_site
from disagg.progress import Bar, terminal_bar
from test_tariff import CENT, TOU_MONTH, TOU_TOML, _write_site

# OWASP "CSV Injection" page (from memory; docs/references.md section 10): a cell starting with
# one of these can run as a formula when a spreadsheet opens the file.
FORMULA_NAME = "=HYPERLINK(\"http://example.invalid\")"


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("handover")
    toml = _write_site(folder, TOU_TOML.format(holidays=""), pump=FORMULA_NAME)
    out = folder / "out"
    res = CliRunner().invoke(app, ["breakdown", str(toml), "--out", str(out), "--xlsx",
                                   "--json"])
    return toml, out, res


def test_xlsx_round_trips_through_polars_with_units_in_the_headers(run):
    toml, out, res = run
    assert res.exit_code == 0, res.output
    expected = workbook_tables(breakdown_site(toml))
    back = pl.read_excel(out / "breakdown.xlsx", sheet_id=0)
    assert list(back) == ["breakdown", "draws", "costs", "notes"]
    for name, frame in expected.items():
        # A spreadsheet has no empty text distinct from a blank cell.
        want = frame.with_columns(pl.col(pl.String).replace("", None))
        # The reader types a column of whole numbers as integers.
        got = back[name].with_columns(pl.col(pl.Int64).cast(pl.Float64))
        assert_frame_equal(got, want, abs_tol=1e-9)
    head = back["breakdown"].columns
    for col in ("run_hours [h]", "kw [kW]", "kwh [kWh]", "share [fraction 0-1]",
                "peak_kw [kW]", "cost [USD]"):
        assert col in head
    assert back["breakdown"]["cost [USD]"].dtype == pl.Float64  # numbers as numbers
    assert back["costs"]["cost [USD]"].sum() == pytest.approx(TOU_MONTH, abs=CENT)
    assert back["notes"]["text"][0] == CAUTION


def test_xlsx_stores_a_formula_like_name_as_text_not_a_formula(run):
    _, out, _ = run
    with zipfile.ZipFile(out / "breakdown.xlsx") as z:
        sheets = [n for n in z.namelist() if n.startswith("xl/worksheets/sheet")]
        xml = "".join(z.read(n).decode() for n in sheets)
    assert "<f>" not in xml and "<f " not in xml
    back = pl.read_excel(out / "breakdown.xlsx", sheet_name="breakdown")
    assert FORMULA_NAME in back["equipment"].to_list()


def test_csv_neutralises_the_formula_like_name(run):
    _, out, _ = run
    csv = pl.read_csv(out / "breakdown.csv")
    assert "'" + FORMULA_NAME in csv["equipment"].to_list()
    assert FORMULA_NAME not in csv["equipment"].to_list()


def test_json_summary_is_valid_and_complete(run):
    _, out, res = run
    data = json.loads(res.stdout)
    assert data["cost"] == pytest.approx(TOU_MONTH, abs=CENT)
    assert data["currency"] == "USD"
    assert data["metered_kwh"] == pytest.approx(15712.0, abs=1e-6)  # test_tariff's hand sum
    assert {r["equipment"] for r in data["equipment"]} == {FORMULA_NAME, "F-1", "baseload",
                                                            "unexplained"}
    assert data["caution"] == CAUTION
    shares = {r["equipment"]: r["share"] for r in data["equipment"]}
    assert shares["F-1"] == pytest.approx(672.0 / 15712.0, abs=1e-9)  # test_tariff's hand sums
    assert sorted(data["files"]) == sorted(str(p) for p in out.iterdir())


def test_quiet_prints_nothing_and_still_writes(tmp_path):
    toml = _write_site(tmp_path, "")
    res = CliRunner().invoke(app, ["breakdown", str(toml), "--out", str(tmp_path / "o"), "-q"])
    assert res.exit_code == 0
    assert res.output == ""
    assert sorted(p.name for p in (tmp_path / "o").iterdir()) == [
        "breakdown.csv", "breakdown.parquet", "fit.json"]


class _Tty(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_progress_bar_only_on_a_terminal_and_not_when_quiet():
    assert terminal_bar(False, io.StringIO()) is None  # a pipe or file: nothing
    assert terminal_bar(True, _Tty()) is None
    stream = _Tty()
    bar = terminal_bar(False, stream)
    assert isinstance(bar, Bar)
    bar("fitting", 13, 13)
    assert "fitting" in stream.getvalue() and "13/13" in stream.getvalue()
    bar.close()
    assert stream.getvalue().endswith("\r\033[K")


def test_breakdown_reports_progress_steps(tmp_path):
    seen = []
    breakdown_site(_write_site(tmp_path, ""), progress=lambda s, d, t: seen.append((s, d, t)))
    assert [x for x in seen if x[0] == "reading"] == [("reading", k, 4) for k in range(5)]
    assert any(s == "fitting" for s, _, _ in seen)
    last = [x for x in seen if x[0] == "fitting"][-1]
    assert last[1] == last[2]  # the bar ends full
