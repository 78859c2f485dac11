"""The report's look: colours (colour-blind-safe Okabe-Ito set) and the print-ready CSS."""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:
    pass

# One colour per equipment, assigned in the order of the fit's draws: the Okabe & Ito
# colour-blind-safe set (without black; its yellow, faint as a line on white, moved to the
# end), then further distinct hues (common practice, no source). More equipment than colours
# reuses them in order.
PALETTE = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#882255",
           "#44AA99", "#117733", "#332288", "#AA4499", "#999933", "#661100", "#6699CC",
           "#DDCC77", "#F0E442")
BASELOAD_COLOUR = "#8C8C8C"
UNEXPLAINED_COLOUR = "#D8D2C4"
ESTIMATED_COLOUR = "#C6C9E6"
ALARM_COLOUR = "#C0001A"
METERED_COLOUR = "#1D2433"

DRIFT_PANELS_PER_CHART = 6
MONTHS_PER_TABLE = 6  # columns of months per table: fits a printed page
# Fewer local days than this: the fit page shows hourly sums instead of daily sums.
MIN_DAYS_FOR_DAILY = 10

_WIDTH_IN = 7.2  # chart width [in]; scaled to the page width by CSS
CHART_LABEL_CHARS = 30  # longer names are cut in charts
LEGEND_CHARS = 90  # about the characters of legend text across a chart


CSS = """
:root { --ink:#1d2433; --muted:#5b6475; --rule:#d8dce3; --accent:#1f4e79; --warn:#a3001a; }
* { box-sizing: border-box; }
html { background:#eef0f3; }
body { margin:0; color:var(--ink);
  font: 15px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif; }
main { max-width: 880px; margin: 0 auto; background:#fff; padding: 28px 40px 40px; }
header.top h1 { font-size: 25px; margin: 0 0 4px; line-height: 1.2; }
header.top p { margin: 2px 0; color: var(--muted); }
nav.toc { margin: 14px 0 0; font-size: 13.5px; }
nav.toc ol { margin: 4px 0 0; padding-left: 22px; columns: 2; }
nav.toc a { color: var(--accent); text-decoration: none; }
section.page { border-top: 3px solid var(--accent); margin-top: 34px; padding-top: 6px; }
h2 { font-size: 20px; margin: 8px 0 10px; color: var(--accent); }
h3 { font-size: 15.5px; margin: 18px 0 6px; }
p { margin: 6px 0 10px; }
.muted, figcaption { color: var(--muted); }
figcaption { font-size: 12.5px; margin-top: 2px; }
figure { margin: 14px 0; }
svg.chart { display: block; width: 100%; height: auto; }
svg.chart * { stroke-linejoin: round; stroke-linecap: butt; }
table { border-collapse: collapse; width: 100%; margin: 8px 0 14px; font-size: 13px;
  font-variant-numeric: tabular-nums; }
th, td { padding: 3px 6px; border-bottom: 1px solid var(--rule); text-align: left;
  vertical-align: top; }
th { font-weight: 600; border-bottom: 1.5px solid #9aa3b0; background: #f6f7f9; }
th.num { text-align: right; }
td.num { text-align: right; white-space: nowrap; }
.eq { white-space: nowrap; }
.long { overflow-wrap: anywhere; }
.name { font-size: 0.88em; color: var(--muted); }
table.wide { font-size: 11.5px; }
table.wide th, table.wide td { padding: 2px 4px; }
tr.total td { font-weight: 600; border-top: 1.5px solid #9aa3b0; }
.swatch { display: inline-block; width: 11px; height: 11px; margin-right: 6px;
  border: 1px solid rgba(0,0,0,.3); vertical-align: -1px;
  -webkit-print-color-adjust: exact; print-color-adjust: exact; }
.kpis { display: flex; flex-wrap: wrap; gap: 10px; margin: 10px 0 14px; }
.kpi { border: 1px solid var(--rule); border-radius: 4px; padding: 8px 12px; min-width: 160px; }
.kpi span { display: block; font-size: 12px; color: var(--muted); }
.kpi b { display: block; font-size: 19px; font-variant-numeric: tabular-nums; }
.meets { color: #0b6b2e; font-weight: 600; }
.fails { color: var(--warn); font-weight: 600; }
.alarm { color: var(--warn); font-weight: 600; }
.scroll { overflow-x: auto; }
.caution { border-left: 5px solid var(--warn); background: #fff5f5; padding: 10px 14px;
  margin: 10px 0; -webkit-print-color-adjust: exact; print-color-adjust: exact; }
.caution p { margin: 4px 0; font-size: 16px; }
div.summary { border: 1px solid var(--rule); border-left: 5px solid var(--accent);
  padding: 4px 14px; margin: 14px 0 0; }
div.summary h2 { font-size: 17px; margin: 6px 0 4px; }
div.summary ul { margin: 4px 0 8px; padding-left: 20px; }
div.summary li { margin: 3px 0; }
footer { margin-top: 30px; font-size: 12px; color: var(--muted); }
@page { margin: 14mm 12mm; }
@media print {
  html, body { background: #fff; }
  body { font-size: 10pt; }
  main { max-width: none; margin: 0; padding: 0; }
  nav.toc { display: none; }
  section.page { break-before: page; border-top: none; margin-top: 0; padding-top: 0; }
  section.page.first { break-before: auto; margin-top: 12pt; }
  div.summary { break-inside: avoid; }
  h2, h3 { break-after: avoid; }
  figure, tr, .kpis, .caution { break-inside: avoid; }
  thead { display: table-header-group; }
  table { font-size: 8.5pt; }
  table.wide { font-size: 7.5pt; }
  .scroll { overflow: visible; }
  a { color: inherit; text-decoration: none; }
}
"""
