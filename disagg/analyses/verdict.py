"""One verdict rule for a change between two periods' draws, shared by `disagg compare` and
`disagg history --compare`.

For draws b (before) and a (after) with standard errors s_b, s_a [kW], taken as independent:

    change c = a / b - 1, its standard error s_c = sqrt(s_a^2 + (a/b)^2 s_b^2) / b
    (delta method for a ratio); z = (a - b) / sqrt(s_a^2 + s_b^2), p = 2 P(Z > |z|).

- ``rising`` / ``falling``: the change is significant (p < alpha = 1 - confidence) and
  |c| >= min_change.
- ``steady``: equivalence shown by two one-sided tests (Schuirmann 1987) at level alpha:
  H0 c <= -m rejected (t_low = (c + m) / s_c above the 1 - alpha quantile) and H0 c >= m
  rejected (t_high = (m - c) / s_c above it); the same as the 1 - 2 alpha interval
  c +- q_(1 - alpha) s_c lying inside (-m, m).
- ``unclear``: neither.

Quantiles are standard normal, or Student t with df degrees of freedom when df is given.

Reference: Schuirmann, D. J. (1987). A comparison of the two one-sided tests procedure and
the power approach for assessing the equivalence of average bioavailability. Journal of
Pharmacokinetics and Biopharmaceutics 15(6), 657-680.
"""

from __future__ import annotations

import math

from scipy.special import ndtr, ndtri, stdtr, stdtrit

VERDICTS = ("rising", "falling", "steady", "unclear")
RULE = ("rising or falling: the change is significant (two-sided p < 1 - confidence) and at "
        "least min_change; steady: two one-sided tests (Schuirmann 1987) show it lies inside "
        "+-min_change at level 1 - confidence (its 1 - 2 alpha interval inside +-min_change); "
        "else unclear")


def _cdf(x: float, df: float | None) -> float:
    return float(ndtr(x)) if df is None else float(stdtr(df, x))


def _quantile(p: float, df: float | None) -> float:
    return float(ndtri(p)) if df is None else float(stdtrit(df, p))


def change_verdict(before_kw: float, se_before_kw: float, after_kw: float, se_after_kw: float,
                   confidence: float = 0.95, min_change: float = 0.05,
                   df: float | None = None) -> dict:
    """The verdict on a change of draw, with the figures it rests on.

    Args:
        before_kw, after_kw: the two draws [kW] (before_kw > 0 for a relative change);
        se_before_kw, se_after_kw: their standard errors [kW], >= 0.
        confidence: 1 - alpha, the level of both tests; min_change: m, a fraction >= 0.
        df: Student t degrees of freedom of the quantiles; None: standard normal.

    Returns:
        verdict, change, se_change, change_low / change_high (the two-sided confidence
        interval of the change), p_value (two-sided, no change), p_equivalence (the larger
        of the two one-sided p-values; steady when below alpha), z.
    """
    alpha = 1.0 - confidence
    b, a = before_kw, after_kw
    se_diff = math.hypot(se_after_kw, se_before_kw)
    diff = a - b
    if se_diff > 0:
        z = diff / se_diff
    else:
        z = 0.0 if diff == 0 else math.copysign(math.inf, diff)
    p = 2.0 * _cdf(-abs(z), df) if math.isfinite(z) else 0.0
    out = {"verdict": "unclear", "change": None, "se_change": None, "change_low": None,
           "change_high": None, "p_value": p, "p_equivalence": None, "z": z}
    if not b > 0:
        return out
    c = a / b - 1.0
    se_c = math.hypot(se_after_kw, (a / b) * se_before_kw) / b
    q2 = _quantile(0.5 + confidence / 2.0, df)
    out.update(change=c, se_change=se_c, change_low=c - q2 * se_c, change_high=c + q2 * se_c)
    m = min_change
    if se_c > 0:
        p_low = 1.0 - _cdf((c + m) / se_c, df)   # H0: c <= -m
        p_high = 1.0 - _cdf((m - c) / se_c, df)  # H0: c >= +m
        p_eq = max(p_low, p_high)
    else:
        p_eq = 0.0 if abs(c) < m else 1.0
    out["p_equivalence"] = p_eq
    if p < alpha and abs(c) >= m:
        out["verdict"] = "rising" if c > 0 else "falling"
    elif p_eq < alpha:
        out["verdict"] = "steady"
    return out
