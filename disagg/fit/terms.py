"""What the data can tell apart: the fitted terms (loads, combined groups), the loads folded
into the baseload row, and the flags that say what leans on a prior.

Loads whose hours correlate at |r| >= INSEPARABLE_R are joined (as are loads that together
mirror another, seen in the VIF); members without an informative prior become one combined
row, members with one stay separate and are flagged; a load without a prior whose hours the
baseload columns explain (R^2 >= INSEPARABLE_R2) joins the baseload row.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from disagg.fit.solvers import collinearity
from disagg.inputs.config import SiteConfig

# Two equipment hour series correlated at or above this cannot be told apart; the same
# bound on R^2 against the baseload columns, and on R^2 against everything (VIF >= 20).
# Common practice, no source (VIF 10-20 is the usual range of rule-of-thumb cut-offs).
INSEPARABLE_R = 0.95
INSEPARABLE_R2 = INSEPARABLE_R**2
# Designs with more rows than this (a year of 1-minute data) are not copied for the
# collinearity diagnostics: collinearity() reads them a chunk of rows at a time.
LONG_DESIGN_ROWS = 65536


@dataclass
class Term:
    """One fitted draw: a piece of equipment, or a combined group that cannot be split."""

    id: str
    members: list[str]
    name: str
    prior_kw: float | None
    prior_sd_kw: float | None
    prior_source: str
    flags: list[str] = field(default_factory=list)
    column: int | None = None  # column in the design, None when not fitted


class _UnionFind:
    def __init__(self, n: int):
        self.parent = list(range(n))

    def find(self, i: int) -> int:
        while self.parent[i] != i:
            self.parent[i] = self.parent[self.parent[i]]
            i = self.parent[i]
        return i

    def union(self, i: int, j: int) -> None:
        self.parent[self.find(i)] = self.find(j)


def inseparable(H: np.ndarray, B: np.ndarray) -> dict:
    """Which loads the data cannot tell apart, from each other or from the baseload.

    Args:
        H: (n, k) equipment-hours of the intervals used; B: (n, m) baseload columns.

    Returns:
        active: indices of the loads with run-hours; corr: correlation of the active loads'
        hours (in the order of active); r2_base, vif: index -> figure for active loads;
        pairs: (i, j, r) for active loads with |r| >= INSEPARABLE_R; with_baseload: indices
        whose R^2 against the baseload columns is at least INSEPARABLE_R2.
    """
    run_total = H.sum(axis=0)
    active = [j for j in range(H.shape[1]) if run_total[j] > 0]
    if not active:
        return {"active": [], "corr": np.zeros((0, 0)), "r2_base": {}, "vif": {}, "pairs": [],
                "with_baseload": []}
    # A long design with every load active is used as it is (no copy of 1-minute data).
    long = len(H) > LONG_DESIGN_ROWS and len(active) == H.shape[1]
    d = collinearity(H if long else H[:, active], B)
    pairs = [(active[a], active[b], float(d["corr"][a, b]))
             for a in range(len(active)) for b in range(a + 1, len(active))
             if abs(d["corr"][a, b]) >= INSEPARABLE_R]
    return {
        "active": active, "corr": d["corr"],
        "r2_base": {j: float(d["r2_base"][a]) for a, j in enumerate(active)},
        "vif": {j: float(d["vif"][a]) for a, j in enumerate(active)},
        "pairs": pairs,
        "with_baseload": [j for a, j in enumerate(active) if d["r2_base"][a] >= INSEPARABLE_R2],
    }


@dataclass
class TermPlan:
    """The terms stage's result.

    terms: every load or combined group in row order (not-run loads included, unfitted);
    fitted: the terms with a design column (term.column = index in fitted); members: each
    fitted term's equipment ids; ids: the aligned equipment ids; active: indices of loads
    with run-hours; corr: their hours' correlation (in the order of active); r2_base, vif:
    equipment id -> figure for active loads; folded: ids joined to the baseload row;
    base_id: that row's name; warnings: what the plan says in words, in order.
    """

    terms: list[Term]
    fitted: list[Term]
    ids: list[str]
    active: list[int]
    corr: np.ndarray
    r2_base: dict[str, float]
    vif: dict[str, float]
    folded: list[str]
    base_id: str
    warnings: list[str]

    @property
    def members(self) -> list[list[str]]:
        return [t.members for t in self.fitted]

    def identifiability(self, prior_driven_weight: float) -> dict:
        """fit.json's "identifiability" block."""
        ids = self.ids
        return {
            "correlation_bound": INSEPARABLE_R,
            "prior_driven_weight": prior_driven_weight,
            "equipment": {
                ids[j]: {
                    "r2_with_baseload": self.r2_base.get(ids[j]),
                    "vif": self.vif.get(ids[j]),
                    "most_correlated": (None if ids[j] not in self.vif or len(self.active) < 2
                                        else _partner(ids, self.active, self.corr, j)),
                } for j in range(len(ids))},
            "folded_into_baseload": self.folded,
        }


def plan_terms(site: SiteConfig, ids: list[str], H: np.ndarray, B: np.ndarray) -> TermPlan:
    """What can be told apart, given the loads' hours H (n, k) [h] and the declared
    baseload's columns B (n, m) [h]."""
    eq_by_id = {e.id: e for e in site.equipment}
    warnings: list[str] = []
    sep = inseparable(H, B)
    active = sep["active"]
    r2_base = {ids[j]: r for j, r in sep["r2_base"].items()}
    vif = {ids[j]: v for j, v in sep["vif"].items()}
    has_prior = {e.id: e.prior.informative for e in site.equipment}

    folded: list[str] = []  # no prior and inseparable from the baseload: joins the baseload row
    base_flagged: list[str] = []
    for j in sep["with_baseload"]:
        (base_flagged if has_prior[ids[j]] else folded).append(ids[j])
    pool = [j for j in active if ids[j] not in folded]
    uf = _UnionFind(len(ids))
    for i, j, _ in sep["pairs"]:
        if i in pool and j in pool:
            uf.union(i, j)
    # Several loads that together mirror another (a = b + c) show only in the VIF: join a
    # with the loads that carry its regression on everything else.
    for j in pool:
        if vif[ids[j]] >= 1.0 / (1.0 - INSEPARABLE_R2) and r2_base[ids[j]] < INSEPARABLE_R2:
            others = [i for i in pool if i != j]
            Z = np.column_stack([B] + [H[:, i] for i in others])
            coef = np.linalg.lstsq(Z, H[:, j], rcond=None)[0][B.shape[1]:]
            sd_j = H[:, j].std()
            for i, c in zip(others, coef):
                if sd_j > 0 and abs(c) * H[:, i].std() / sd_j >= 0.25:
                    uf.union(i, j)
    groups: dict[int, list[int]] = {}
    for j in pool:
        groups.setdefault(uf.find(j), []).append(j)

    terms: list[Term] = []
    for j in range(len(ids)):
        eq = eq_by_id[ids[j]]
        if j not in active:
            terms.append(Term(eq.id, [eq.id], eq.name, eq.prior.draw_kw, eq.prior.sd_kw,
                              eq.prior.source, ["not-run"]))
            continue
        if eq.id in folded:
            continue
        members = groups[uf.find(j)]
        # Members without an informative prior cannot be split by anything: one row for them.
        # Members with a prior stay separate; the prior splits them, and they say so.
        no_prior = [i for i in members if not has_prior[ids[i]]]
        if len(no_prior) > 1 and j in no_prior:
            if j != no_prior[0]:
                continue  # the group's row is made at its first member
            gid = "+".join(ids[i] for i in no_prior)
            flags = ["combined"] + [f"inseparable:{ids[i]}" for i in members if i not in no_prior]
            terms.append(Term(gid, [ids[i] for i in no_prior],
                              " + ".join(eq_by_id[ids[i]].name for i in no_prior),
                              None, None, "none (no size or draw given)", flags))
            warnings.append(f"{', '.join(ids[i] for i in no_prior)} run together and have no "
                            f"prior that could split them: reported as one row {gid!r}")
            continue
        flags = [f"inseparable:{ids[i]}" for i in members if i != j]
        if eq.id in base_flagged:
            flags.append("inseparable:baseload")
        if flags:
            leaning = [ids[i] for i in members if i != j and has_prior[ids[i]]]
            if has_prior[eq.id]:
                why = "its estimate leans on its prior"
            elif leaning:
                why = f"its estimate leans on the prior of {', '.join(leaning)}"
            else:
                why = "its estimate leans on the baseload's declared shape"
            warnings.append(f"{eq.id} cannot be told apart from "
                            f"{', '.join(f.split(':', 1)[1] for f in flags)} by the data: "
                            + why)
        if eq.control == "variable":
            flags.append("variable")
        terms.append(Term(eq.id, [eq.id], eq.name, eq.prior.draw_kw, eq.prior.sd_kw,
                          eq.prior.source, flags))
    base_id = "+".join(["baseload"] + folded)
    if folded:
        warnings.append(f"{', '.join(folded)} run on the baseload schedule and have no prior: "
                        f"their energy is reported in the row {base_id!r}")
    fitted = [t for t in terms if "not-run" not in t.flags]
    for c, t in enumerate(fitted):
        t.column = c
    return TermPlan(terms=terms, fitted=fitted, ids=list(ids), active=active, corr=sep["corr"],
                    r2_base=r2_base, vif=vif, folded=folded, base_id=base_id,
                    warnings=warnings)


def _partner(ids: list[str], active: list[int], corr: np.ndarray, j: int) -> dict:
    a = active.index(j)
    row = np.abs(corr[a]).copy()
    row[a] = -1
    b = int(np.argmax(row))
    return {"id": ids[active[b]], "correlation": float(corr[a, b])}
