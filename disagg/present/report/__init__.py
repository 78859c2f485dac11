"""The hand-over report: one self-contained HTML file a facilities manager can read and print.

``render_report`` turns a breakdown (and, when given, a drift result) into a single HTML
document: no script, no network reference, no font or image files; every chart is an inline
SVG drawn with matplotlib's SVG backend with text kept as text (``svg.fonttype = none``, so
the browser's own sans-serif font draws it and names stay searchable). Print CSS puts each
section on its own page and keeps charts and table rows whole.

Every text that comes from data (site and equipment names, notes, warnings) is HTML-escaped;
matplotlib escapes the text it writes into the SVG, and mathtext parsing is switched off so a
``$`` in a name is just a dollar sign.
"""

from __future__ import annotations

import datetime as dt
import math
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING

from disagg.analyses.pipeline import BreakdownResult
from disagg.present.report.charts import (
    _RC,
    _Charts,
    colour_map,
    e,
    equipment_order,
)
from disagg.present.report.sections import (  # noqa: F401 - re-exported
    LOCKOUT,
    UNEXPLAINED_PEAK,
    _caution_section,
    _drift_section,
    _fit_section,
    _glance,
    _header,
    _local_span,
    _months,
    _priors_section,
    from_celsius,
    interval_counts,
)
from disagg.present.report.styles import CSS, DRIFT_PANELS_PER_CHART

if TYPE_CHECKING:
    from disagg.analyses.drift import DriftResult

# A default-reference drift run needs at least this many days of data after the reference
# period to have anything to show (common practice, no source: four weeks).
MIN_TRACKED_DAYS = 28


def drift_for(result: BreakdownResult, memory_days: float = 30.0,
              reference: tuple[dt.date, dt.date] | None = None,
              threshold: float = 0.10) -> tuple[DriftResult | None, str | None]:
    """The drift result for a breakdown's own intervals, or None and the reason why not.

    With the default reference (the first 90 days) the data must reach MIN_TRACKED_DAYS past
    it; a given reference period must hold enough usable intervals for a fit (else the
    reason names the period and the dates the data cover). A drift run that fails on these
    data (disagg.errors.DisaggError: a memory that needs an unstable step, ...) is left out
    with its message.

    Raises:
        ConfigError: memory_days not above 0 (a bad option, not a property of the data).
    """
    from disagg.analyses.drift import DEFAULT_REFERENCE_DAYS, drift_aligned
    from disagg.errors import ConfigError, DisaggError
    from disagg.fit.align import BASELOAD_COLUMN_COUNT

    if not (math.isfinite(memory_days) and memory_days > 0):
        raise ConfigError(f"--memory {memory_days:g}: expected a number of days above 0")
    first, last = _local_span(result)
    span_days = (dt.date.fromisoformat(last) - dt.date.fromisoformat(first)).days + 1
    if reference is None and span_days < DEFAULT_REFERENCE_DAYS + MIN_TRACKED_DAYS:
        return None, (f"Drift is left out: the data cover {span_days} days, and tracking "
                      f"needs the {DEFAULT_REFERENCE_DAYS}-day reference period plus at least "
                      f"{MIN_TRACKED_DAYS} days after it; a shorter reference period can be "
                      "given with --reference FROM:TO.")
    if reference is not None:
        # Said here in the reference period's terms: drift_aligned would blame the files.
        aligned = result.aligned
        local_day = aligned.frame["start_utc"].dt.convert_time_zone(result.site.timezone).dt.date()
        inside = int((aligned.use & ((local_day >= reference[0])
                                     & (local_day <= reference[1])).to_numpy()).sum())
        needed = (len(aligned.equipment_ids)
                  + BASELOAD_COLUMN_COUNT[result.site.baseload.profile] + 2)
        period = f"the reference period {reference[0]} to {reference[1]}"
        if inside == 0:
            return None, (f"Drift is left out: {period} has no usable intervals in the data, "
                          f"which cover {first} to {last}; give a reference period inside "
                          "them with --reference FROM:TO.")
        if inside < needed:
            return None, (f"Drift is left out: {period} has only {inside:,} usable intervals "
                          f"in the data, which cover {first} to {last}; a fit needs at least "
                          f"{needed:,}.")
    try:
        drift = drift_aligned(result.site, result.aligned, memory_days, None, reference,
                              threshold, result.estimates.confidence)
    except DisaggError as exc:
        return None, f"Drift is left out: {exc}"
    return drift, None


def report_for(result: BreakdownResult, *, progress: Callable[[str, int, int], None] | None = None,
               memory_days: float = 30.0, reference: tuple[dt.date, dt.date] | None = None,
               drift: bool = True) -> str:
    """The report of a breakdown with its drift page when the data allow one (drift_for).

    drift: False leaves the drift page out (saying so).
    """
    if not drift:
        return render_report(result, None, progress=progress,
                             drift_note="Drift tracking was not asked for in this report.")
    tracked, note = drift_for(result, memory_days, reference)
    return render_report(result, tracked, progress=progress, drift_note=note)


def render_report(result: BreakdownResult, drift: DriftResult | None = None, *,
                  progress: Callable[[str, int, int], None] | None = None,
                  drift_note: str | None = None) -> str:
    """One self-contained HTML document of a breakdown (and its drift), ready to print.

    Args:
        result: the breakdown (disagg.analyses.pipeline.breakdown_site).
        drift: the drift result (disagg.analyses.drift); None leaves the drift page out.
        progress: called as progress("drawing", done, total) as each chart is drawn.
        drift_note: why the drift page is left out (shown in its place when drift is None).

    Returns:
        The HTML text (UTF-8, no script, no external reference).
    """
    import matplotlib as mpl

    table = result.breakdown
    fit = result.fit
    site_name = result.site.name
    drift_names = (list(drift.table["equipment"].unique(maintain_order=True))
                   if drift is not None else [])
    names = equipment_order(result, drift_names)
    colours = colour_map(names)
    table_names = [n for n in names if n in set(table["equipment"].to_list())]
    periods = sorted(table["period"].unique().to_list())
    n_drift_charts = math.ceil(len(drift_names) / DRIFT_PANELS_PER_CHART)
    ch = _Charts(colours, 4 + n_drift_charts, progress)

    with mpl.rc_context(_RC):
        parts = [
            _header(result, periods),
            _glance(result, ch, table_names),
            _months(result, ch, table_names, periods),
            _drift_section(drift, ch, drift_names, drift_note,
                           {str(w) for w in result.fit.get("warnings", [])}),
            _fit_section(result, ch),
            _priors_section(result),
            _caution_section(result),
        ]
    title = f"Energy breakdown: {site_name}"
    return ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
            f"<title>{e(title)}</title>\n<style>{CSS}</style>\n</head>\n<body>\n<main>\n"
            + "\n".join(parts)
            + f"\n<footer>Produced by {e(str(fit.get('tool', 'disagg')))} from the site file "
              f"{e(Path(str(fit.get('site_file', ''))).name)}. Every figure in this report is an "
              "estimate from the meter and the run logs.</footer>\n</main>\n</body>\n</html>\n")
