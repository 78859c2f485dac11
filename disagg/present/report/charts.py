"""The report's charts: matplotlib figures saved as SVG with text kept as text."""

from __future__ import annotations

import datetime as dt
import html
import io
import math
import re
from collections.abc import Callable
from typing import TYPE_CHECKING

import numpy as np
import polars as pl

from disagg.analyses.pipeline import BreakdownResult
from disagg.progress import report as _report_progress

if TYPE_CHECKING:
    from disagg.analyses.summary import DriftSummary
from disagg.present.report.styles import (
    _WIDTH_IN,
    ALARM_COLOUR,
    BASELOAD_COLOUR,
    CHART_LABEL_CHARS,
    ESTIMATED_COLOUR,
    LEGEND_CHARS,
    METERED_COLOUR,
    PALETTE,
    UNEXPLAINED_COLOUR,
)

_RC = {
    "svg.fonttype": "none",  # text as <text>: no embedded glyphs, no font files
    "svg.hashsalt": "disagg-report",  # stable clip-path ids (prefixed per chart below)
    "text.parse_math": False,  # a '$' in a name is a dollar sign, not mathtext
    "font.family": "sans-serif",
    "font.sans-serif": ["DejaVu Sans", "Liberation Sans", "Arial", "Helvetica"],
    "font.size": 9.0,
    "axes.titlesize": 9.5,
    "axes.labelsize": 9.0,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.edgecolor": "#555555",
    "axes.labelcolor": "#222222",
    "axes.grid": True,
    "axes.axisbelow": True,
    "grid.color": "#E4E6EA",
    "grid.linewidth": 0.6,
    "xtick.color": "#444444",
    "ytick.color": "#444444",
    "legend.frameon": False,
    "legend.fontsize": 8.5,
}

e = html.escape


def _num(x: float | None, digits: int = 0) -> str:
    """A number with thousands separators; '-' for missing or non-finite; no '-0'."""
    if x is None or not math.isfinite(x):
        return "-"
    text = f"{x:,.{digits}f}"
    return text[1:] if text.startswith("-") and float(text[1:].replace(",", "")) == 0 else text


def _short(name: str) -> str:
    """A name as a chart label: at most CHART_LABEL_CHARS characters (tables give it whole)."""
    return name if len(name) <= CHART_LABEL_CHARS else name[:CHART_LABEL_CHARS - 1] + "…"


def _is_base(name: str) -> bool:
    return name.startswith("baseload")


def equipment_order(result: BreakdownResult, extra: list[str] | None = None) -> list[str]:
    """Row names in report order: the fit's draws, other names met in the table or in
    `extra`, then the baseload row(s), estimated gaps and unexplained."""
    names = [d.equipment for d in result.fit.draws]
    seen = set(names)
    for n in list(result.breakdown["equipment"].unique(maintain_order=True)) + (extra or []):
        if n not in seen:
            names.append(n)
            seen.add(n)
    loads = [n for n in names if not _is_base(n) and n not in ("unexplained", "estimated-gaps")]
    tail = ([n for n in names if _is_base(n)]
            + [n for n in names if n == "estimated-gaps"]
            + [n for n in names if n == "unexplained"])
    return loads + tail


def colour_map(names: list[str]) -> dict[str, str]:
    """One fixed colour per row name: loads from PALETTE in order, baseload grey, estimated
    gaps lavender, unexplained a light neutral."""
    colours, k = {}, 0
    for n in names:
        if _is_base(n):
            colours[n] = BASELOAD_COLOUR
        elif n == "unexplained":
            colours[n] = UNEXPLAINED_COLOUR
        elif n == "estimated-gaps":
            colours[n] = ESTIMATED_COLOUR
        else:
            colours[n] = PALETTE[k % len(PALETTE)]
            k += 1
    return colours


_TAG = re.compile(r"<[^>]+>")


def _svg_text(fig, key: str, label: str) -> str:
    """The figure as an inline <svg> element: no XML prolog, DOCTYPE, namespaces, fixed
    size, comments or global style; every id prefixed with `key` so that charts in one page
    never share an id."""
    buf = io.StringIO()
    fig.savefig(buf, format="svg",
                metadata={"Date": None, "Creator": None, "Format": None, "Type": None})
    text = buf.getvalue()
    text = text[text.index("<svg"):]
    text = re.sub(r"<!--.*?-->", "", text, flags=re.DOTALL)
    text = re.sub(r"<defs>\s*<style[^>]*>.*?</style>\s*</defs>", "", text, count=1, flags=re.DOTALL)
    text = re.sub(r"<metadata>.*?</metadata>", "", text, flags=re.DOTALL)

    def fix(m: re.Match) -> str:
        # Only inside tags: text content is escaped by matplotlib (no raw '<' or '>'), and
        # attribute values are escaped too, so a tag never holds a '>' of its own.
        t = m.group(0)
        t = t.replace(' id="', f' id="{key}-').replace("url(#", f"url(#{key}-")
        return t.replace('href="#', f'href="#{key}-')

    text = _TAG.sub(fix, text)
    head_end = text.index(">")
    head = re.sub(r'\s(?:xmlns(?::\w+)?|width|height|version)="[^"]*"', "", text[:head_end])
    return (f'{head} class="chart" role="img" aria-label="{e(label)}"'
            + text[head_end:].rstrip())


class _Charts:
    """Draws the report's charts with one set of colours, counting them for progress."""

    def __init__(self, colours: dict[str, str], total: int,
                 progress: Callable[[str, int, int], None] | None):
        self.colours = colours
        self.total = total
        self.done = 0
        self.progress = progress

    def colour(self, name: str) -> str:
        return self.colours.get(name, PALETTE[0])

    def finish(self, fig, label: str) -> str:
        self.done += 1
        svg = _svg_text(fig, f"c{self.done}", label)
        _report_progress(self.progress, "drawing", self.done, self.total)
        return svg


def _label(ax, x: str | None, y: str | None, tag: str = "") -> None:
    """Axis labels with ids (xlabel*/ylabel*) so that tests can find them in the SVG."""
    if x is not None:
        ax.set_xlabel(x)
        ax.xaxis.label.set_gid(f"xlabel{tag}")
    if y is not None:
        ax.set_ylabel(y)
        ax.yaxis.label.set_gid(f"ylabel{tag}")


def _thousands(axis) -> None:
    from matplotlib.ticker import FuncFormatter

    axis.set_major_formatter(FuncFormatter(lambda v, _: _num(v, 0) if abs(v) >= 10
                                           else f"{v:g}"))


def _range_chart(ch: _Charts, rows: list[dict]) -> str:
    """Horizontal bars of each row's kWh over the range with interval whiskers."""
    from matplotlib.figure import Figure

    n = len(rows)
    fig = Figure(figsize=(_WIDTH_IN, 0.9 + 0.32 * n), layout="constrained")
    ax = fig.add_subplot()
    ypos = np.arange(n)[::-1]
    kwh = np.array([r["kwh"] for r in rows])
    ax.barh(ypos, kwh, height=0.64, color=[ch.colour(r["equipment"]) for r in rows],
            edgecolor="#33333355", linewidth=0.5)
    for y, r in zip(ypos, rows):
        if r["kwh_low"] is not None and r["kwh_high"] is not None:
            ax.errorbar([r["kwh"]], [y], xerr=[[r["kwh"] - r["kwh_low"]],
                                               [r["kwh_high"] - r["kwh"]]],
                        fmt="none", ecolor="#222222", elinewidth=1.0, capsize=3)
    ax.axvline(0, color="#555555", linewidth=0.8)
    ax.set_yticks(ypos, [_short(r["equipment"]) for r in rows])
    ax.grid(axis="y", visible=False)
    top = max([abs(r["kwh_high"] if r["kwh_high"] is not None else r["kwh"]) for r in rows]
              + [abs(float(v)) for v in kwh] + [1.0])
    for y, r in zip(ypos, rows):
        end = r["kwh_high"] if r["kwh_high"] is not None else max(r["kwh"], 0.0)
        share = (f" ({_num(100 * r['share'], 1)} %)" if math.isfinite(r["share"]) else "")
        ax.text(end + 0.01 * top, y, f"{_num(r['kwh'])} kWh{share}",
                va="center", ha="left", fontsize=8, color="#333333")
    low = min([0.0] + [float(v) for v in kwh])
    ax.set_xlim(low - 0.02 * top if low < 0 else 0, 1.32 * top)
    _thousands(ax.xaxis)
    _label(ax, "Energy over the range [kWh]  (whiskers: interval)", None)
    return ch.finish(fig, "Energy per equipment over the range with intervals, kWh")


def _monthly_chart(ch: _Charts, periods: list[str], names: list[str],
                   kwh: dict[tuple[str, str], float]) -> str:
    """Stacked kWh per month: positive parts upward from zero, negative parts (an
    unexplained rest below zero) downward; the metered total marked."""
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    fig = Figure(figsize=(_WIDTH_IN, 4.6), layout="constrained")
    ax = fig.add_subplot()
    x = np.arange(len(periods))
    up = np.zeros(len(periods))
    down = np.zeros(len(periods))
    width = 0.72
    for name in names:
        v = np.array([kwh.get((p, name), 0.0) for p in periods])
        pos, neg = np.where(v > 0, v, 0.0), np.where(v < 0, v, 0.0)
        hatch = "////" if name == "unexplained" else None
        style = {"width": width, "color": ch.colour(name), "edgecolor": "#33333355",
                 "linewidth": 0.4, "hatch": hatch}
        if pos.any():
            ax.bar(x, pos, bottom=up, **style)
        if neg.any():
            ax.bar(x, neg, bottom=down, **style)
        up += pos
        down += neg
    metered = np.array([sum(kwh.get((p, n), 0.0) for n in names) for p in periods])
    ax.scatter(x, metered, marker="_", s=260, color=METERED_COLOUR, linewidths=2, zorder=5)
    ax.axhline(0, color="#555555", linewidth=0.8)
    centre, half = (len(periods) - 1) / 2, max(len(periods), 3) / 2
    ax.set_xlim(centre - half, centre + half)  # one month: a bar, not a wall
    ax.set_xticks(x, periods, rotation=45 if len(periods) > 6 else 0,
                  ha="right" if len(periods) > 6 else "center")
    ax.grid(axis="x", visible=False)
    _thousands(ax.yaxis)
    _label(ax, "Month [YYYY-MM, local]", "Energy per month [kWh]")
    handles = [Patch(facecolor=ch.colour(n), edgecolor="#33333355",
                     hatch="////" if n == "unexplained" else None, label=_short(n))
               for n in names]
    handles.append(Line2D([], [], color=METERED_COLOUR, marker="_", linestyle="none",
                          markersize=14, markeredgewidth=2, label="metered total"))
    longest = max(len(h.get_label()) for h in handles)
    ncol = max(1, min(6, len(handles), LEGEND_CHARS // (longest + 6)))
    fig.legend(handles=handles, loc="outside lower center", ncol=ncol)
    return ch.finish(fig, "Energy per month, stacked by equipment, kWh")


def _date_axis(ax) -> None:
    import matplotlib.dates as mdates

    loc = mdates.AutoDateLocator(minticks=3, maxticks=8)
    ax.xaxis.set_major_locator(loc)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(loc))


def _drift_chart(ch: _Charts, table: pl.DataFrame, names: list[str], summary: DriftSummary,
                 part: int) -> str:
    """Small multiples: each load's tracked daily draw, its band, the reference draw, the
    reference period shaded and alarm days marked."""
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    cols = 2 if len(names) > 1 else 1
    nrows = math.ceil(len(names) / cols)
    fig = Figure(figsize=(_WIDTH_IN, 0.7 + 2.0 * nrows), layout="constrained")
    axes = fig.subplots(nrows, cols, squeeze=False, sharex=True)
    ref = summary.reference
    ref0 = dt.date.fromisoformat(ref["from"]) if ref.get("from") else None
    ref1 = dt.date.fromisoformat(ref["to"]) if ref.get("to") else None
    alarms = {a.equipment: a for a in summary.alarms}
    own = summary.reference_per_equipment
    for k, name in enumerate(names):
        ax = axes[k // cols][k % cols]
        ref0, ref1 = (tuple(dt.date.fromisoformat(d) for d in own[name]) if name in own
                      else (ref0, ref1))
        rows = table.filter(pl.col("equipment") == name).sort("date")
        days = rows["date"].to_numpy()
        kw = rows["kw_tracked"].to_numpy().astype(float)
        lo = rows["kw_low"].to_numpy().astype(float)
        hi = rows["kw_high"].to_numpy().astype(float)
        ref_kw = float(rows["kw_reference"][0])
        alarm = rows["alarm"].to_numpy().astype(bool)
        c = ch.colour(name)
        if ref0 is not None and ref1 is not None:
            ax.axvspan(np.datetime64(ref0), np.datetime64(ref1 + dt.timedelta(days=1)),
                       color="#EEF1F5", zorder=0)
        ax.fill_between(days, lo, hi, color=c, alpha=0.22, linewidth=0)
        ax.plot(days, kw, color=c, linewidth=1.4)
        ax.axhline(ref_kw, color="#333333", linestyle="--", linewidth=1.0)
        if alarm.any():
            ax.plot(days[alarm], kw[alarm], linestyle="none", marker="o", markersize=3,
                    color=ALARM_COLOUR)
        # Axis limits from the draws themselves; a band much wider than their spread would
        # flatten the line, so it is cut at the axis and the title says so.
        values = np.concatenate([kw[np.isfinite(kw)], [ref_kw]])
        v0, v1 = float(values.min()), float(values.max())
        span = max(v1 - v0, 0.1 * abs(ref_kw), 0.5)
        y0, y1 = v0 - 0.5 * span, v1 + 0.5 * span
        band_lo, band_hi = float(np.nanmin(lo)), float(np.nanmax(hi))
        clipped = band_lo < y0 - span or band_hi > y1 + span
        if not clipped:
            y0, y1 = min(y0, band_lo), max(y1, band_hi)
        ax.set_ylim(y0, y1)
        title = _short(name)
        if name in alarms:
            title += f": alarm from {alarms[name].first_alarm_date}"
        if clipped:
            title += " (band wider than shown)"
        ax.set_title(title, loc="left", color=ALARM_COLOUR if name in alarms else "#222222")
        # Each panel has its own draw scale, so each has its own y label; the date axis is
        # shared, so dates and their label go under the lowest panel of each column only.
        lowest = k + cols >= len(names)
        _label(ax, "Date [local]" if lowest else None, "Draw [kW]", tag=f"-{k}")
        _date_axis(ax)
        ax.tick_params(labelbottom=lowest)
    for k in range(len(names), nrows * cols):
        axes[k // cols][k % cols].set_visible(False)
    handles = [Line2D([], [], color="#555555", linewidth=1.4, label="tracked draw (daily)"),
               Patch(facecolor="#555555", alpha=0.22, label="band"),
               Line2D([], [], color="#333333", linestyle="--", label="reference draw"),
               Line2D([], [], color=ALARM_COLOUR, marker="o", markersize=3, linestyle="none",
                      label="alarm day"),
               Patch(facecolor="#EEF1F5", label="reference period")]
    fig.legend(handles=handles, loc="outside upper center", ncol=5)
    return ch.finish(fig, f"Tracked draws over time, part {part}, kW")


def _fit_charts(ch: _Charts, when: np.ndarray, metered: np.ndarray, fitted: np.ndarray,
                unit: str) -> tuple[str, str]:
    """Metered and fitted energy per day (or hour) over time, and their difference."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=(_WIDTH_IN, 3.0), layout="constrained")
    ax = fig.add_subplot()
    ax.plot(when, metered, color="#9AA3B0", linewidth=2.4, label="metered")
    ax.plot(when, fitted, color="#D55E00", linewidth=0.9, label="fitted")
    _date_axis(ax)
    _thousands(ax.yaxis)
    _label(ax, "Date [local]", f"Energy per {unit} [kWh]")
    fig.legend(loc="outside upper right", ncol=2)
    first = ch.finish(fig, f"Metered and fitted energy per {unit}, kWh")

    fig = Figure(figsize=(_WIDTH_IN, 2.4), layout="constrained")
    ax = fig.add_subplot()
    resid = metered - fitted
    ax.bar(when, resid, width=0.9 if unit == "day" else 0.9 / 24,
           color=np.where(resid >= 0, "#0072B2", "#D55E00"), linewidth=0)
    ax.axhline(0, color="#555555", linewidth=0.8)
    _date_axis(ax)
    _thousands(ax.yaxis)
    _label(ax, "Date [local]", f"Metered - fitted [kWh per {unit}]")
    second = ch.finish(fig, f"Residual energy per {unit}, kWh")
    return first, second
