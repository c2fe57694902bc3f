"""Subgroup combinations: what the released subgroup totals allow by linear combination.

A release carries, for each class (cases, positives, negatives), the site total ``N`` and
the total of every released level of every subgroup attribute. Levels of one attribute are
disjoint, so every *union* of levels of one attribute is a set of cases whose count is a
sum of released numbers; the cases of an attribute in no released level (its *rest*,
``N − Σ levels``) are one more such set. Levels of different attributes may overlap or
nest in any way: counts cannot tell, so the rule assumes the worst.

The rule (``m`` is the policy's ``min_cell``; "small" means 1 to m−1)
--------------------------------------------------------------------
For every class, no value of

    s₀·N + Σₐ sₐ·Uₐ,     s₀, sₐ ∈ {−1, 0, +1},

where ``Uₐ`` is the count of a union of released levels (and the rest) of attribute ``a``,
may be small. This holds every set that one union per attribute can isolate: a level
nested in a union of another attribute's levels (``Uₐ − U_b``: the cases of ward *A* that
are not in department *north*), the overlap of two levels of different attributes inside
a third (``U_c − Uₐ − U_b`` is minus the overlap when ``a`` and ``b`` split ``c``), and
their complements (``N − …``). It covers the pairwise rule it replaces (two levels, one
from each attribute) and any number of attributes.

What it does not cover: combinations that take two differently signed unions of the
*same* attribute. Such a combination is the difference of two disjoint sets, not the
count of a set, unless it is the union of sets that the rule already bounds. Like the
pairwise rule before it, the check can refuse harmless designs: unrelated attributes whose
union totals happen to differ by a small number are refused too, because counts cannot
show that they do not nest. Designs with more than :data:`MAX_COMBINED_ATTRIBUTES`
subgroup attributes are refused outright (the number of combinations grows with each
attribute, and so does the chance of refusing a harmless design; a study that needs more
should use differential privacy).

The same check runs on each cell of the score partition of a release
(:mod:`site_agent.disclosure.partition`), where it merges cells instead of refusing.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence

from site_agent.contract.release import SiteRelease
from site_agent.disclosure.refusals import RefusalCode, refusal
from site_agent.statistics.summaries import SufficientStatistics

MAX_COMBINED_ATTRIBUTES = 4
"""Most subgroup attributes one release may carry (our choice; see the module docstring)."""


def _subset_sums(parts: Sequence[int]) -> set[int]:
    """Return every sum of a subset of ``parts`` (noisy parts may be negative)."""
    sums = {0}
    for p in parts:
        sums |= {s + p for s in sums}
    return sums


def combination_isolates(total: int, attributes: Sequence[Sequence[int]], m: int) -> bool:
    """Return whether ``s₀·total + Σ sₐ·Uₐ`` can be small (see the module docstring).

    Parameters
    ----------
    total
        The count of the whole set (the site, or one cell of the score partition).
    attributes
        For each attribute, the counts of its released levels and of its rest.
    m
        The minimum cell size.
    """
    # Sets of integers as bits of a Python int, offset so every reachable value is >= 0.
    offset = m + abs(total) + sum(abs(p) for parts in attributes for p in parts)
    reachable = 0
    for v in (0, total, -total):
        reachable |= 1 << (v + offset)
    for parts in attributes:
        unions = _subset_sums(parts)
        step = 0
        for u in unions | {-u for u in unions}:
            step |= reachable << u if u >= 0 else reachable >> -u
        reachable = step
    window = ((1 << (m - 1)) - 1) if m > 1 else 0  # the values 1..m-1
    return bool((reachable >> (offset + 1)) & window or (reachable >> (offset - m + 1)) & window)


def attribute_parts(
    site: SufficientStatistics,
    levels_by_attribute: Sequence[Sequence[SufficientStatistics]],
    which: int,
) -> tuple[int, list[list[int]]]:
    """Return the site's count and each attribute's level counts and rest for one class.

    ``which`` indexes ``(n_observations, n_positive, n_negative)``.
    """
    total = _class_totals(site)[which]
    attributes = []
    for levels in levels_by_attribute:
        counts = [_class_totals(s)[which] for s in levels]
        attributes.append([*counts, total - sum(counts)])
    return total, attributes


def check_subgroup_combinations(release: SiteRelease, m: int) -> None:
    """Refuse a release whose subgroup totals combine to isolate fewer than ``m`` cases.

    Raises
    ------
    DisclosureRefused
        ``subgroup_design_too_broad`` for more than :data:`MAX_COMBINED_ATTRIBUTES`
        attributes; ``subgroup_difference_below_min_cell`` when an attribute's rest is
        small or a combination of the module docstring is small.
    """
    by_attribute: dict[str, list[SufficientStatistics]] = {}
    for sub in release.subgroups:
        by_attribute.setdefault(sub.attribute, []).append(sub.statistics)
    if len(by_attribute) > MAX_COMBINED_ATTRIBUTES:
        raise refusal(RefusalCode.SUBGROUP_DESIGN_TOO_BROAD)
    levels = list(by_attribute.values())
    for which in range(3):
        total, attributes = attribute_parts(release.statistics, levels, which)
        if any(0 < parts[-1] < m or parts[-1] < 0 for parts in attributes):
            raise refusal(RefusalCode.SUBGROUP_DIFFERENCE_BELOW_MIN_CELL)
        if combination_isolates(total, attributes, m):
            raise refusal(RefusalCode.SUBGROUP_DIFFERENCE_BELOW_MIN_CELL)


def _class_totals(stats: SufficientStatistics) -> tuple[int, int, int]:
    return (stats.n_observations, stats.n_positive, stats.n_negative)


def link_agreement_suppression(release: SiteRelease, suppressed: list[str]) -> SiteRelease:
    """Suppress an agreement cell in every population once it is suppressed in one.

    The site's table is the sum of its levels' tables (and the rest), so a cell suppressed
    in one level but released for the site and the other levels is their difference
    (linked tables; complementary suppression across tables is common practice in
    statistical disclosure control). Cells are matched by the raters and the two call
    values; ``suppressed`` (paths, as in the disclosure note) is extended in place.
    """
    populations = [("statistics", release.statistics)]
    populations += [
        (f"subgroups[{i}].statistics", s.statistics) for i, s in enumerate(release.subgroups)
    ]
    marked = set(suppressed)
    hidden: dict[tuple[str, str], set[tuple[int, int]]] = {}
    for path, stats in populations:
        for i, t in enumerate(stats.agreement):
            cells = hidden.setdefault(t.raters, set())
            for x, y in itertools.product(range(len(t.categories)), repeat=2):
                if f"{path}.agreement[{i}].counts[{x}][{y}]" in marked:
                    cells.add((t.categories[x], t.categories[y]))
    out = []
    for path, stats in populations:
        tables = []
        for i, t in enumerate(stats.agreement):
            cells = hidden.get(t.raters, set())
            counts: list[list[int | None]] = [list(row) for row in t.counts]
            linked = False
            for x, y in itertools.product(range(len(t.categories)), repeat=2):
                name = f"{path}.agreement[{i}].counts[{x}][{y}]"
                if (t.categories[x], t.categories[y]) in cells and name not in marked:
                    counts[x][y] = None
                    suppressed.append(name)
                    linked = True
            tables.append(
                t.model_copy(
                    update={
                        "counts": tuple(tuple(r) for r in counts),
                        "censored": t.censored or linked,
                    }
                )
            )
        out.append(stats.model_copy(update={"agreement": tuple(tables)}))
    return release.model_copy(
        update={
            "statistics": out[0],
            "subgroups": tuple(
                s.model_copy(update={"statistics": st})
                for s, st in zip(release.subgroups, out[1:], strict=True)
            ),
        }
    )
