"""One builder of site files for tests and benches (the benches add tests/ to sys.path).

Every site file written by a test or bench that simulates a building goes through
``site_toml``: the usual tables for a 15-minute kWh meter stamped at interval end and an
events run log, with what differs given as keyword arguments. TOML text is written by the
``tomli_w`` library, so names with quotes or backslashes are escaped correctly.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

import tomli_w

# The usual tables' settings; a test changes only what it needs.
METER = {"time_column": "end", "value_column": "kwh", "unit": "kWh", "stamp": "end"}
RUNLOG = {"layout": "events", "time_column": "time", "equipment_column": "point",
          "state_column": "state"}


def site_toml(*, name: str, timezone: str, meter_file: str | Path, runlog_file: str | Path,
              equipment: Sequence[str | dict[str, Any]], profile: str = "constant",
              occupied: Sequence[str] = (), meter: dict[str, Any] | None = None,
              runlog: dict[str, Any] | None = None, history: str | Path | None = None,
              tables: dict[str, dict[str, Any]] | None = None, header: str = "") -> str:
    """The text of a site file.

    Args:
        equipment: ids, or dicts of [[equipment]] settings (each with an ``id``).
        profile, occupied: the [baseload] profile and its occupied spells.
        meter, runlog: settings added to (or replacing) METER and RUNLOG.
        history: the [history] folder, as written in the file.
        tables: further tables ([weather], [tariff], ...), in order.
        header: comment lines put first (each starting with '#').
    """
    data: dict[str, Any] = {
        "site": {"name": name, "timezone": timezone},
        "meter": {"file": Path(meter_file).as_posix(), **METER, **(meter or {})},
        "runlog": {"file": Path(runlog_file).as_posix(), **RUNLOG, **(runlog or {})},
        "baseload": {"profile": profile, **({"occupied": list(occupied)} if occupied else {})},
    }
    if history is not None:
        data["history"] = {"folder": Path(history).as_posix()}
    data.update(tables or {})
    # One [[equipment]] table per load, as a person writes them (tomli_w would write small
    # tables inline in one array).
    loads = "".join("\n[[equipment]]\n" + tomli_w.dumps({"id": e} if isinstance(e, str) else e)
                    for e in equipment)
    return header + tomli_w.dumps(data) + loads


def write_site_toml(path: Path, **settings: Any) -> Path:
    """site_toml(**settings) written to path (folders made as needed); returns path."""
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(site_toml(**settings), encoding="utf-8")
    return path
