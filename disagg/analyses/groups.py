"""Loads the data cannot tell apart, handled as one group (`A+B`) by drift and compare.

A group is a set of loads linked by inseparable pairs (run-hours correlated at
|r| >= 0.95, `disagg.estimate.inseparable`) over the intervals used. Its combined draw is
well determined even where each member's is not. The breakdown keeps members with priors
as separate rows (flag ``inseparable:<id>``); drift and compare track and test the group:
they fit with the members' priors set aside, so that `estimate_draws` reports the group as
one combined row with its own draw, interval and verdict.
"""

from __future__ import annotations

import dataclasses

from disagg.fit.align import Aligned
from disagg.fit.design import BaseloadBuilder
from disagg.fit.estimate import inseparable
from disagg.inputs.config import Prior, SiteConfig


def inseparable_groups(site: SiteConfig, aligned: Aligned) -> list[list[str]]:
    """Groups of two or more loads linked by inseparable pairs over aligned.use, members in
    the site's order; loads inseparable only from the baseload are not grouped."""
    use = aligned.use
    if not use.any():
        return []
    ids = aligned.equipment_ids
    everything = bool(use.all())  # then no copy of a long series' hours
    H = aligned.hours if everything else aligned.hours[use]
    B, _ = BaseloadBuilder.declared(site, aligned)
    sep = inseparable(H, B)
    parent = list(range(len(ids)))

    def find(i: int) -> int:
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    for i, j, _ in sep["pairs"]:
        parent[find(i)] = find(j)
    groups: dict[int, list[int]] = {}
    for j in sep["active"]:
        groups.setdefault(find(j), []).append(j)
    order = {e.id: k for k, e in enumerate(site.equipment)}
    out = [sorted((ids[j] for j in g), key=lambda e: order.get(e, 0))
           for g in groups.values() if len(g) > 1]
    return sorted(out, key=lambda g: order.get(g[0], 0))


def group_id(members: list[str]) -> str:
    return "+".join(members)


def grouped_site(site: SiteConfig, groups: list[list[str]]) -> SiteConfig:
    """The site with each group member's prior set aside, so that the fit reports every
    group as one combined row (`estimate_draws` combines loads it cannot tell apart when
    they have no prior)."""
    if not groups:
        return site
    member_of = {m: group_id(g) for g in groups for m in g}
    equipment = tuple(
        dataclasses.replace(e, prior=Prior(None, None, f"none (tracked as the group "
                                                       f"{member_of[e.id]})"))
        if e.id in member_of else e for e in site.equipment)
    return dataclasses.replace(site, equipment=equipment)


__all__ = ["inseparable_groups", "group_id", "grouped_site"]
