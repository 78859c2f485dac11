"""Money: each interval's energy price and each load's share of the month's cost.

A month's bill under a simple commercial tariff is

    energy cost = sum over intervals t of E_t x p_t                    [currency]
    demand cost = d x max over intervals t of (E_t / h_t)              [currency]

with E_t the metered energy [kWh], p_t the energy price of interval t [currency/kWh] (one
flat price, or the price of the time-of-use period the interval falls in), h_t the interval
length [h] and d the demand price [currency/kW]. The meter interval is taken as the demand
interval (utilities commonly bill demand on 15- or 30-minute averages; common practice, no
source).

The breakdown splits both: each load's energy cost is its estimated energy in every interval
times that interval's price, and its ``peak_kw`` is its estimated draw in the interval of the
month's peak demand, which carries d x peak_kw of the demand cost. The rows of a month (loads,
baseload, unexplained) then add up to the month's cost of the intervals used, because their
interval energies add up to the metered energy of every interval.
"""

from __future__ import annotations

import numpy as np
import polars as pl

from disagg.fit.align import NS_PER_H, overlap_hours, spell_segments
from disagg.inputs.config import TariffSettings


def interval_prices(tariff: TariffSettings, tz: str, start_ns: np.ndarray,
                    end_ns: np.ndarray) -> np.ndarray:
    """Energy price of each interval [currency/kWh].

    An interval partly inside a time-of-use period pays each price for the fraction of the
    interval it covers (exact overlap with the period's local-time spells; holidays have none).

    Args:
        tariff: the site's tariff.
        tz: the site's IANA time zone, in which the periods' spells are given.
        start_ns, end_ns: (n,) interval edges [ns since the epoch, UTC].
    """
    price = np.full(len(start_ns), tariff.energy_price_per_kwh, dtype=float)
    if len(start_ns) == 0 or not tariff.periods:
        return price
    length_h = (end_ns - start_ns) / NS_PER_H
    first, last = int(start_ns.min()), int(end_ns.max())
    for period in tariff.periods:
        seg = spell_segments(period.spells, tz, first, last, tariff.holidays)
        inside_h, _ = overlap_hours(seg, start_ns, end_ns)
        frac = np.divide(inside_h, length_h, out=np.zeros_like(length_h), where=length_h > 0)
        price += frac * (period.price_per_kwh - tariff.energy_price_per_kwh)
    return price


def month_costs(energy_kwh: np.ndarray, interval_h: np.ndarray, price: np.ndarray,
                demand_price_per_kw: float) -> tuple[np.ndarray, np.ndarray, int]:
    """Split one month's cost among the parts of the metered energy.

    Args:
        energy_kwh: (n, r) each row part's energy in each interval [kWh]; the parts of an
            interval add up to its metered energy.
        interval_h: (n,) interval lengths [h].
        price: (n,) energy price of each interval [currency/kWh].
        demand_price_per_kw: demand price [currency/kW of the month's peak].

    Returns:
        (cost (r,) [currency], peak_kw (r,) [kW], index of the peak interval).
    """
    demand_kw = energy_kwh.sum(axis=1) / interval_h
    peak = int(np.argmax(demand_kw))
    peak_kw = energy_kwh[peak] / interval_h[peak]
    cost = price @ energy_kwh + demand_price_per_kw * peak_kw
    return cost, peak_kw, peak


def price_table(month_rows: pl.DataFrame, parts_kwh: np.ndarray, interval_h: np.ndarray,
                price: np.ndarray | None, demand_price_per_kw: float) -> pl.DataFrame:
    """Add peak_kw [kW] and cost [currency] (null without a tariff) to one month's rows.

    parts_kwh: (n, rows) each row's energy in each of the month's intervals, in row order.
    """
    if len(interval_h) == 0:
        return month_rows.with_columns(pl.lit(None, pl.Float64).alias("peak_kw"),
                                       pl.lit(None, pl.Float64).alias("cost"))
    use_price = price if price is not None else np.zeros(len(interval_h))
    cost, peak_kw, _ = month_costs(parts_kwh, interval_h, use_price, demand_price_per_kw)
    return month_rows.with_columns(
        pl.Series("peak_kw", peak_kw, dtype=pl.Float64),
        pl.Series("cost", cost if price is not None else [None] * len(cost), dtype=pl.Float64))
