"""The committed demo site equals what the generator writes, and its breakdown adds up."""

from pathlib import Path

import polars as pl
import pytest

from disagg.outputs import write_demo_site
from disagg.pipeline import breakdown_site

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def generated(tmp_path_factory):
    base = tmp_path_factory.mktemp("demo")
    toml = write_demo_site(base / "demo_meters", toml_folder=base / "configs")
    return toml


@pytest.mark.parametrize("name", ["meter.csv", "runlog.csv", "truth.csv", "truth_monthly.csv"])
def test_committed_demo_files_match_the_generator(generated, name):
    committed = (ROOT / "demo_meters" / name).read_bytes()
    assert (generated.parent.parent / "demo_meters" / name).read_bytes() == committed


def test_committed_demo_toml_matches_the_generator(generated):
    assert generated.read_text() == (ROOT / "configs" / "demo.toml").read_text()


def test_demo_breakdown_adds_up_and_combines_the_pair():
    result = breakdown_site(ROOT / "configs" / "demo.toml")
    table = result.breakdown
    assert table["period"].n_unique() == 12
    metered = (result.estimates.frame.with_columns(
        m=pl.col("start_utc").dt.convert_time_zone("America/Chicago").dt.strftime("%Y-%m"))
        .group_by("m").agg(pl.col("energy_kwh").sum()))
    sums = table.group_by("period").agg(pl.col("kwh").sum())
    joined = sums.join(metered, left_on="period", right_on="m")
    for row in joined.iter_rows(named=True):
        assert row["kwh"] == pytest.approx(row["energy_kwh"], rel=1e-9)
    assert "CH-1+CHWP-1" in table["equipment"].to_list()
    # The demo's truth (truth.csv, written by the generator) for a load that the demo keeps
    # well specified: the water heater cycles independently of everything else.
    truth = pl.read_csv(ROOT / "demo_meters" / "truth.csv")
    true_dhw = truth.filter(pl.col("equipment") == "DHW-1")["mean_draw_kw"][0]
    d = {x["equipment"]: x for x in result.fit["draws"]}["DHW-1"]
    assert d["kw_low"] <= true_dhw <= d["kw_high"]
