"""bench/household_sweep.py's coverage accounting: month-circuits whose energy in logged-off
minutes their log cannot show are counted apart, never dropped (rows invented here)."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

_BENCH = Path(__file__).resolve().parents[1] / "bench"


def _load():
    sys.path.insert(0, str(_BENCH))
    spec = importlib.util.spec_from_file_location("household_sweep", _BENCH / "household_sweep.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


sweep = _load()


def _row(name, measured, off, covered, covered_on, kwh=None):
    row = {"row": name, "measured_kwh": measured, "off_kwh": off, "covered": covered,
           "covered_on": covered_on, "kwh": kwh if kwh is not None else measured,
           "kwh_low": measured * 0.9, "kwh_high": measured * 1.1}
    row["held_by_log"] = sweep.held_by_log(row)
    return row


def test_a_circuit_with_energy_its_log_cannot_show_is_counted_apart_not_dropped():
    assert sweep.held_by_log({"measured_kwh": 100.0, "off_kwh": 4.9})
    assert not sweep.held_by_log({"measured_kwh": 100.0, "off_kwh": 5.0})
    rows = [_row("fridge-circuit", 100.0, 20.0, False, True, kwh=80.0),
            _row("heater", 100.0, 0.0, True, True), _row("heater", 100.0, 1.0, False, False)]
    lines = sweep.coverage_lines(rows)
    # All rows, the held rows alone, and against the logged-on energy.
    assert lines[0].startswith("coverage all 0.333 of 3; without rows not held by their log "
                               "(off-energy >= 5%) 0.500 of 2; against the logged-on energy "
                               "0.667 of 3")
    fridge = next(x for x in lines if "fridge-circuit" in x)
    assert "coverage 0.000 of 1, median error -20.0 %" in fridge
    assert "not held by their log 1; held only - of 0; logged-on 1.000 of 1" in fridge
