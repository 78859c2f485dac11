"""The solve stage: the chosen baseload form's design, the bounded ridge fit toward the priors
(GLS on whitened differences with the wandering level, disagg.fit.wander) and the level's
smoothed energy."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from disagg.fit.design import BaseloadBuilder, Rows, signed_columns
from disagg.fit.select import FormChoice, kept_columns
from disagg.fit.solvers import Fit, fit_model
from disagg.fit.terms import Term
from disagg.fit.wander import smooth_level, whiten


@dataclass
class Priors:
    """The prior of every design column: the fitted terms' own (a "weak" mean 0, sd weak_sd
    [kW] without one), weak for the n_weather slope columns and the baseload columns."""

    terms: list[Term]
    n_weather: int
    weak_sd: float

    def __call__(self, m: int) -> tuple[np.ndarray, np.ndarray]:
        """(mean, sd) for a design with m baseload columns."""
        mean = np.array([t.prior_kw if t.prior_kw is not None else 0.0 for t in self.terms]
                        + [0.0] * (self.n_weather + m))
        sd = np.array([t.prior_sd_kw if t.prior_sd_kw is not None else self.weak_sd
                       for t in self.terms] + [self.weak_sd] * (self.n_weather + m))
        return mean, sd


@dataclass
class Solved:
    """The fit of the chosen form.

    X: (n, kx + m) design [h, h degC, h]: k term columns, then weather slope columns, then m
    baseload columns B (names base_names); Xs, ys, blk: the rows the solver saw (the
    whitened differences with the level) and their day blocks; p_mean, p_sd, lower: the
    priors and lower bounds used; coef: fit.coef; level_kwh: (n,) the level's energy [kWh]
    (zero without the level).
    """

    choice: FormChoice
    X: np.ndarray
    k: int
    kx: int
    B: np.ndarray
    base_names: list[str]
    Xs: np.ndarray
    ys: np.ndarray
    blk: np.ndarray
    p_mean: np.ndarray
    p_sd: np.ndarray
    lower: np.ndarray
    fit: Fit
    level_kwh: np.ndarray

    @property
    def coef(self) -> np.ndarray:
        return self.fit.coef

    @property
    def Hf(self) -> np.ndarray:
        return self.X[:, :self.k]

    @property
    def Wf(self) -> np.ndarray:
        return self.X[:, self.k:self.kx]

    @property
    def Hx(self) -> np.ndarray:
        return self.X[:, :self.kx]

    @property
    def level(self) -> bool:
        return self.choice.form.level


def solve(rows: Rows, X: np.ndarray, k: int, kx: int, base_names: list[str],
          choice: FormChoice, builder: BaseloadBuilder, priors: Priors) -> Solved:
    """Fit the draws with the chosen form. X: the design with the declared profile's
    baseload columns (replaced when another profile was chosen, or reduced by the level)."""
    B = X[:, kx:]
    profile = choice.form.profile
    if profile != builder.site.baseload.profile:
        B, base_names = builder.columns(profile)
        X = np.column_stack([X[:, :kx], B])
    y, interval_h, sp = rows.y, rows.interval_h, rows.sp
    level_kwh = np.zeros(rows.n)
    if choice.form.level:
        keep = kept_columns(profile, B.shape[1])
        B = B[:, keep]
        base_names = [base_names[i] for i in keep]
        X = np.column_stack([X[:, :kx], B])
    p_mean, p_sd = priors(B.shape[1])
    lower = np.zeros(X.shape[1])
    lower[kx:][signed_columns(base_names)] = -np.inf  # within-hour slopes: either sign
    if choice.form.level:
        # GLS on whitened differences of the kW (disagg.fit.wander); the profile's columns are
        # kW above the level and may be negative.
        lower[kx:] = -np.inf
        wz = whiten(X, y, sp, choice.form.q, scale=1.0 / interval_h)
        Xs, ys, blk = wz.X, wz.z, rows.days[1:]
    else:
        Xs, ys, blk = X, y, rows.days
    fit = fit_model(Xs, ys, p_mean, p_sd, lower, block=blk)
    if choice.form.level:
        level_kw = smooth_level((y - X @ fit.coef) / interval_h, sp, choice.form.q)
        level_kwh = level_kw * interval_h
    return Solved(choice=choice, X=X, k=k, kx=kx, B=B, base_names=base_names, Xs=Xs, ys=ys,
                  blk=blk, p_mean=p_mean, p_sd=p_sd, lower=lower, fit=fit, level_kwh=level_kwh)
