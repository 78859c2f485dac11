"""bench/RESULTS.md's sections: bench/portfolio.py writes the file, bench/drift.py and
bench/longsite.py each keep their own section between two marker comments."""

from __future__ import annotations

from pathlib import Path

RESULTS = Path(__file__).resolve().parent / "RESULTS.md"


def put_section(begin: str, end: str, section: str, results: Path = RESULTS) -> None:
    """Replace the text from the line `begin` to the line `end` of results with section (which
    starts with begin and ends with end), or append it when the markers are not there yet."""
    old = results.read_text(encoding="utf-8") if results.exists() else ""
    if begin in old and end in old:
        new = old[:old.index(begin)] + section + old[old.index(end) + len(end):]
    else:
        new = old.rstrip("\n") + "\n\n" + section + "\n"
    results.write_text(new, encoding="utf-8")
