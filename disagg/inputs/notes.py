"""Notes as a person reads them: file paths relative to the site file, times in the site's
zone, and one line for a finding that several pieces of equipment share.

The readers and checks write each note with the full path and UTC times (exact, and what
their tests pin down); every note a run shows (terminal, fit.json warnings, the report) goes
through ``tidy`` once, where the inputs are assembled (disagg.analyses.pipeline).
"""

from __future__ import annotations

import datetime as dt
import os
import re
import zoneinfo
from pathlib import Path

# A UTC time as the readers print a datetime: 2025-01-06 00:20:00+00:00 (seconds optional
# fraction).
_UTC = re.compile(r"\b(\d{4}-\d{2}-\d{2})[ T](\d{2}:\d{2}:\d{2})(\.\d+)?\+00:00\b")
_EQUIPMENT = re.compile(r"equipment '([^']+)'")
# Equipment ids named in a grouped line before "and N more" (project choice, no source).
FIRST_IDS = 6


def _local(match: re.Match, zone: zoneinfo.ZoneInfo) -> str:
    t = dt.datetime.fromisoformat(f"{match.group(1)}T{match.group(2)}+00:00")
    return t.astimezone(zone).isoformat()


def _relative(files: list[Path], base: Path) -> list[tuple[str, str]]:
    """(absolute text, text relative to base) for each file, longest first."""
    pairs = []
    for f in files:
        try:
            rel = os.path.relpath(f, base)
        except ValueError:  # another drive (Windows)
            continue
        pairs.append((str(f), rel))
    return sorted(pairs, key=lambda p: -len(p[0]))


def tidy(notes: list[str], files: list[Path], base: Path, tz: str) -> list[str]:
    """Notes with paths relative to base, UTC times in tz, and per-equipment lines merged.

    Lines that differ only in the equipment they name (``equipment 'CH-1'``) become one line
    naming every such equipment (the first FIRST_IDS, then how many more) with their count,
    in the order the first of them appeared. Repeated identical lines are shown once.

    Args:
        files: the input files whose absolute paths the notes may contain.
        base: the site file's folder.
    """
    zone = zoneinfo.ZoneInfo(tz)
    pairs = _relative(files, base)
    groups: dict[str, list[str]] = {}
    order: list[str] = []
    for note in notes:
        for full, rel in pairs:
            note = note.replace(full, rel)
        note = _UTC.sub(lambda m: _local(m, zone), note)
        ids = _EQUIPMENT.findall(note)
        key = _EQUIPMENT.sub("equipment {}", note) if len(ids) == 1 else note
        if key not in groups:
            groups[key] = []
            order.append(key)
        groups[key].extend(ids[:1] if len(ids) == 1 else [])
    out = []
    for key in order:
        ids = list(dict.fromkeys(groups[key]))
        if not ids:
            out.append(key)
            continue
        if len(ids) == 1:
            out.append(key.replace("equipment {}", f"equipment {ids[0]!r}"))
            continue
        named = ", ".join(ids[:FIRST_IDS])
        more = f" and {len(ids) - FIRST_IDS} more" if len(ids) > FIRST_IDS else ""
        out.append(key.replace("equipment {}", f"{len(ids)} equipment ({named}{more})"))
    return out


# A load's own finding as the fit words it: "AHU-1 is unstable: ...".
_LOAD_KIND = re.compile(r"^(\S+) is ([a-z][a-z-]*): ")


def group_kinds(lines: list[str]) -> list[str]:
    """For people: lines saying the same kind of thing about several loads ("X is unstable:
    ...") become one line with their count, their ids (the first FIRST_IDS) and the first
    line in full; the others' figures stay in fit.json. Other lines are unchanged, in order;
    a kind seen once stays as it is."""
    kinds: dict[str, list[int]] = {}
    for i, line in enumerate(lines):
        m = _LOAD_KIND.match(str(line))
        if m:
            kinds.setdefault(m.group(2), []).append(i)
    out = []
    for i, line in enumerate(lines):
        m = _LOAD_KIND.match(str(line))
        group = kinds.get(m.group(2), []) if m else []
        if len(group) < 2:
            out.append(line)
        elif i == group[0]:
            ids = [_LOAD_KIND.match(str(lines[j])).group(1) for j in group]  # type: ignore[union-attr]
            more = f" and {len(ids) - FIRST_IDS} more" if len(ids) > FIRST_IDS else ""
            out.append(f"{len(ids)} loads are {m.group(2)} ({', '.join(ids[:FIRST_IDS])}{more}); "
                       f"the first: {line} (each one's figures are in fit.json, warnings)")
    return out
