"""Property-based tests of the `disagg` command on damaged inputs, and a DST equivalence.

The inputs start from the small valid synthetic site of tests/test_cli.py (`write_site`: a
meter CSV with UTC offsets, an events run log in naive local time, a site TOML; all data
invented). Hypothesis then damages them the way real exports are damaged: garbage bytes and
lines, cells replaced by text, empty cells, huge, negative or non-finite numbers, columns
dropped, renamed or swapped, rows shuffled, duplicated or dropped, times written in other
forms, files cut mid-line, emptied or written in another encoding, Parquet instead of CSV,
TOML values of the wrong type, keys removed or unknown, other valid choices of a setting.

The property, for both `check` and `breakdown --out DIR`:
- exit status 0 or 1 (2 is an internal error: a bug);
- on 1, stderr is exactly one line starting with "Error: ", and no "Traceback" anywhere;
- no input file changes; `check` writes nothing; `breakdown` writes nothing on 1 (no output
  folder with files, no `.disagg-tmp-*` leftovers anywhere) and exactly breakdown.csv,
  breakdown.parquet and fit.json on 0.

Internal errors these tests found are listed in KNOWN_INTERNAL_ERRORS (tolerated only with
exactly that message, until fixed) or kept out of the generated inputs where they cannot be
tolerated (a crash past the CLI's guard, unbounded memory, warnings on stderr); each such place
says so. Examples are derandomized (the same examples every run) and few enough that this
file runs in well under a minute on two cores.

A last test checks that a meter in naive local time across the autumn clock change gives the
same breakdown as the same meter with UTC offsets. The site-file table tests add a valid
[tariff], [history] and [weather] and then damage their values, add misspelt tables, arrays of
tables and settings above the first table: the same property, and a name that is no table of
a site file must end in exit 1 for both commands.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
import io
import json
import math
import random
import re
import tempfile
import tomllib
import zoneinfo
from pathlib import Path

import numpy as np
import polars as pl
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from disagg.cli import app
from disagg.analyses.pipeline import breakdown_site
from test_cli import write_site

runner = CliRunner()

OUTPUT_FILES = ["breakdown.csv", "breakdown.parquet", "fit.json"]
CSV_COLUMNS = ["period", "equipment", "run_hours", "kw", "kw_low", "kw_high", "kwh", "kwh_low",
               "kwh_high", "share", "flags", "peak_kw", "cost"]
EXAMPLES = 150  # per property test: the file runs in about 25 s on two cores
PROPERTY_SETTINGS = settings(max_examples=EXAMPLES, deadline=None, derandomize=True,
                             database=None, suppress_health_check=[HealthCheck.too_slow,
                                                                   HealthCheck.data_too_large])
TZ = "America/Chicago"
METER, RUNLOG, TOML = "meter.csv", "runlog.csv", "site.toml"


# ---------------------------------------------------------------------------------------
# The undamaged site, read once into rows and a TOML dict


def _base() -> dict:
    with tempfile.TemporaryDirectory() as d:
        s = write_site(Path(d) / "data", days=2, seed=5)
        rows = {name: [line.split(",") for line in
                       (s["folder"] / name).read_text(encoding="utf-8").splitlines()]
                for name in (METER, RUNLOG)}
        toml = tomllib.loads(s["site"].read_text(encoding="utf-8"))
    return {"rows": rows, "toml": toml}


def _other_layouts(events: list[list[str]]) -> dict[str, tuple[list[list[str]], dict]]:
    """The base events log as a samples export (a state every 15 min, holding at most 20
    min) and as a runtime export (run minutes per 15 min, stamped at the start)."""
    log = pl.DataFrame(events[1:], schema=events[0], orient="row").with_columns(
        pl.col("time").str.to_datetime(), on=(pl.col("state") == "on").cast(pl.Int64))
    ids = log["point"].unique(maintain_order=True).to_list()
    grid = pl.datetime_range(log["time"].min(), log["time"].max(), "5m", eager=True).alias("time")
    states = pl.DataFrame(grid).join(
        log.pivot(on="point", index="time", values="on"), on="time", how="left"
    ).with_columns(pl.col(ids).forward_fill()).with_columns(
        quarter=pl.col("time").dt.truncate("15m"))
    samples = states.filter(pl.col("time") == pl.col("quarter")).select(
        pl.col("time").dt.strftime("%Y-%m-%d %H:%M:%S"), *[pl.col(i).cast(pl.String) for i in ids])
    runtime = (states.group_by("quarter", maintain_order=True).agg(pl.col(ids).sum() * 5)
               .unpivot(index="quarter", variable_name="point", value_name="minutes")
               .sort("quarter", maintain_order=True)
               .select(pl.col("quarter").dt.strftime("%Y-%m-%d %H:%M:%S").alias("time"),
                       "point", pl.col("minutes").cast(pl.String)))
    return {
        "samples": ([samples.columns] + [list(r) for r in samples.rows()],
                    {"layout": "samples", "time_column": "time", "max_hold_minutes": 20}),
        "runtime": ([runtime.columns] + [list(r) for r in runtime.rows()],
                    {"layout": "runtime", "time_column": "time", "equipment_column": "point",
                     "minutes_column": "minutes", "stamp": "start", "interval_minutes": 15}),
    }


BASE = _base()
LAYOUTS = _other_layouts(BASE["rows"][RUNLOG])


@dataclasses.dataclass
class Case:
    """Inputs being damaged: CSV rows (header first), the TOML as data, byte-level edits."""

    rows: dict[str, list[list[str]]]
    toml: dict
    line_end: dict[str, str]
    parquet: dict[str, bool]  # file -> write as Parquet (True: with inferred column types)
    byte_ops: list[tuple]
    check_args: list[str]
    breakdown_args: list[str]


def _new_case() -> Case:
    return Case(rows={k: [list(r) for r in v] for k, v in BASE["rows"].items()},
                toml=json.loads(json.dumps(BASE["toml"])), line_end={}, parquet={},
                byte_ops=[], check_args=[], breakdown_args=[])


# ---------------------------------------------------------------------------------------
# A small TOML writer (the standard library only reads TOML), so that damage can be done
# on the data and still produce a file that parses, or fails to parse, as intended.


def _toml_str(s: str) -> str:
    # JSON string escapes are TOML basic-string escapes, except that TOML also wants DEL
    # escaped and has no surrogate escapes (ensure_ascii=False keeps non-ASCII as is).
    return json.dumps(s, ensure_ascii=False).replace("\x7f", "\\u007f")


def _toml_key(k: str) -> str:
    return k if re.fullmatch(r"[A-Za-z0-9_-]+", k) else _toml_str(k)


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return _toml_str(v)
    if isinstance(v, (dt.datetime, dt.date)):
        return v.isoformat()
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{_toml_key(k)} = {_toml_value(x)}" for k, x in v.items()) + "}"
    raise TypeError(type(v))


def _is_table_array(v) -> bool:
    return isinstance(v, list) and bool(v) and all(isinstance(x, dict) for x in v)


def dump_toml(data: dict) -> str:
    """Top-level values first, then [tables], then [[arrays of tables]]."""
    out = [f"{_toml_key(k)} = {_toml_value(v)}" for k, v in data.items()
           if not isinstance(v, dict) and not _is_table_array(v)]
    for k, v in data.items():
        if isinstance(v, dict):
            out += ["", f"[{_toml_key(k)}]"] + [f"{_toml_key(a)} = {_toml_value(b)}"
                                               for a, b in v.items()]
    for k, v in data.items():
        if _is_table_array(v):
            for table in v:
                out += ["", f"[[{_toml_key(k)}]]"] + [f"{_toml_key(a)} = {_toml_value(b)}"
                                                     for a, b in table.items()]
    return "\n".join(out) + "\n"


def test_the_toml_writer_round_trips_the_base_site_and_odd_values():
    odd = {"k": {"s": "a\"b\\c\x00\x7f\u00e9\U0001f600\n", "f": [1.5, -0.0, 1e300],
                 "n": float("nan"), "i": float("-inf"), "d": dt.date(2025, 1, 2),
                 "t": {"x y": True}}}
    assert tomllib.loads(dump_toml(BASE["toml"])) == BASE["toml"]
    back = tomllib.loads(dump_toml(odd))["k"]
    assert back["s"] == odd["k"]["s"] and back["f"] == odd["k"]["f"] and back["t"] == odd["k"]["t"]
    assert math.isnan(back["n"]) and back["i"] == float("-inf") and back["d"] == odd["k"]["d"]


# ---------------------------------------------------------------------------------------
# Damage


def _reformat_time(text: str, form: str, naive_tz: str) -> str:
    """One time cell in another form; cells that do not parse stay as they are."""
    try:
        t = dt.datetime.fromisoformat(text.strip())
    except ValueError:
        return text
    tz = zoneinfo.ZoneInfo(naive_tz)
    aware = t if t.tzinfo else t.replace(tzinfo=tz)
    local = aware.astimezone(tz)
    utc = aware.astimezone(dt.timezone.utc)
    naive = local.replace(tzinfo=None)
    return {
        "naive-iso": naive.isoformat(sep=" "),
        "naive-T": naive.isoformat(),
        "no-seconds": naive.strftime("%Y-%m-%d %H:%M"),
        "utc-z": utc.strftime("%Y-%m-%dT%H:%M:%SZ"),
        "offset": local.isoformat(),
        "offset-no-colon": local.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "fraction": local.isoformat(timespec="milliseconds"),
        "us-date": naive.strftime("%m/%d/%Y %H:%M"),
        "eu-date": naive.strftime("%d.%m.%Y %H:%M"),
        "epoch-s": str(int(utc.timestamp())),
        "date-only": naive.strftime("%Y-%m-%d"),
        "words": naive.strftime("%b %d %Y %I:%M %p"),
        "utc-naive": utc.replace(tzinfo=None).isoformat(sep=" "),
    }[form]


def _move_time(text: str, delta: dt.timedelta) -> str:
    """A time cell moved by delta in absolute time, written in its own style (UTC offset or
    naive local time); cells that do not parse stay as they are."""
    try:
        t = dt.datetime.fromisoformat(text.strip())
    except ValueError:
        return text
    tz = zoneinfo.ZoneInfo(TZ)
    moved = (t if t.tzinfo else t.replace(tzinfo=tz)).astimezone(dt.timezone.utc) + delta
    local = moved.astimezone(tz)
    return local.isoformat() if t.tzinfo else local.replace(tzinfo=None).isoformat(sep=" ")


# Local midnights two days before a clock change in TZ; the base site starts 2025-01-20.
MOVE_TO = {"spring-forward": dt.datetime(2025, 3, 8), "fall-back": dt.datetime(2025, 11, 1)}


TIME_FORMS = ["naive-iso", "naive-T", "no-seconds", "utc-z", "offset", "offset-no-colon",
              "fraction", "us-date", "eu-date", "epoch-s", "date-only", "words", "utc-naive"]


def apply(case: Case, op: tuple) -> None:
    """Apply one damage operation (a tuple: name, target file, parameters)."""
    kind, f, *p = op
    if kind.startswith("toml"):
        _apply_toml(case, op)
        return
    if kind in ("truncate", "insert-bytes", "empty", "encode"):
        case.byte_ops.append(op)
        return
    if kind == "move":  # both files moved in time so that they cross a clock change
        tz = zoneinfo.ZoneInfo(TZ)
        delta = MOVE_TO[p[0]].replace(tzinfo=tz) - dt.datetime(2025, 1, 20, tzinfo=tz)
        for name in (METER, RUNLOG):
            for r in case.rows[name][1:]:
                if r:
                    r[0] = _move_time(r[0], delta)
        return
    rows = case.rows[f]
    header, body = (rows[0], rows[1:]) if rows else ([], [])
    width = max(len(header), 1)
    if kind == "cell":
        i, j, value = p
        if body:
            r = body[i % len(body)]
            if r:
                r[j % len(r)] = value
    elif kind == "header":  # rename a column
        j, name = p
        if header:
            header[j % len(header)] = name
    elif kind == "swap-header":
        if len(header) > 1:
            header.reverse()
    elif kind == "drop-column":
        (j,) = p
        j %= width
        for r in rows:
            if j < len(r):
                del r[j]
    elif kind == "add-column":
        name, value = p
        for k, r in enumerate(rows):
            r.append(name if k == 0 else value)
    elif kind == "garbage-line":
        i, text = p
        body.insert(i % (len(body) + 1), text.split(","))
    elif kind == "duplicate-rows":
        i, n = p
        if body:
            k = i % len(body)
            body[k:k] = [list(body[k]) for _ in range(n)]
    elif kind == "drop-rows":
        i, n = p
        if body:
            k = i % len(body)
            del body[k:k + n]
    elif kind == "keep-rows":
        (n,) = p
        del body[n:]
    elif kind == "shuffle":
        (seed,) = p
        random.Random(seed).shuffle(body)
    elif kind == "reverse":
        body.reverse()
    elif kind == "times":
        form, scope, i = p
        j = 0  # the time column comes first in both files
        targets = (body if scope == "all" else body[:1] if scope == "first"
                   else [body[i % len(body)]] if body else [])
        for r in targets:
            if r:
                r[j] = _reformat_time(r[j], form, TZ)
    elif kind == "relayout":  # the same run log in another valid layout
        rows, table = LAYOUTS[p[0]]
        rows = [list(r) for r in rows]
        header, body = rows[0], rows[1:]
        runlog = case.toml.get("runlog")
        if isinstance(runlog, dict):
            case.toml["runlog"] = {"file": runlog.get("file", RUNLOG), **table}
    elif kind == "line-end":
        case.line_end[f] = p[0]
    elif kind == "parquet":
        case.parquet[f] = p[0]
    else:
        raise ValueError(op)
    if kind not in ("line-end", "parquet"):
        case.rows[f] = [header] + body


def _apply_toml(case: Case, op: tuple) -> None:
    kind, path, *p = op
    parent = case.toml
    for key in path[:-1]:
        if isinstance(parent, dict) and key in parent:
            parent = parent[key]
        elif isinstance(parent, list) and isinstance(key, int) and parent:
            parent = parent[key % len(parent)]
        else:
            return
    last = path[-1]
    if isinstance(parent, list):
        if not parent or not isinstance(last, int):
            return
        last %= len(parent)
    elif not isinstance(parent, dict):
        return
    if kind == "toml-del":
        if isinstance(parent, dict):
            parent.pop(last, None)
        else:
            del parent[last]
    elif kind == "toml-set":
        parent[last] = p[0]
    elif kind == "toml-append":  # one more [[equipment]]
        if isinstance(parent, dict) and isinstance(parent.get(last), list):
            parent[last].append(p[0])
    elif kind == "toml-weather":
        # The meter file as an outdoor temperature file, and a weather-aware first load.
        unit, with_load = p
        parent["weather"] = {"file": "meter.csv", "time_column": "end", "temp_column": "kwh",
                             "unit": unit}
        eq = parent.get("equipment")
        if with_load and isinstance(eq, list) and eq and isinstance(eq[0], dict):
            eq[0].update(weather="cooling", balance_temp=0.5)
    else:
        raise ValueError(op)


# Cell values: the usual suspects plus random text and numbers.
CELL_WORDS = ["", " ", "NaN", "nan", "inf", "-inf", "Infinity", "1e308", "1e309", "-1", "-0",
              "0", "1e-320", "9" * 400, "0x10", "1_000", "1,5", " 5 ", "TRUE", "On", "yes", "2",
              "-0.5", "0.5", "null", "NA", "#N/A", "\"", "'", "=1+1", "\t", "CH-9", "ch-1",
              " CH-1 ", "AHU-1", "2025-01-20 00:00:00", "2025-13-45 99:99", "1.0.0", "∞", "５"]
cell_values = st.one_of(
    st.sampled_from(CELL_WORDS),
    st.text(max_size=12),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(min_value=-(10 ** 25), max_value=10 ** 25).map(str),
)
files = st.sampled_from([METER, RUNLOG])
index = st.integers(min_value=0, max_value=10 ** 6)

csv_ops = st.one_of(
    st.tuples(st.just("cell"), files, index, index, cell_values),
    st.tuples(st.just("header"), files, index, st.one_of(st.sampled_from(
        ["", "kwh", "end", "time", "point", "state", "KWH", " kwh", "kwh "]), st.text(max_size=8))),
    st.tuples(st.just("swap-header"), files),
    st.tuples(st.just("drop-column"), files, index),
    st.tuples(st.just("add-column"), files, st.sampled_from(["extra", "kwh", "time", ""]),
              cell_values),
    st.tuples(st.just("garbage-line"), files, index, st.text(max_size=40)),
    st.tuples(st.just("duplicate-rows"), files, index, st.integers(1, 5)),
    st.tuples(st.just("drop-rows"), files, index, st.integers(1, 200)),
    st.tuples(st.just("keep-rows"), files, st.integers(0, 8)),
    st.tuples(st.just("shuffle"), files, st.integers(0, 1000)),
    st.tuples(st.just("reverse"), files),
    st.tuples(st.just("times"), files, st.sampled_from(TIME_FORMS),
              st.sampled_from(["all", "first", "one"]), index),
    st.tuples(st.just("line-end"), files, st.sampled_from(["\r\n", "\r", "\n\n"])),
    st.tuples(st.just("parquet"), files, st.booleans()),
    st.tuples(st.just("relayout"), st.just(RUNLOG), st.sampled_from(["samples", "runtime"])),
    st.tuples(st.just("move"), st.just("both"), st.sampled_from(sorted(MOVE_TO))),
)
def byte_damage(targets: list[str]) -> st.SearchStrategy[tuple]:
    """Damage to a file's bytes: cut, garbage inserted, emptied, another encoding."""
    names = st.sampled_from(targets)
    return st.one_of(
        st.tuples(st.just("truncate"), names, index),
        st.tuples(st.just("insert-bytes"), names, index, st.binary(min_size=1, max_size=16)),
        st.tuples(st.just("empty"), names),
        st.tuples(st.just("encode"), names, st.sampled_from(
            ["utf-16", "utf-8-sig", "utf-32", "latin-1-accent", "cp1252-accent"])),
    )


byte_ops = byte_damage([METER, RUNLOG, TOML])

# TOML damage: keys of the site file, values of the wrong type, other valid choices.
TOML_KEYS = [("site", "name"), ("site", "timezone"), ("meter", "file"),
             ("meter", "time_column"), ("meter", "value_column"), ("meter", "unit"),
             ("meter", "stamp"), ("meter", "interval_minutes"), ("runlog", "file"),
             ("runlog", "layout"), ("runlog", "time_column"), ("runlog", "equipment_column"),
             ("runlog", "state_column"), ("runlog", "max_hold_minutes"),
             ("runlog", "minutes_column"), ("runlog", "stamp"), ("runlog", "interval_minutes"),
             ("baseload", "profile"), ("baseload", "occupied"), ("baseload", "closed")] + [
    ("equipment", i, k) for i in range(3) for k in
    ("id", "name", "kind", "control", "exponent", "rated_kw", "hp", "efficiency", "volts",
     "amps", "phases", "power_factor", "draw_kw", "draw_sd_kw", "weather", "balance_temp")]
TOML_TABLES = [("site",), ("meter",), ("runlog",), ("baseload",), ("equipment",),
               ("equipment", 0), ("equipment", 2)]
PLAUSIBLE = {
    "timezone": ["UTC", "America", "US", "America/New_York", "Europe/Paris",
                 "Australia/Lord_Howe", "Mars/Base", "america/chicago", "",
                 "../../../etc/localtime", "Etc/GMT+6"],
    "file": ["missing.csv", "meter.csv", "runlog.csv", "site.toml", "meter.parquet", ".", "",
             "meter.xml", "meter.txt", "../data/meter.csv", "METER.CSV", "meter.csv\x00"],
    "time_column": ["end", "time", "kwh", "point", "state", "", "END"],
    "value_column": ["kwh", "end", "state", ""],
    "equipment_column": ["point", "state", "time"],
    "state_column": ["state", "point", "time"],
    "minutes_column": ["state"],
    "unit": ["kWh", "Wh", "kW", "kWh-register", "MWh", ""],
    "stamp": ["end", "start", "middle"],
    "interval_minutes": [1, 5, 10, 15, 30, 60, 7, 0, -15, 15.0, "15", 10 ** 20],
    "layout": ["events", "samples", "runtime", "wide"],
    "max_hold_minutes": [15, 0.001, 1e9, -5, float("nan")],
    "profile": ["constant", "occupied", "hour-of-week", "flat"],
    "occupied": [["Mon-Fri 07:00-19:00"], ["Sat-Tue 00:00-24:00"], ["Mon 23:59-24:00"],
                 ["Mon-Sun 00:00-24:00"], ["bad"], [], [1], "Mon-Fri 07:00-19:00",
                 ["Mon-Fri 19:00-07:00"], ["Xyz 07:00-08:00"]],
    "closed": [[dt.date(2025, 1, 20)], ["2025-01-21"], ["2025-02-30"], ["x"], 5, [[]]],
    "id": ["CH-1", "AHU-1", "P-1", "CH-9", "baseload", "unexplained", "a+b", "", " ", "ch-1"],
    "control": ["on-off", "variable", "vfd"],
    "exponent": [1, 2.7, 0, 5, -1, float("inf")],
    "rated_kw": [40, 1e-30, 1e-300, 1e300, 0, -3, float("nan")],
    "hp": [10, 0.001, 1e6],
    "efficiency": [0.9, 1.0, 1.5, 0],
    "volts": [480, 1e-9],
    "amps": [100, 0],
    "phases": [1, 3, 2, 3.0],
    "power_factor": [0.9, 1, 2],
    "draw_kw": [40, 1e-12, 1e12, 0.0, -1],
    "draw_sd_kw": [4, 1e-12, 1e12, 0],
    "weather": ["cooling", "heating", "both"],
    "balance_temp": [65, float("nan")],
}
wrong_values = st.one_of(
    st.sampled_from([0, -1, 1.5, float("nan"), float("inf"), True, False, [], ["x"], {"a": 1},
                     dt.date(2025, 1, 1), dt.datetime(2025, 1, 1, 12, 0), "", "x" * 300]),
    st.text(max_size=10), st.integers(), st.floats())


@st.composite
def toml_ops(draw) -> tuple:
    kind = draw(st.sampled_from(["toml-set", "toml-set", "toml-set", "toml-del", "toml-add"]))
    if kind == "toml-del":
        return ("toml-del", draw(st.sampled_from(TOML_KEYS + TOML_TABLES)))
    if kind == "toml-add":
        choice = draw(st.sampled_from(["unknown-key", "unknown-table", "equipment", "weather"]))
        if choice == "unknown-key":
            table = draw(st.sampled_from(["site", "meter", "runlog", "baseload"]))
            return ("toml-set", (table, draw(st.text(min_size=1, max_size=8))),
                    draw(wrong_values))
        if choice == "unknown-table":
            return ("toml-set", (draw(st.sampled_from(["metre", "extra", "Site"])),),
                    {"a": draw(wrong_values)})
        if choice == "equipment":
            return ("toml-append", ("equipment",),
                    {"id": draw(st.sampled_from(["CH-2", "CH-1", ""]))})
        return ("toml-weather", ("weather",), draw(st.sampled_from(["C", "F", "K"])),
                draw(st.booleans()))
    key = draw(st.sampled_from(TOML_KEYS))
    value = draw(st.one_of(st.sampled_from(PLAUSIBLE[key[-1]]), wrong_values)
                 if key[-1] in PLAUSIBLE else wrong_values)
    return ("toml-set", key, value)


damage_csv = st.lists(st.one_of(csv_ops, csv_ops, byte_ops), min_size=1, max_size=3)
damage_toml = st.lists(st.one_of(toml_ops(), toml_ops(), toml_ops(),
                                 byte_damage([TOML])), min_size=1, max_size=3)
damage_any = st.lists(st.one_of(csv_ops, byte_ops, toml_ops()), min_size=1, max_size=5)

DATES = ["2025-01-20", "2025-01-21", "2025-01-22", "2024-12-31", "2030-01-01", "2025-02-30"]
common_args = st.lists(st.one_of(
    st.tuples(st.sampled_from(["--from", "--to"]), st.sampled_from(DATES)),
    st.tuples(st.just("--on-duplicate"), st.sampled_from(
        ["error", "keep-first", "keep-last", "keep-both"])),
    st.tuples(st.just("--log-offset"), st.sampled_from(
        ["0", "7", "-30.5", "1e6", "1e12", "1e300", "nan", "inf"]))), max_size=2)
check_args = st.lists(st.one_of(st.just(("--find-offset",)), st.tuples(
    st.just("--offset-window"), st.sampled_from(["30", "0", "-5", "2", "nan", "inf", "1e5",
                                                 "1e9"]))),
    max_size=2)
breakdown_args = st.lists(st.tuples(st.just("--confidence"),
                                    st.sampled_from(["0.5", "0.9", "0.999", "0.9999"])),
                          max_size=1)


# ---------------------------------------------------------------------------------------
# Writing a damaged case and checking the property


def _encode(text: str, how: str) -> bytes:
    if how.endswith("-accent"):
        # A non-ASCII character in the first line, written in a single-byte code page.
        first, _, rest = text.partition("\n")
        return (first.replace(",", "\u00e9,", 1) + "\n" + rest).encode(how[:-len("-accent")])
    return text.encode(how)


def write_case(case: Case, folder: Path) -> None:
    folder.mkdir(parents=True)
    names = {METER: METER, RUNLOG: RUNLOG}
    for name in case.rows:
        if name in case.parquet:
            names[name] = name.replace(".csv", ".parquet")
    toml_text = dump_toml(_renamed_files(case.toml, names))
    texts = {TOML: toml_text}
    for name, rows in case.rows.items():
        end = case.line_end.get(name, "\n")
        texts[name] = end.join(",".join(r) for r in rows) + (end if rows else "")
    data = {k: v.encode("utf-8") for k, v in texts.items()}
    for op in case.byte_ops:
        kind, f, *p = op
        if kind == "truncate":
            data[f] = data[f][:p[0] % (len(data[f]) + 1)]
        elif kind == "insert-bytes":
            k = p[0] % (len(data[f]) + 1)
            data[f] = data[f][:k] + p[1] + data[f][k:]
        elif kind == "empty":
            data[f] = b""
        elif kind == "encode":
            try:
                data[f] = _encode(data[f].decode("utf-8"), p[0])
            except (UnicodeDecodeError, UnicodeEncodeError):
                pass
    for name, content in data.items():
        target = folder / names.get(name, name)
        if target.suffix == ".parquet":
            _write_parquet(content, target, case.parquet[name])
        else:
            target.write_bytes(content)


def _renamed_files(toml: dict, names: dict[str, str]) -> dict:
    """The TOML with meter.csv / runlog.csv pointing at the Parquet files written instead."""
    out = dict(toml)
    for table in ("meter", "runlog"):
        t = out.get(table)
        if isinstance(t, dict) and isinstance(t.get("file"), str) and t["file"] in names:
            out[table] = {**t, "file": names[t["file"]]}
    return out


def _write_parquet(content: bytes, target: Path, infer: bool) -> None:
    """The (possibly damaged) CSV as Parquet: all text, or with column types inferred; a file
    polars cannot read as CSV is written as its raw bytes, which is a damaged Parquet file."""
    try:
        frame = pl.read_csv(io.BytesIO(content), infer_schema=infer, try_parse_dates=infer)
        first = frame.columns[0] if frame.width else None
        if first is not None and frame[first].dtype == pl.Datetime:
            # Not a null in a typed time column: readers.parse_times lets it through and
            # check ends in an internal LinAlgError after RuntimeWarnings (reported).
            frame = frame.drop_nulls(first)
        frame.write_parquet(target)
    except Exception:  # noqa: BLE001 - any failure just means a corrupt Parquet file
        target.write_bytes(content)


def _snapshot(root: Path) -> dict[str, str]:
    """Every file under root (hidden ones too) and its SHA-256."""
    return {p.relative_to(root).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*")) if p.is_file()}


# Internal errors (exit 2) these tests found, reported to the lead engineer with minimal
# reproductions; each is tolerated only with exactly this text until it is fixed, when its
# line here must go (the property then demands exit 0 or 1 for those inputs too).
# Internal errors these tests found were fixed (a non-finite or huge --log-offset, a time zone
# name that is a folder, a NUL in a path, a null in a typed time column, a tiny prior sd, a wide
# --offset-window); none is tolerated now.
KNOWN_INTERNAL_ERRORS: list[str] = []
INTERNAL = re.compile(r"Error: internal error \((?P<what>.*)\); run `disagg --debug \.\.\.` for "
                      r"the full trace and report it\n")


def _assert_clean_exit(result, what: str) -> None:
    if result.exit_code == 2:
        m = INTERNAL.fullmatch(result.stderr)
        assert m and any(re.fullmatch(k, m["what"]) for k in KNOWN_INTERNAL_ERRORS), (
            what, result.stderr)
        return
    assert result.exit_code in (0, 1), (what, result.exit_code, result.output)
    assert result.exception is None or isinstance(result.exception, SystemExit), (
        what, repr(result.exception))
    assert "Traceback" not in result.output, (what, result.output)
    if result.exit_code == 1:
        err = result.stderr
        assert err.startswith("Error: ") and err.endswith("\n"), (what, err)
        # Exactly one line: one line feed, at the end. (Control characters such as a
        # carriage return inside a TOML key or equipment id still reach the message
        # unescaped; reported, not asserted here.)
        assert "\n" not in err[:-1], (what, err)


def run_property(case: Case, written: tuple[str, ...] = ("out/",)) -> tuple[int, int]:
    """Write the case, run check and breakdown on it, assert the property; exit codes.

    written: where breakdown may write (path prefixes under the temporary root): the output
    folder, and a history folder when the case's site file names one there."""
    with tempfile.TemporaryDirectory() as d:
        root = Path(d)
        data = root / "data"
        write_case(case, data)
        before = _snapshot(root)

        checked = runner.invoke(app, ["check", str(data / TOML), *case.check_args])
        _assert_clean_exit(checked, "check")
        assert _snapshot(root) == before  # check writes nothing and changes nothing

        out = root / "out"
        result = runner.invoke(app, ["breakdown", str(data / TOML), "--out", str(out),
                                     *case.breakdown_args])
        _assert_clean_exit(result, "breakdown")
        after = _snapshot(root)
        assert list(root.rglob(".disagg-tmp-*")) == []  # no temporary leftovers
        assert {k: v for k, v in after.items() if not k.startswith(written)} == before
        if result.exit_code != 0:
            assert not out.exists() or list(out.iterdir()) == []
        else:
            assert sorted(p.name for p in out.iterdir()) == OUTPUT_FILES
            table = pl.read_csv(out / "breakdown.csv", infer_schema_length=None)
            assert table.columns == CSV_COLUMNS
            kwh = table["kwh"].cast(pl.Float64).to_numpy()
            assert table.height > 0 and np.isfinite(kwh).all()  # nothing built on NaN or inf
            json.loads((out / "fit.json").read_text(encoding="utf-8"))
        return checked.exit_code, result.exit_code


def _labelled(case: Case) -> None:
    """run_property inside a hypothesis test, counting the exit statuses for
    `pytest --hypothesis-show-statistics`."""
    codes = run_property(case)
    event(f"exit status: check {codes[0]}, breakdown {codes[1]}")


def _case(ops: list[tuple], common=(), check=(), breakdown=()) -> Case:
    case = _new_case()
    for op in ops:
        apply(case, op)
    case.check_args = [a for t in [*common, *check] for a in t]
    case.breakdown_args = [a for t in [*common, *breakdown] for a in t]
    return case


# ---------------------------------------------------------------------------------------
# The tests


def test_the_undamaged_site_succeeds():
    # Guards the property tests against passing only because everything fails.
    assert run_property(_case([])) == (0, 0)


@PROPERTY_SETTINGS
@given(ops=damage_csv)
def test_damaged_meter_and_run_log_files_give_a_result_or_one_error_line(ops):
    _labelled(_case(ops))


@PROPERTY_SETTINGS
@given(clock=st.sampled_from(sorted(MOVE_TO)), ops=damage_csv)
def test_damaged_files_across_a_clock_change_give_a_result_or_one_error_line(clock, ops):
    _labelled(_case([("move", "both", clock), *ops]))


@PROPERTY_SETTINGS
@given(ops=damage_toml)
def test_damaged_site_files_give_a_result_or_one_error_line(ops):
    _labelled(_case(ops))


@PROPERTY_SETTINGS
@given(ops=damage_any, common=common_args, check=check_args, breakdown=breakdown_args)
def test_any_damage_with_any_options_gives_a_result_or_one_error_line(ops, common, check,
                                                                      breakdown):
    _labelled(_case(ops, common, check, breakdown))


# ---------------------------------------------------------------------------------------
# Daylight saving: a meter in naive local time equals the same meter with UTC offsets

FALL_BACK_START_LOCAL = dt.datetime(2025, 10, 28)  # local midnight; 10 days cross 2025-11-02
FALL_BACK_DAYS = 10
# A day when clocks go back has 100 fifteen-minute intervals (docs/references.md section 7,
# common practice, no source); an exact count.
FALL_BACK_DAY_INTERVALS = 100
DST_DRAW_KW = {"CH-1": 40.0, "AHU-1": 12.0, "P-1": 5.0}


def _write_fall_back_site(folder: Path, seed: int = 4) -> dict[str, Path]:
    """Invented site over the 2025-11-02 fall-back in America/Chicago: one run log (events
    with UTC offsets, so that both runs read it identically) and the same 15-minute meter
    written twice, with UTC offsets and in naive local time (the repeated hour twice, in
    order, as a utility export shows it)."""
    rng = np.random.default_rng(seed)
    tz = zoneinfo.ZoneInfo(TZ)
    t0 = FALL_BACK_START_LOCAL.replace(tzinfo=tz).astimezone(dt.timezone.utc)
    t1 = (FALL_BACK_START_LOCAL + dt.timedelta(days=FALL_BACK_DAYS)).replace(
        tzinfo=tz).astimezone(dt.timezone.utc)
    n = int((t1 - t0) / dt.timedelta(minutes=15))
    steps = 3 * n  # states change on a 5-minute grid
    grid = pl.datetime_range(t0, t1, "5m", eager=True, time_zone="UTC")
    energy_kwh = np.full(n, 20.0 * 0.25)
    events = []
    for eq, kw in DST_DRAW_KW.items():
        state = np.repeat(rng.integers(0, 2, steps // 6 + 1), 6)[:steps]  # 30-minute spells
        energy_kwh += kw * state.reshape(n, 3).sum(axis=1) * 5 / 60
        change = np.concatenate([[0], np.flatnonzero(np.diff(state)) + 1, [steps]])
        events += [(grid[int(k)], eq, "on" if state[min(k, steps - 1)] else "off") for k in change]
    energy_kwh = np.round(energy_kwh + rng.normal(0.0, 0.3, n), 3)
    log = pl.DataFrame(events, schema=["time", "point", "state"], orient="row", ).sort("time")
    log.with_columns(pl.col("time").dt.convert_time_zone(TZ).dt.to_string(
        "%Y-%m-%dT%H:%M:%S%:z")).write_csv(folder / "runlog.csv")
    end_local = grid.gather(np.arange(1, n + 1) * 3).dt.convert_time_zone(TZ)
    paths = {}
    for form, fmt in (("offset", "%Y-%m-%dT%H:%M:%S%:z"), ("naive", "%Y-%m-%d %H:%M:%S")):
        pl.DataFrame({"end": end_local.dt.to_string(fmt), "kwh": energy_kwh}).write_csv(
            folder / f"meter_{form}.csv")
        toml = {"site": {"name": "Fall-back site", "timezone": TZ},
                "meter": {"file": f"meter_{form}.csv", "time_column": "end",
                          "value_column": "kwh", "unit": "kWh", "stamp": "end"},
                "runlog": {"file": "runlog.csv", "layout": "events", "time_column": "time",
                           "equipment_column": "point", "state_column": "state"},
                "baseload": {"profile": "constant"},
                "equipment": [{"id": eq} for eq in DST_DRAW_KW]}
        paths[form] = folder / f"site_{form}.toml"
        paths[form].write_text(dump_toml(toml), encoding="utf-8")
    return paths


def test_a_naive_local_meter_across_the_fall_back_gives_the_same_breakdown(tmp_path):
    paths = _write_fall_back_site(tmp_path)
    naive_times = pl.read_csv(tmp_path / "meter_naive.csv")["end"]
    # The export really shows the repeated hour twice: 01:00, 01:15, 01:30, 01:45.
    assert sorted(naive_times.filter(naive_times.is_duplicated()).unique().to_list()) == [
        f"2025-11-02 01:{m:02d}:00" for m in (0, 15, 30, 45)]

    naive, offset = breakdown_site(paths["naive"]), breakdown_site(paths["offset"])
    for r in (naive, offset):
        local_day = r.aligned.frame["start_utc"].dt.convert_time_zone(TZ).dt.date()
        assert int((local_day == dt.date(2025, 11, 2)).sum()) == FALL_BACK_DAY_INTERVALS
        assert r.aligned.counts["used"] == r.aligned.counts["intervals"] == \
            FALL_BACK_DAYS * 96 + FALL_BACK_DAY_INTERVALS - 96
    a, b = naive.breakdown, offset.breakdown
    assert a.columns == b.columns and a.height == b.height > 0
    for col, dtype in a.schema.items():
        if dtype.is_numeric():
            x, y = a[col].to_numpy(), b[col].to_numpy()  # nulls become NaN in both
            np.testing.assert_allclose(x, y, rtol=0, atol=1e-9, equal_nan=True, err_msg=col)
        else:
            assert a[col].to_list() == b[col].to_list(), col


# ---------------------------------------------------------------------------------------
# Site-file tables: [weather], [tariff] (with [[tariff.periods]]), [history] and names that
# are not tables of a site file at all


SITE_TABLES = {"site", "meter", "runlog", "baseload", "equipment", "weather", "tariff",
               "history"}
TABLE_VALUES = {
    ("tariff", "currency"): ["USD", "EUR", "", " ", "x" * 20, 5],
    ("tariff", "energy_price"): [0.12, 0, -0.1, 1e6, 1e7, 1e308, float("nan"), float("inf"),
                                 "0.12"],
    ("tariff", "demand_price"): [15.0, 0, -1, float("inf"), 1e300],
    ("tariff", "holidays"): [[dt.date(2025, 1, 20)], ["2025-01-21"], ["2025-02-30"],
                             [dt.datetime(2025, 1, 20, 8, 0)], "2025-01-20", [1]],
    ("tariff", "periods"): [[{"name": "peak", "price": 0.3, "spells": ["Mon-Fri 12:00-18:00"]}],
                            [{"name": "peak", "price": float("nan"),
                              "spells": ["Mon-Fri 12:00-18:00"]}],
                            [{"name": "a", "price": 0.2, "spells": ["Mon-Fri 08:00-18:00"]},
                             {"name": "b", "price": 0.3, "spells": ["Wed 12:00-13:00"]}],
                            [{"name": "peak", "price": 0.3, "spells": []}],
                            [{"name": "peak", "prise": 0.3, "spells": ["Mon 00:00-24:00"]}],
                            [{}], ["peak"]],
    ("weather", "reference_temp"): [65, -459.67, 1e308, float("nan"), float("-inf"), "65"],
    ("weather", "unit"): ["F", "C", "K", ""],
    ("history", "folder"): ["../hist", "../hist/sub", "", 5],
}
# Table names one edit away from a real one, and names no site file has.
NEAR_NAMES = ["histroy", "tarif", "wether", "equipments", "Meter", "run_log", "base-load",
              "sites", "tariffs", "weathr", "x", "portfolio", "metadata"]


@st.composite
def table_ops(draw) -> tuple:
    choice = draw(st.sampled_from(["value", "value", "value", "table", "array", "top", "key"]))
    if choice == "value":
        key = draw(st.sampled_from(sorted(TABLE_VALUES)))
        return ("table-set", key, draw(st.one_of(st.sampled_from(TABLE_VALUES[key]),
                                                 wrong_values)))
    if choice == "table":
        name = draw(st.one_of(st.sampled_from(NEAR_NAMES), st.text(min_size=1, max_size=8)))
        return ("toml-set", (name,), {"folder": "x"})
    if choice == "array":
        return ("toml-set", (draw(st.sampled_from(NEAR_NAMES)),), [{"id": "CH-1"}])
    if choice == "top":  # a setting above the first table
        return ("toml-set", (draw(st.sampled_from(["name", "timezone", "file", "currency"])),),
                draw(wrong_values))
    table = draw(st.sampled_from(["tariff", "history", "weather"]))
    return ("table-set", (table, draw(st.sampled_from(
        ["currancy", "energy_prices", "folders", "refrence_temp", "units", "x"]))), 1)


def _with_tables(case: Case) -> None:
    """A valid [tariff], [history] and [weather] (the meter file read as temperatures)."""
    case.toml["tariff"] = {"currency": "USD", "energy_price": 0.12, "demand_price": 15.0}
    case.toml["history"] = {"folder": "../hist"}
    case.toml["weather"] = {"file": "meter.csv", "time_column": "end", "temp_column": "kwh",
                            "unit": "F"}


def _apply_table(case: Case, op: tuple) -> None:
    if op[0] == "table-set":
        (table, key), value = op[1], op[2]
        if isinstance(case.toml.get(table), dict):
            case.toml[table][key] = value
    else:
        _apply_toml(case, op)


def test_the_site_with_every_table_succeeds():
    case = _new_case()
    _with_tables(case)
    assert run_property(case, ("out/", "hist/")) == (0, 0)


@PROPERTY_SETTINGS
@given(ops=st.lists(table_ops(), min_size=1, max_size=3))
def test_site_file_tables_give_a_result_or_one_error_line(ops):
    case = _new_case()
    _with_tables(case)
    for op in ops:
        _apply_table(case, op)
    codes = run_property(case, ("out/", "hist/"))
    event(f"exit status: check {codes[0]}, breakdown {codes[1]}")
    # A name that is no table of a site file is never ignored: both commands refuse it.
    if set(case.toml) - SITE_TABLES:
        assert codes == (1, 1), (sorted(case.toml), codes)
