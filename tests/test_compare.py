"""Season comparison (disagg.analyses.compare and `disagg compare`).

The rule is checked on hand-made estimates (exact p-values, every verdict, matching by id);
the whole chain on synthetic buildings with known truth (tests/synthetic.py: a +30 % step in
one load's draw from the second calendar month on) and on a small file-based site written
by tests/test_cli.py's `write_site`. All data here is invented.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
import json
import math
import re
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import polars as pl
import pytest
import typer
from scipy.stats import norm
from typer.testing import CliRunner

from disagg.cli import app
from disagg.analyses.compare import (
    COLUMNS,
    DEFAULT_MIN_CHANGE,
    compare_aligned,
    compare_estimates,
    parse_period,
)
from disagg.errors import ConfigError
from disagg.fit.estimate import Term, WeatherFit, estimate_draws
from disagg.present.outputs import to_json
from disagg.present.terminal import compare_summary
from synthetic import TZ, make_building, make_office
from test_cli import CAUTION_LINE, GUIDE, TRUE_DRAW_KW, write_site

runner = CliRunner()

# Standard normal two-sided 5 % point, printed to 7 digits in normal tables (common
# practice, no source): p(1.959964) = 0.05 to within 2 phi(1.96) x 5e-7 = 6e-8.
Z_TWO_SIDED_5PCT = 1.959964
P_TOL_7_DIGITS = 1e-7

# The expected header of compare.csv, written out by hand from the issue.
EXPECTED_COLUMNS = ["equipment", "kw_before", "kw_before_low", "kw_before_high", "kw_after",
                    "kw_after_low", "kw_after_high", "change", "p_value", "verdict"]


# ---------------------------------------------------------------------------------------
# parse_period


def test_parse_period_reads_two_inclusive_dates():
    import datetime as dt

    assert parse_period("2025-06-01:2025-08-31", "--before") == (dt.date(2025, 6, 1),
                                                                 dt.date(2025, 8, 31))
    assert parse_period(" 2025-06-01 : 2025-06-01 ", "--after") == (dt.date(2025, 6, 1),
                                                                    dt.date(2025, 6, 1))


@pytest.mark.parametrize("text", ["2025-06-01", "2025-06-01:2025-08-31:2025-09-30",
                                  "June:August", "2025-06-31:2025-08-31", ""])
def test_parse_period_refuses_what_is_not_two_dates(text):
    with pytest.raises(ConfigError) as err:
        parse_period(text, "--before")
    assert str(err.value) == (f"--before {text!r}: expected FROM:TO dates such as "
                              "2025-06-01:2025-08-31")


def test_parse_period_refuses_from_after_to():
    with pytest.raises(ConfigError) as err:
        parse_period("2025-08-31:2025-06-01", "--after")
    assert str(err.value) == ("--after '2025-08-31:2025-06-01': TO 2025-06-01 is before FROM "
                              "2025-08-31; expected FROM:TO with FROM on or before TO")


# ---------------------------------------------------------------------------------------
# The rule, on hand-made estimates


def _est(rows: list[tuple], critical: float = 2.0, base_id: str = "baseload",
         weather: dict | None = None, half: dict | None = None) -> SimpleNamespace:
    """An object with the fields compare_estimates reads from an Estimates.

    rows: (id, kw, se_kw, flags); a 'not-run' row is not fitted. half: id -> the interval's
    half-width when the stability checks widened it beyond critical x se_kw [kW].
    """
    terms, kw, low, high, se = [], [], [], [], []
    column = 0
    for eq_id, k, s, flags in rows:
        fitted = "not-run" not in flags
        terms.append(Term(eq_id, eq_id.split("+"), eq_id, None, None, "none", list(flags),
                          column if fitted else None))
        column += fitted
        h = (half or {}).get(eq_id, critical * s)
        kw.append(k if fitted else math.nan)
        low.append(max(k - h, 0.0) if fitted else math.nan)
        high.append(k + h if fitted else math.nan)
        se.append(s if fitted else math.nan)
    return SimpleNamespace(terms=terms, kw=np.array(kw), kw_low=np.array(low),
                           kw_high=np.array(high), se_kw=np.array(se), se_hac_kw=np.array(se),
                           critical=critical, base_id=base_id, weather=weather or {})


def _by_id(table: pl.DataFrame, details: list[dict]) -> dict[str, dict]:
    return {r["equipment"]: {**r, **d} for r, d in zip(table.iter_rows(named=True), details)}


def test_p_value_is_the_two_sided_normal_tail_of_the_difference():
    se = 0.5
    after = 10.0 + Z_TWO_SIDED_5PCT * math.hypot(se, se)
    table, details = compare_estimates(_est([("CH-1", 10.0, se, [])]),
                                       _est([("CH-1", after, se, [])]))
    assert table.columns == EXPECTED_COLUMNS == COLUMNS
    assert table["p_value"][0] == pytest.approx(0.05, abs=P_TOL_7_DIGITS)
    assert details[0]["z"] == pytest.approx(Z_TWO_SIDED_5PCT, rel=1e-12)
    # scipy.stats as an outside reference for another z [ran, scipy 1.x]: z = -3.
    t2, _ = compare_estimates(_est([("CH-1", 10.0, 0.3, [])]),
                              _est([("CH-1", 10.0 - 3 * math.hypot(0.3, 0.4), 0.4, [])]))
    assert t2["p_value"][0] == pytest.approx(2 * norm.sf(3.0), rel=1e-9)
    assert t2["change"][0] == pytest.approx(-0.15, rel=1e-12)


# (before kW, before se, after kW, after se, after flags) -> verdict; min_change 5 %.
VERDICTS = {
    "10 % up, z = 7": (10.0, 0.1, 11.0, 0.1, [], "rising"),
    "10 % down, z = -7": (10.0, 0.1, 9.0, 0.1, [], "falling"),
    "3 % up, z = 4: significant but under min_change": (10.0, 0.05, 10.3, 0.05, [], "steady"),
    "6 % up, z = 0.85: not significant, not shown inside +-5 %": (10.0, 0.5, 10.6, 0.5, [],
                                                                   "unclear"),
    "1 % up, narrow: shown inside +-5 % (equivalence)": (10.0, 0.1, 10.1, 0.1, [], "steady"),
    "change interval about +-100 %": (10.0, 3.0, 14.0, 3.0, [], "unclear"),
    "prior-driven after": (10.0, 0.1, 11.0, 0.1, ["prior-driven"], "unclear"),
    "inseparable after": (10.0, 0.1, 11.0, 0.1, ["inseparable:P-1"], "unclear"),
    "schedule-bound after": (10.0, 0.1, 11.0, 0.1, ["schedule-bound"], "unclear"),
    "unstable after (its interval already wider)": (10.0, 0.1, 11.0, 0.1, ["unstable"],
                                                     "rising"),
    "combined after": (10.0, 0.1, 11.0, 0.1, ["combined"], "rising"),
    "before at 0 kW": (0.0, 0.1, 1.0, 0.1, [], "unclear"),
}


@pytest.mark.parametrize("case", list(VERDICTS))
def test_verdict_rule(case):
    kb, sb, ka, sa, flags, verdict = VERDICTS[case]
    table, details = compare_estimates(_est([("CH-1", kb, sb, [])]),
                                       _est([("CH-1", ka, sa, flags)]), 0.95, DEFAULT_MIN_CHANGE)
    row = _by_id(table, details)["CH-1"]
    assert row["verdict"] == verdict
    assert (row["reason"] is not None) == (verdict == "unclear")
    assert row["kw_before"] == kb and row["kw_after"] == ka
    assert row["p_value"] is not None  # both fitted: the numbers are shown even when unclear


def test_unclear_reasons_name_the_cause():
    table, details = compare_estimates(
        _est([("A", 10.0, 0.1, []), ("B", 10.0, 3.0, []), ("C", 0.0, 0.1, [])]),
        _est([("A", 11.0, 0.1, ["prior-driven", "inseparable:B"]), ("B", 14.0, 3.0, []),
              ("C", 1.0, 0.1, [])]))
    rows = _by_id(table, details)
    assert rows["A"]["reason"] == "the after estimate is prior-driven, inseparable:B"
    assert re.fullmatch(r"the change's interval -\d+\.\d% to \+\d+\.\d% is neither clearly "
                        r"beyond nor clearly inside \+-5%", rows["B"]["reason"]), rows["B"]["reason"]
    assert rows["C"]["reason"] == "the earlier draw is 0 kW: no relative change"
    assert rows["C"]["change"] is None


def test_min_change_and_confidence_move_the_verdict():
    before, after = _est([("CH-1", 10.0, 0.1, [])]), _est([("CH-1", 10.6, 0.2, [])])
    # z = 0.6 / 0.2236 = 2.68, p = 0.0073; change 6 %.
    assert compare_estimates(before, after, 0.95, 0.05)[0]["verdict"][0] == "rising"
    # Against +-10 %: the 90 % interval 0.06 +- 1.645 x 0.0229 = 2.2 % to 9.8 % lies inside
    # (two one-sided tests at 5 %): steady.
    assert compare_estimates(before, after, 0.95, 0.10)[0]["verdict"][0] == "steady"
    # At 99.9 % the change is not significant (p = 0.0073) and its 99.8 % interval
    # (-1.1 % to 13.1 %) is not inside +-5 %: unclear.
    assert compare_estimates(before, after, 0.999, 0.05)[0]["verdict"][0] == "unclear"


def test_the_widened_interval_widens_the_test():
    # se_kw 0.1 but the baseload-variant checks widened the interval to +-0.6 kW (critical 2):
    # the standard error used is 0.3, so a 0.6 kW step is z = 0.6 / hypot(0.3, 0.1) = 1.90.
    before = _est([("F-1", 10.0, 0.1, ["unstable"])], half={"F-1": 0.6})
    after = _est([("F-1", 10.6, 0.1, [])])
    table, details = compare_estimates(before, after)
    assert details[0]["se_before_kw"] == pytest.approx(0.3, rel=1e-12)
    assert details[0]["z"] == pytest.approx(0.6 / math.hypot(0.3, 0.1), rel=1e-12)
    # Not significant, and too wide to show it inside +-5 %: unclear (not steady).
    assert table["verdict"][0] == "unclear"
    # Without the widening the same step would be called.
    t2, _ = compare_estimates(_est([("F-1", 10.0, 0.1, [])]), after)
    assert t2["verdict"][0] == "rising"


def test_ids_match_only_when_both_fits_report_them_the_same_way():
    before = _est([("CH-1+P-1", 60.0, 0.2, ["combined"]), ("F-1", 11.0, 0.1, []),
                   ("C-1", 5.5, 0.1, [])], base_id="baseload+H-1")
    after = _est([("CH-1", 60.0, 0.2, []), ("P-1", 7.5, 0.2, []), ("F-1", 11.0, 0.1, []),
                  ("C-1", 5.5, 0.1, ["not-run"]), ("H-1", 18.0, 0.1, [])])
    table, details = compare_estimates(before, after)
    rows = _by_id(table, details)
    assert table["equipment"].to_list() == ["CH-1+P-1", "F-1", "C-1", "H-1", "CH-1", "P-1"]
    assert rows["F-1"]["verdict"] == "steady"
    expected_reasons = {
        "CH-1+P-1": "no draw of its own in the after period (not combined: CH-1 fitted; "
                    "P-1 fitted)",
        "C-1": "no draw of its own in the after period (not run)",
        "H-1": "no draw of its own in the before period (in the baseload row 'baseload+H-1')",
        "CH-1": "no draw of its own in the before period (part of the combined row "
                "'CH-1+P-1')",
        "P-1": "no draw of its own in the before period (part of the combined row "
               "'CH-1+P-1')",
    }
    for eq, reason in expected_reasons.items():
        r = rows[eq]
        assert (r["verdict"], r["reason"]) == ("unclear", reason), eq
        assert r["change"] is None and r["p_value"] is None, eq
    assert rows["C-1"]["kw_before"] == 5.5 and rows["C-1"]["kw_after"] is None
    assert rows["H-1"]["kw_before"] is None and rows["H-1"]["kw_after"] == 18.0
    # Combined the same way in both periods: compared.
    t2, _ = compare_estimates(_est([("CH-1+P-1", 60.0, 0.2, ["combined"])]),
                              _est([("CH-1+P-1", 66.0, 0.2, ["combined"])]))
    assert t2.row(0, named=True)["verdict"] == "rising"


def test_a_weather_draw_is_compared_at_the_earlier_reference_temperature():
    # Cooling draw = draw at balance + slope x (T - 18 degC)+. Before: reference 24 degC; after:
    # a hotter period, reference 28 degC, same physical draw line. At 24 degC both give
    # 50 + 2 x 6 = 62 kW: steady, although the after fit's own figure is 70 kW.
    cov = np.diag([0.04, 0.0001])

    def w(ref):
        return WeatherFit(mode="cooling", balance_temp_c=18.0, reference_temp_c=ref,
                          kw_at_balance=50.0, slope_kw_per_degc=2.0, slope_se_kw_per_degc=0.01,
                          cov=cov)

    before = _est([("CH-1", 62.0, 0.2, [])], weather={0: w(24.0)})
    after = _est([("CH-1", 70.0, 0.2, [])], weather={0: w(28.0)})
    table, details = compare_estimates(before, after)
    row = _by_id(table, details)["CH-1"]
    assert row["kw_after"] == pytest.approx(62.0, rel=1e-12)
    assert row["kw_after_high"] - row["kw_after"] == pytest.approx(
        2.0 * math.sqrt(0.04 + 36 * 0.0001), rel=1e-12)
    assert row["reference_temp_c"] == 24.0
    assert row["verdict"] == "steady"


# ---------------------------------------------------------------------------------------
# Synthetic buildings with known truth: H-1's draw rises 30 % from April


STEP = ("H-1", 1.3)
TRUE_CHANGE = STEP[1] - 1.0
DAYS = 58  # 2025-03-03 .. 2025-04-29: March and April, each fitted on its own


def _month_compare(seed: int, misspecified: bool = False):
    s = make_building(seed, days=DAYS, step=STEP, misspecified=misspecified)
    month = s.aligned.frame["start_utc"].dt.convert_time_zone(TZ).dt.strftime("%Y-%m").to_numpy()
    fits = [estimate_draws(s.site, dataclasses.replace(s.aligned, use=s.aligned.use & (month == m)))
            for m in ("2025-03", "2025-04")]
    table, details = compare_estimates(*fits, 0.95, DEFAULT_MIN_CHANGE)
    truth = {}  # (month, id) -> true mean running draw [kW] = energy / run-hours
    for j, eq in enumerate(s.aligned.equipment_ids):
        for m in ("2025-03", "2025-04"):
            truth[(m, eq)] = s.true_kwh_month[(m, eq)] / s.aligned.hours[month == m, j].sum()
    return _by_id(table, details), truth


def test_a_30_percent_step_is_called_rising_and_the_rest_steady():
    rows, truth = _month_compare(0)
    h = rows["H-1"]
    assert h["verdict"] == "rising"
    assert h["p_value"] < 1e-6
    assert h["change_low"] <= TRUE_CHANGE <= h["change_high"]
    assert h["kw_before_low"] <= truth[("2025-03", "H-1")] <= h["kw_before_high"]
    assert h["kw_after_low"] <= truth[("2025-04", "H-1")] <= h["kw_after_high"]
    assert truth[("2025-04", "H-1")] / truth[("2025-03", "H-1")] == pytest.approx(STEP[1])
    # The untouched loads are not called rising or falling; steady only where a month's data
    # show them inside +-5 % (two one-sided tests), else unclear.
    others = {eq: r["verdict"] for eq, r in rows.items() if eq != "H-1"}
    assert set(others) == {"CH-1", "F-1", "C-1", "P-1"}
    assert set(others.values()) <= {"steady", "unclear"}, others
    assert others["CH-1"] == "steady"  # the best-determined load (60 kW)


# Measured on 2026-12-01 over seeds 0..19 (4 untouched loads each, truth from the synthetic
# building): well-specified: 2 false rising/falling calls among 77 clear verdicts (2.6 %),
# 3 unclear (F-1 folded into the baseload row); H-1 called rising 20/20, its change interval
# covering +30 % 20/20. Misspecified (weather on CH-1 and F-1, baseload off its schedule):
# 0 false calls among 60 clear verdicts, 20 unclear (F-1 schedule-bound each time); H-1
# rising 19/20, change interval covering +30 % 19/20. Each period's 95 % kW intervals held
# the true per-month draw 187 of 197 times (0.949) well-specified, 198 of 200 (0.990)
# misspecified.
# Bounds: at a nominal 5 % two-sided test (before the 5 % min-change makes calls rarer) the
# false-call count over ~70 clear verdicts has mean ~3.5 and sd ~1.8; 10 % is twice the
# nominal rate, which an honest rule exceeds with probability under 2 %.
SEEDS = range(20)
MAX_FALSE_CALL_RATE = 0.10
MIN_DETECTION_RATE = 0.90
MIN_CHANGE_COVERAGE = 0.85
# A rule that said "unclear" to everything would never be wrong. With steady only when two
# one-sided tests put the change inside +-5 % (Schuirmann 1987), one month against the next
# shows that for 32 of 80 untouched well-specified load-runs (measured 2026-12-04; 0 of 80
# on the misspecified building, whose weather and wandering baseload widen every interval).
MIN_CLEAR_SHARE = 0.25
# The same bound as tests/test_recovery.py: ~200 intervals at a nominal 95 % have sd 1.5 %.
MIN_KW_COVERAGE = 0.90


@pytest.fixture(scope="module", params=[False, True], ids=["well-specified", "misspecified"])
def many_seeds(request):
    return request.param, [_month_compare(seed, request.param) for seed in SEEDS]


def test_false_calls_on_untouched_loads_are_rare(many_seeds):
    misspecified, runs = many_seeds
    false_calls, clear, unclear, real_changes = 0, 0, 0, 0
    for rows, truth in runs:
        for eq, r in rows.items():
            if eq == "H-1":
                continue
            true_change = truth[("2025-04", eq)] / truth[("2025-03", eq)] - 1.0
            if abs(true_change) >= DEFAULT_MIN_CHANGE:
                real_changes += 1  # the weather moved it: not a false call either way
                continue
            if r["verdict"] == "unclear":
                unclear += 1
                continue
            clear += 1
            false_calls += r["verdict"] in ("rising", "falling")
    rate = false_calls / max(clear + unclear, 1)
    if not misspecified:
        assert clear >= MIN_CLEAR_SHARE * (clear + unclear), (clear, unclear)
    assert rate <= MAX_FALSE_CALL_RATE, (misspecified, false_calls, clear, unclear, real_changes)
    assert real_changes == 0 or misspecified


def test_the_step_is_found_and_its_interval_covers_it(many_seeds):
    _, runs = many_seeds
    rising = sum(rows["H-1"]["verdict"] == "rising" for rows, _ in runs)
    covered = sum(rows["H-1"]["change_low"] is not None
                  and rows["H-1"]["change_low"] <= TRUE_CHANGE <= rows["H-1"]["change_high"]
                  for rows, _ in runs)
    assert rising >= MIN_DETECTION_RATE * len(runs), rising
    assert covered >= MIN_CHANGE_COVERAGE * len(runs), covered


# ---------------------------------------------------------------------------------------
# The command


BEFORE = "2025-01-20:2025-02-02"
AFTER = "2025-02-03:2025-02-16"


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    return write_site(tmp_path_factory.mktemp("compare") / "data", days=28, seed=11)


def _sha256(paths: list[Path]) -> dict[Path, str]:
    return {p: hashlib.sha256(p.read_bytes()).hexdigest() for p in paths}


def test_compare_writes_the_table_and_json_and_prints_the_summary(site, tmp_path):
    out = tmp_path / "out"
    inputs = [site["site"], site["meter"], site["runlog"]]
    before = _sha256(inputs)
    result = runner.invoke(app, ["compare", str(site["site"]), "--before", BEFORE,
                                 "--after", AFTER, "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert result.stderr == ""
    assert sorted(p.name for p in out.iterdir()) == ["compare.csv", "compare.json"]
    assert _sha256(inputs) == before
    lines = result.stdout.splitlines()
    assert lines[0] == ("Synthetic test site: draws before 2025-01-20 to 2025-02-02 (1,344 "
                        "intervals used) and after 2025-02-03 to 2025-02-16 (1,344 intervals "
                        "used)")
    assert CAUTION_LINE in lines
    assert lines[-1] == f"Wrote {out.resolve() / 'compare.csv'}, {out.resolve() / 'compare.json'}"

    csv = pl.read_csv(out / "compare.csv")
    assert csv.columns == EXPECTED_COLUMNS
    assert csv["equipment"].to_list() == list(TRUE_DRAW_KW)
    # The draws do not change in this site: both periods recover them and the verdict is
    # steady. About 125 run hours per load and period and 0.3 kWh noise per interval give
    # standard errors near 0.1 kW, so 0.5 kW is a loose bound (as in test_cli); interval
    # coverage is measured over many seeds above.
    for r in csv.iter_rows(named=True):
        truth = TRUE_DRAW_KW[r["equipment"]]
        assert r["kw_before"] == pytest.approx(truth, abs=0.5), r
        assert r["kw_after"] == pytest.approx(truth, abs=0.5), r
        assert r["kw_before_low"] < r["kw_before"] < r["kw_before_high"], r
        assert r["kw_after_low"] < r["kw_after"] < r["kw_after_high"], r
        assert r["verdict"] == "steady", r
        assert r["change"] == pytest.approx(r["kw_after"] / r["kw_before"] - 1, abs=2e-6)

    report = json.loads((out / "compare.json").read_text(encoding="utf-8"))
    assert report["caution"] == CAUTION_LINE.removeprefix("Caution: ")
    for name, (d0, d1) in (("before", BEFORE.split(":")), ("after", AFTER.split(":"))):
        p = report["periods"][name]
        assert (p["from"], p["to"], p["intervals_used"], p["days"]) == (d0, d1, 1344, 14)
        assert set(p["fit_quality"]) >= {"interval", "hourly"}
        assert isinstance(p["warnings"], list)
    assert [d["equipment"] for d in report["equipment"]] == list(TRUE_DRAW_KW)


def _no_data(s):
    return (["--after", "2026-01-01:2026-01-31"],
            (f"{s['meter']}: no meter intervals in --after 2026-01-01:2026-01-31; the meter "
            "covers 2025-01-20 to 2025-02-16 (local dates)"))


BAD = {
    "bad --before": lambda s: (["--before", "2025-06-01"],
                               ("--before '2025-06-01': expected FROM:TO dates such as "
                               "2025-06-01:2025-08-31")),
    "--after FROM after TO": lambda s: (["--after", "2025-02-16:2025-02-03"],
                                        ("--after '2025-02-16:2025-02-03': TO 2025-02-03 is "
                                        "before FROM 2025-02-16; expected FROM:TO with FROM on "
                                        "or before TO")),
    "overlapping periods": lambda s: (["--after", "2025-02-01:2025-02-16"],
                                      ("--before 2025-01-20:2025-02-02 and --after "
                                      "2025-02-01:2025-02-16 overlap; expected two separate "
                                      "periods")),
    "a period without data": _no_data,
    "--confidence 1.5": lambda s: (["--confidence", "1.5"],
                                   "--confidence 1.5: expected a fraction from 0.5 to 0.999"),
    "--min-change -0.1": lambda s: (["--min-change", "-0.1"],
                                    ("--min-change -0.1: expected a fraction of 0 or more, such "
                                    "as 0.05 for 5 %")),
}


@pytest.mark.parametrize("case", list(BAD))
def test_bad_input_gives_one_error_line_exit_1_and_no_output(site, tmp_path, case):
    args, message = BAD[case](site)
    options = {"--before": BEFORE, "--after": AFTER}
    for i in range(0, len(args), 2):
        options[args[i]] = args[i + 1]
    out = tmp_path / "out"
    result = runner.invoke(app, ["compare", str(site["site"]), "--out", str(out),
                                 *[x for kv in options.items() for x in kv]])
    assert result.exit_code == 1, result.output
    assert result.stderr == f"Error: {message}\n"
    assert result.stdout == ""
    assert not out.exists()


def test_compare_has_help_text_and_a_guide_entry():
    cmd = typer.main.get_command(app).commands["compare"]  # type: ignore[attr-defined]
    result = runner.invoke(app, ["compare", "--help"])
    assert result.exit_code == 0, result.output
    text = " ".join(result.stdout.replace("│", " ").split())
    assert cmd.help and " ".join(cmd.help.split()) in text
    assert [p.name for p in cmd.params if not getattr(p, "help", None)] == []
    guide = GUIDE.read_text(encoding="utf-8")
    assert re.search(r"^    disagg compare SITE\.toml --before FROM:TO --after FROM:TO --out DIR",
                     guide, re.MULTILINE)


def test_each_periods_intervals_cover_its_true_draws(many_seeds):
    _, runs = many_seeds
    hits = []
    for rows, truth in runs:
        for eq, r in rows.items():
            for month, side in (("2025-03", "before"), ("2025-04", "after")):
                if r[f"kw_{side}"] is not None:
                    hits.append(r[f"kw_{side}_low"] <= truth[(month, eq)] <= r[f"kw_{side}_high"])
    assert len(hits) >= 0.9 * len(runs) * 5 * 2
    assert np.mean(hits) >= MIN_KW_COVERAGE, np.mean(hits)


# ---------------------------------------------------------------------------------------
# The verdict rule shared with history (disagg.analyses.verdict), and groups

from scipy.stats import t as student_t  # noqa: E402

from disagg.analyses.compare import compare_aligned  # noqa: E402
from disagg.analyses.verdict import change_verdict  # noqa: E402


@pytest.mark.parametrize("df", [None, 9])
def test_the_tost_verdict_against_a_hand_computation(df):
    # Outside reference: scipy.stats.norm / scipy.stats.t quantiles and tails [ran].
    dist = norm if df is None else student_t(df)
    b, sb, a, sa, m, conf = 20.0, 0.2, 20.3, 0.25, 0.05, 0.95
    alpha = 1 - conf
    c = a / b - 1
    se_c = math.hypot(sa, (a / b) * sb) / b  # delta method for a ratio
    t_low, t_high = (c + m) / se_c, (m - c) / se_c
    p_tost = max(dist.sf(t_low), dist.sf(t_high))
    v = change_verdict(b, sb, a, sa, conf, m, df)
    assert v["change"] == pytest.approx(c, rel=1e-12)
    assert v["se_change"] == pytest.approx(se_c, rel=1e-12)
    assert v["p_equivalence"] == pytest.approx(p_tost, rel=1e-9)
    z = (a - b) / math.hypot(sa, sb)
    assert v["p_value"] == pytest.approx(2 * dist.sf(abs(z)), rel=1e-9)
    # By hand: c = 1.5 %, se 1.63 %; the 90 % interval c +- q(0.95) se lies inside +-5 %.
    q = dist.ppf(1 - alpha)
    assert -m < c - q * se_c and c + q * se_c < m
    assert v["verdict"] == "steady"
    assert v["change_low"] == pytest.approx(c - dist.ppf(1 - alpha / 2) * se_c, rel=1e-12)
    # Schuirmann's equivalence: steady exactly when the 1 - 2 alpha interval is inside.
    for a2 in np.linspace(19.0, 21.0, 41):
        v2 = change_verdict(b, sb, a2, sa, conf, m, df)
        c2 = a2 / b - 1
        s2 = math.hypot(sa, (a2 / b) * sb) / b
        inside = -m < c2 - q * s2 and c2 + q * s2 < m
        significant = 2 * dist.sf(abs((a2 - b) / math.hypot(sa, sb))) < alpha
        expected = ("rising" if c2 > 0 else "falling") if significant and abs(c2) >= m else (
            "steady" if inside else "unclear")
        assert v2["verdict"] == expected, (a2, v2)
    # Both kinds of call happen in that sweep (the check is not vacuous).
    calls = {change_verdict(b, sb, a2, sa, conf, m, df)["verdict"]
             for a2 in np.linspace(19, 21, 41)}
    assert calls == {"rising", "falling", "steady", "unclear"}


def test_the_group_is_compared_and_its_members_say_so():
    # The synthetic office year: the lead chiller CH-1 and its pump CWP-1 run together
    # (both with nameplate priors); CH-1 +15 % from 2025-07-25: the group's true change
    # is 18 / 135 = +13.3 %. April-July against August-October, as in the issue.
    import datetime as dt

    from synthetic_year import CHILLER_STEP_ON, make_year
    s = make_year(0, steps={"CH-1": (1.15, CHILLER_STEP_ON)})
    result = compare_aligned(s.site, s.aligned, (dt.date(2025, 4, 1), dt.date(2025, 7, 24)),
                             (dt.date(2025, 8, 1), dt.date(2025, 10, 31)))
    rows = {r["equipment"]: r for r in result.report.equipment}
    assert result.report.groups == ["CH-1+CWP-1"]
    g = rows["CH-1+CWP-1"]
    assert g["verdict"] == "rising", g
    assert g["change_low"] <= 18.0 / 135.0 <= g["change_high"], g
    for m in ("CH-1", "CWP-1"):
        assert rows[m]["verdict"] == "unclear"
        assert rows[m]["reason"].startswith("covered by the group row 'CH-1+CWP-1'")
    eqs = result.table["equipment"].to_list()
    assert eqs[eqs.index("CH-1+CWP-1") + 1:eqs.index("CH-1+CWP-1") + 3] == ["CH-1", "CWP-1"]
    # The loads that did not change are never called rising or falling.
    for eq in ("AC-1", "FZ-1", "AHU-1"):
        assert rows[eq]["verdict"] in ("steady", "unclear"), rows[eq]


# One baseload form for both periods (issue 10). The invented office of tests/synthetic.py
# (make_office, "swing": the true baseload swings daily, the declared profile is
# occupied/unoccupied): three weeks before are too few intervals to try the 168-level
# profile; six weeks after are enough, and their data prefer it.
OFFICE_BEFORE = (dt.date(2025, 1, 6), dt.date(2025, 1, 26))
OFFICE_AFTER = (dt.date(2025, 2, 3), dt.date(2025, 3, 16))


@pytest.fixture(scope="module")
def swing_office():
    return make_office(1, "swing", days=70)


def test_both_periods_use_the_before_periods_form_and_the_after_preference_is_said(
        swing_office):
    s = swing_office
    result = compare_aligned(s.site, s.aligned, OFFICE_BEFORE, OFFICE_AFTER)
    report = json.loads(to_json(result.report.as_json()))
    form = report["baseload_form"]
    before, after = report["periods"]["before"], report["periods"]["after"]
    assert form["pinned"] is False
    assert before["baseload_form"] == after["baseload_form"] == form["used"]
    assert form["before_prefers"] == before["form_preferred"] == form["used"]
    assert not form["used"].startswith("hour-of-week")
    # On its own the after period takes the 168-level profile (what its fit compared).
    assert form["after_prefers"] == after["form_preferred"]
    assert form["after_prefers"].startswith("hour-of-week")
    assert form["after_forms"]["used"] == form["after_prefers"]
    assert form["note"] == (
        f"the after period on its own would have chosen the baseload form "
        f"{form['after_prefers']}, not {form['used']}; both periods use {form['used']} (the "
        "before period's choice) so that the draws compare like with like; the before "
        "period has too few intervals to try that form")
    text = compare_summary(result)
    assert (f"Baseload form: {form['used']} in both periods, chosen by the data of the "
            "before period (the baseline)") in text
    assert f"Note: {form['note']}" in text


def test_a_form_pinned_by_the_site_file_serves_both_periods(swing_office):
    s = swing_office
    site = dataclasses.replace(s.site, baseload=dataclasses.replace(s.site.baseload,
                                                                    form="occupied+level"))
    result = compare_aligned(site, s.aligned, OFFICE_BEFORE, OFFICE_AFTER)
    form = result.report.baseload_form
    assert form["pinned"] is True
    assert result.report.before.baseload_form == result.report.after.baseload_form \
        == "occupied+level"
    assert form["chosen"] == "pinned by the site file's [baseload] form"
    assert form["after_prefers"].startswith("hour-of-week")
    assert "(pinned by the site file)" in form["note"]
