"""Which factors of a term are coded fully: the marginality rule.

A term's factor is coded by its contrasts when the term without that factor is in the model; otherwise all its
levels are coded (indicator columns), so a term whose marginal term is absent (``a`` + ``a:b`` without ``b``:
b nested within a; ``a:age`` without ``age``: one slope per level of a) spans the same columns whatever the
coding.  This is the rule of R's ``model.matrix`` (Chambers and Hastie 1992) in the form patsy uses, which never
adds a column already spanned: terms are grouped by their covariates; within a group, in order of size, each
term keeps the subsets of its factors not yet spanned (the empty subset is the intercept, or the covariate term
itself), and neighbouring subsets merge into one whose extra factor is coded fully.
"""

from __future__ import annotations

from collections.abc import Collection, Sequence
from itertools import combinations

from .spec import Term

#: One block of a term's columns: per factor of the block, True when it is coded fully (all its levels).
Subterm = tuple[tuple[str, bool], ...]


def term_subterms(terms: Sequence[Term], factors: Collection[str], intercept: bool) -> dict[Term, tuple[Subterm, ...]]:
    """Each term's column blocks under the marginality rule (factors in the term's member order).

    A hierarchical model gives every term one block with every factor coded by contrasts.
    """
    groups: dict[frozenset[str], list[Term]] = {}
    for term in terms:
        groups.setdefault(frozenset(m for m in term if m not in factors), []).append(term)
    out: dict[Term, tuple[Subterm, ...]] = {}
    for covs, members in groups.items():
        # the empty subset is the intercept in the group without covariates, the covariate term itself otherwise
        spanned: set[frozenset[str]] = {frozenset()} if intercept and not covs else set()
        for term in sorted(members, key=lambda t: sum(m in factors for m in t)):
            cats = [m for m in term if m in factors]
            new = [frozenset(s) for k in range(len(cats) + 1) for s in combinations(cats, k)
                   if frozenset(s) not in spanned]
            spanned.update(new)
            blocks = _simplify([{f: False for f in s} for s in new])
            out[term] = tuple(tuple((f, b[f]) for f in cats if f in b) for b in blocks)
    return out


def _simplify(blocks: list[dict[str, bool]]) -> list[dict[str, bool]]:
    """Merge a block into a later one with exactly one more factor (that factor then coded fully), greedily."""
    changed = True
    while changed:
        changed = False
        for i, short in enumerate(blocks):
            for j in range(i + 1, len(blocks)):
                long = blocks[j]
                extra = [f for f in long if f not in short]
                if len(long) == len(short) + 1 and all(long.get(f) == v for f, v in short.items()) and len(extra) == 1:
                    blocks[j] = {**long, extra[0]: True}
                    del blocks[i]
                    changed = True
                    break
            if changed:
                break
    return blocks
