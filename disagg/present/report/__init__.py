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
    _months,
    _priors_section,
    _summary,
    from_celsius,
    interval_counts,
    local_span,
)
from disagg.present.report.styles import CSS, DRIFT_PANELS_PER_CHART

if TYPE_CHECKING:
    from disagg.analyses.drift import DriftResult



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
            _summary(result, drift, table_names),
            _glance(result, ch, table_names),
            _months(result, ch, table_names, periods),
            _drift_section(drift, ch, drift_names, drift_note,
                           {str(w) for w in result.fit.warnings}),
            _fit_section(result, ch),
            _priors_section(result),
            _caution_section(result),
        ]
    title = f"Energy breakdown: {site_name}"
    return ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
            f"<title>{e(title)}</title>\n<style>{CSS}</style>\n</head>\n<body>\n<main>\n"
            + "\n".join(parts)
            + f"\n<footer>Produced by {e(fit.tool)} from the site file "
              f"{e(Path(fit.site_file).name)}. Every figure in this report is an "
              "estimate from the meter and the run logs.</footer>\n</main>\n</body>\n</html>\n")
