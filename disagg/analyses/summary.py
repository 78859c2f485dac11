"""The breakdown's fit details and the drift summary as typed data (what fit.json and
drift.json hold).

`breakdown_site` returns a `FitSummary`; the terminal summary, the report, the workbook and
the batch read its fields. Only `FitSummary.as_json` turns it into the JSON layout of
fit.json (schema version FIT_SCHEMA_VERSION), so a renamed field fails where it is read
instead of leaving a section empty.

The metric dictionaries (fit quality, identifiability, stability, meter validation) are kept
as plain JSON-ready mappings: they are written as they are and read by their documented keys
(docs/guide.md, "fit.json").
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

from disagg.inputs.vee import Finding

# fit.json layout version: 2 added baseload.form, baseload.level_kwh, months' baseload_form
# and draws' between_week_sd_kw; 3 added baseload.energy_kwh and baseload.se_kwh.
FIT_SCHEMA_VERSION = 3


@dataclass
class WeatherDraw:
    """A weather-dependent draw: kW at the balance temperature plus a slope per degree beyond it
    (ASHRAE Guideline 14 change-point form), reported at a reference temperature."""

    mode: str  # "cooling" or "heating"
    balance_temp_c: float
    reference_temp_c: float
    kw_at_balance: float
    slope_kw_per_degc: float
    slope_se_kw_per_degc: float

    def as_json(self) -> dict:
        return {"mode": self.mode, "balance_temp_c": self.balance_temp_c,
                "reference_temp_c": self.reference_temp_c, "kw_at_balance": self.kw_at_balance,
                "slope_kw_per_degc": self.slope_kw_per_degc,
                "slope_se_kw_per_degc": self.slope_se_kw_per_degc}


@dataclass
class Draw:
    """One fitted row: a piece of equipment or a combined group [kW], None where not fitted."""

    equipment: str
    members: list[str]
    name: str
    kw: float | None
    se_kw: float | None
    se_hac_kw: float | None
    se_jackknife_kw: float | None
    kw_low: float | None
    kw_high: float | None
    prior_kw: float | None
    prior_sd_kw: float | None
    prior_source: str
    prior_weight: float | None
    between_week_sd_kw: float | None
    run_hours: float
    flags: list[str]
    weather: WeatherDraw | None = None  # kw is then at weather.reference_temp_c

    def as_json(self) -> dict:
        out = {"equipment": self.equipment, "members": self.members, "name": self.name,
               "kw": self.kw, "se_kw": self.se_kw, "se_hac_kw": self.se_hac_kw,
               "se_jackknife_kw": self.se_jackknife_kw, "kw_low": self.kw_low,
               "kw_high": self.kw_high, "prior_kw": self.prior_kw,
               "prior_sd_kw": self.prior_sd_kw, "prior_source": self.prior_source,
               "prior_weight": self.prior_weight,
               "between_week_sd_kw": self.between_week_sd_kw, "run_hours": self.run_hours,
               "flags": self.flags}
        if self.weather is not None:
            out["kw_at"] = "reference temperature"
            out["weather"] = self.weather.as_json()
        return out


@dataclass
class MonthFit:
    """One calendar month: its own fit, or the reason it takes the whole range's draws."""

    own_fit: bool
    reason: str | None = None  # why not, when own_fit is False
    draws: list[Draw] = field(default_factory=list)
    baseload_row: str | None = None
    baseload_form: dict | None = None
    fit_quality: dict = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)

    def as_json(self) -> dict:
        if not self.own_fit:
            return {"own_fit": False, "reason": self.reason}
        return {"own_fit": True, "draws": [d.as_json() for d in self.draws],
                "baseload_row": self.baseload_row, "baseload_form": self.baseload_form,
                "fit_quality": self.fit_quality, "warnings": self.warnings}


@dataclass
class BaseloadColumn:
    name: str
    kw: float
    se_kw: float


@dataclass
class BaseloadSummary:
    """The baseload row: its name, declared profile, fitted columns and the form used."""

    row: str
    profile: str
    spells: list[str]
    columns: list[BaseloadColumn]
    form: dict | None  # disagg.fit.select.FormChoice.as_json
    level_kwh: float  # the wandering level's energy over the range [kWh]
    # The row's energy over the range [kWh] and its standard error [kWh]: the columns' error
    # and, with the wandering level, the level's own (its se is not in the columns' se_kw,
    # which are kW above the level).
    energy_kwh: float
    se_kwh: float

    def as_json(self) -> dict:
        return {"row": self.row, "profile": self.profile, "spells": self.spells,
                "columns": [{"name": c.name, "kw": c.kw, "se_kw": c.se_kw}
                            for c in self.columns],
                "form": self.form, "level_kwh": self.level_kwh,
                "energy_kwh": self.energy_kwh, "se_kwh": self.se_kwh,
                "notes": BASELOAD_NOTES}


# What fit.json's baseload numbers are (plain words for its readers).
BASELOAD_NOTES = [
    "energy_kwh and se_kwh are the whole-range fit's; the breakdown's monthly baseload rows "
    "come from each month's own fit, so their sum can differ slightly.",
    "With the wandering level (a form ending in '+level'), each column's kw is relative: "
    "'occupied' is the occupied hours' kW above the unoccupied level, an hour-of-week column "
    "is kW above Monday 00:00-01:00; the level itself is in level_kwh.",
    "A form's q is the level's step variance over the noise's per interval; q_at_max: the "
    "noise-ratio search stopped at its upper bound q_max, which keeps the level slow.",
]


@dataclass
class TariffMonth:
    """One month's cost of the intervals used [currency]."""

    period: str
    metered_kwh: float
    peak_kw: float
    peak_start_utc: str | None
    demand_cost: float
    energy_cost: float
    cost: float

    def as_json(self) -> dict:
        return {"period": self.period, "metered_kwh": self.metered_kwh,
                "peak_kw": self.peak_kw, "peak_start_utc": self.peak_start_utc,
                "demand_cost": self.demand_cost, "energy_cost": self.energy_cost,
                "cost": self.cost}


@dataclass
class TariffSummary:
    """The site's tariff and each month's cost (present only with a [tariff])."""

    currency: str
    energy_price_per_kwh: float | None
    demand_price_per_kw: float
    periods: list[dict]
    holidays: list[str]
    months: list[TariffMonth]
    method: str
    warnings: list[str]

    def as_json(self) -> dict:
        return {"currency": self.currency, "energy_price_per_kwh": self.energy_price_per_kwh,
                "demand_price_per_kw": self.demand_price_per_kw, "periods": self.periods,
                "holidays": self.holidays, "months": [m.as_json() for m in self.months],
                "method": self.method, "warnings": self.warnings}


@dataclass
class FitSummary:
    """Everything behind the breakdown, typed; `as_json` gives fit.json's layout."""

    tool: str
    site: str
    timezone: str
    site_file: str
    start_utc: str | None
    end_utc: str | None
    confidence: float
    critical_value: float
    draws: list[Draw]
    baseload: BaseloadSummary
    identifiability: dict
    stability: dict
    fit_quality: dict  # "interval", "monthly", "ashrae_guideline_14" and, with whole hours, "hourly"
    intervals: dict[str, int]
    unknown_intervals_by_equipment: dict[str, int]
    residual_sd_kwh: float
    warnings: list[str]
    caution: str
    estimated_months: list[str] = field(default_factory=list)
    months: dict[str, MonthFit] = field(default_factory=dict)
    meter_validation: list[Finding] = field(default_factory=list)
    tariff: TariffSummary | None = None
    schema_version: int = FIT_SCHEMA_VERSION

    def draw(self, equipment: str) -> Draw | None:
        """The whole-range draw of a row, None when the row has none (baseload, unexplained)."""
        return next((d for d in self.draws if d.equipment == equipment), None)

    def own_months(self) -> dict[str, MonthFit]:
        """The months fitted on their own data, in calendar order."""
        return {p: m for p, m in sorted(self.months.items()) if m.own_fit}

    def as_json(self) -> dict:
        return {
            "schema_version": self.schema_version, "tool": self.tool, "site": self.site,
            "timezone": self.timezone, "site_file": self.site_file,
            "period": {"start_utc": self.start_utc, "end_utc": self.end_utc},
            "confidence": self.confidence, "critical_value": self.critical_value,
            "draws": [d.as_json() for d in self.draws],
            "baseload": self.baseload.as_json(),
            "identifiability": self.identifiability, "stability": self.stability,
            "fit_quality": self.fit_quality, "intervals": self.intervals,
            "unknown_intervals_by_equipment": self.unknown_intervals_by_equipment,
            "residual_sd_kwh": self.residual_sd_kwh, "warnings": self.warnings,
            "caution": self.caution, "estimated_months": self.estimated_months,
            "months": {p: m.as_json() for p, m in self.months.items()},
            "meter_validation": [f.as_dict() for f in self.meter_validation],
            "tariff": self.tariff.as_json() if self.tariff is not None else None,
        }


@dataclass
class DriftAlarm:
    """A tracked row whose recent draw moved beyond its band and the threshold.

    change: the recent level (the mean draw of the last recent_days days, the tracker's lag
    taken out) over the reference draw, minus 1, with its interval (change_low, change_high);
    change_tracked: the tracker's latest draw over the reference, minus 1.
    """

    equipment: str
    members: list[str]
    first_alarm_date: str
    kw_reference: float
    kw_latest: float
    kw_recent: float
    change: float
    change_low: float | None
    change_high: float | None
    change_tracked: float
    recent_days: int
    as_of: str

    def as_json(self) -> dict:
        return dataclasses.asdict(self)


@dataclass
class DriftSummary:
    """What `disagg drift` found, typed; `as_json` gives drift.json's layout.

    The per-equipment mappings (memory, reference windows, chart limits, band sd) are keyed by
    the tracked row's id; `equipment` holds one status row per configured load, as stored in
    the tracker's state.
    """

    site: str
    step_size_mu: float
    stable_range: str
    memory_days_requested: float | None
    memory_days_per_equipment: dict[str, float | None]
    reference: dict  # the main reference period: "from", "to" (ISO dates), "intervals"
    reference_per_equipment: dict[str, list[str]]  # row id -> [from, to] (ISO dates)
    groups: list[str]
    equipment: list[dict]  # "equipment", "status", "tracked_as", "detail"
    threshold: float
    rule: str
    chart_limit_L: dict[str, float]
    change_interval: str
    band_sd_kw: dict[str, float]
    alarms: list[DriftAlarm]
    notes: list[str]
    caution: str
    # Per reference period: the baseload form its draws come from ("form_used"), the
    # declared profile (what the tracker's design carries), the form the data choose and
    # their comparison.
    reference_forms: list[dict] = field(default_factory=list)
    # Per tracked row: its reference-period draw under both forms [kW], which one is its
    # reference, and whether its absolute reference level is uncertain ("uncertain",
    # "reason"; drift.reference_form_check).
    reference_form_check: dict[str, dict] = field(default_factory=dict)

    def reference_forms_text(self) -> list[str]:
        """In words, per reference period, the baseload form its draws come from, the
        declared one and the one the data choose (for the terminal and the report)."""
        out = []
        for f in self.reference_forms:
            used, chosen = f["form_used"], f["form_chosen"]
            declared = f.get("form_declared", used)
            head = f"reference {f['from']} to {f['to']}"
            if used != declared:
                out.append(f"{head}: draws from the form the data choose, {used} (as "
                           f"breakdown); the tracker carries the declared profile {declared} "
                           "and the rest of that form's shape as a fixed offset")
            elif chosen is None:
                out.append(f"{head}: draws from the declared profile {declared} (which the "
                           "tracker carries); the form the data choose could not be fitted")
            elif chosen == declared:
                out.append(f"{head}: draws from the declared profile {declared}, the form the "
                           "data choose too")
            else:
                out.append(f"{head}: draws from the declared profile {declared} (which the "
                           f"tracker carries); the data choose {chosen}")
        return out

    def as_json(self) -> dict:
        out = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}
        out["alarms"] = [a.as_json() for a in self.alarms]
        return out


@dataclass
class ClockOffset:
    """The run-log clock offset search of `disagg check --find-offset` [min]."""

    best_offset_min: float
    clear: bool
    verdict: str
    window_min: float
    already_applied_min: float


@dataclass
class CheckReport:
    """What `disagg check` found without fitting: the range, interval counts, run-hours per
    load, loads the data cannot tell apart, the meter validation and, when asked, the
    run-log clock offset."""

    site: str
    start_utc: str
    end_utc: str
    interval_min: float
    intervals: dict[str, int]
    run_hours: dict[str, float]  # equipment id -> run-hours in the intervals used [h]
    not_run: list[str]
    inseparable_pairs: list[tuple[str, str, float]]  # (id, id, correlation of hours)
    inseparable_from_baseload: list[str]
    findings: list[Finding]  # the meter validation's (disagg.inputs.vee)
    notes: list[str]
    clock_offset: ClockOffset | None = None


@dataclass
class ComparePeriod:
    """One period of `disagg compare`: its dates (local, inclusive) and its own fit."""

    date_from: str  # ISO date
    date_to: str
    intervals_used: int
    days: int
    critical_value: float
    baseload_row: str
    fit_quality: dict
    warnings: list[str]
    baseload_form: str = ""  # the form the period's fit used (both periods use one)
    form_preferred: str = ""  # the form the period's data prefer on their own

    def as_json(self) -> dict:
        return {"from": self.date_from, "to": self.date_to,
                "intervals_used": self.intervals_used, "days": self.days,
                "critical_value": self.critical_value, "baseload_row": self.baseload_row,
                "baseload_form": self.baseload_form, "form_preferred": self.form_preferred,
                "fit_quality": self.fit_quality, "warnings": self.warnings}


@dataclass
class CompareReport:
    """What `disagg compare` found, typed; `as_json` gives compare.json's layout.

    equipment: one mapping per compare.csv row with the standard errors, z, the change's
    interval, both periods' flags and why a verdict is unclear (compare.compare_estimates).
    """

    tool: str
    site: str
    timezone: str
    site_file: str
    confidence: float
    min_change: float
    method: str
    groups: list[str]
    before: ComparePeriod
    after: ComparePeriod
    equipment: list[dict]
    data_notes: list[str]
    caution: str
    # The one baseload form both periods use, where it was chosen, each period's own
    # preference and a note when the after period alone would differ
    # (compare.baseload_form_of).
    baseload_form: dict = field(default_factory=dict)

    def as_json(self) -> dict:
        return {"tool": self.tool, "site": self.site, "timezone": self.timezone,
                "site_file": self.site_file, "confidence": self.confidence,
                "min_change": self.min_change, "method": self.method, "groups": self.groups,
                "baseload_form": self.baseload_form,
                "periods": {"before": self.before.as_json(), "after": self.after.as_json()},
                "equipment": self.equipment, "data_notes": self.data_notes,
                "caution": self.caution}
