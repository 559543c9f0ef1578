"""Property tests of the design (hypothesis): random tables and specs with up to 4 factors.

The design's column count, rank and cell counts are compared with a direct count made here without
groupmodel: column counts from the coding rule (common practice: k-1 columns for effect, treatment and
polynomial coding, k for indicators; an interaction has the product of its members' counts), the rank from
numpy's matrix_rank of an independently built indicator design spanning the same space (common practice:
a hierarchical model spans the products of its terms' full indicator columns), cell counts from a plain count
of the table's rows.
"""

from __future__ import annotations

import itertools
from collections import Counter
from pathlib import Path

import numpy as np
import pandas as pd
from hypothesis import given, settings
from hypothesis import strategies as st

from groupmodel.engine.linalg import matrix_rank
from groupmodel.model.checks import cell_counts_by_term, check_design
from groupmodel.model.design import Design, build_design
from groupmodel.model.spec import parse_term, spec_from_dict
from groupmodel.model.table import select_sample

FACTOR_NAMES = ("A", "B", "D", "E")


def design_of(frame: pd.DataFrame, spec: dict) -> Design:
    table = frame.copy()
    table.insert(0, "participant_id", [f"sub-{i:03d}" for i in range(len(table))])
    spec = spec_from_dict({"participants": "participants.tsv", **spec}, Path("/nonexistent/model.json"))
    return build_design(spec, select_sample(spec, table=table.astype(str).astype(object), sidecar_levels={}))


@st.composite
def models(draw: st.DrawFn) -> tuple[pd.DataFrame, dict, list[tuple[str, ...]], dict[str, int], bool]:
    """A random table and a hierarchical model over it."""
    n_factors = draw(st.integers(1, 4))
    names = FACTOR_NAMES[:n_factors]
    n_levels = {f: draw(st.integers(2, 3)) for f in names}
    cell_means = draw(st.booleans())
    codings = {f: "indicator" if cell_means else draw(st.sampled_from(["effect", "treatment", "polynomial"]))
               for f in names}
    covariate = draw(st.booleans())
    n = draw(st.integers(4, 60))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({f: [f"{f.lower()}{i + 1}" for i in rng.integers(0, n_levels[f], n)] for f in names})
    if covariate:
        frame["x"] = rng.normal(30, 5, n).round(4)
    if cell_means:
        term_texts = [":".join(names)]
    else:
        # Random hierarchical term sets: crossed groups of factors (a*b expands to a, b, a:b).
        groups = draw(st.lists(st.lists(st.sampled_from(names), min_size=1, max_size=n_factors, unique=True),
                               min_size=1, max_size=3))
        term_texts = ["*".join(g) for g in groups]
    if covariate:
        term_texts.append("x")
    terms: list[tuple[str, ...]] = []
    for text in term_texts:
        for t in parse_term(text):
            if not any(set(t) == set(u) for u in terms):
                terms.append(t)
    spec = {
        "factors": {f: {"coding": codings[f], "levels": [f"{f.lower()}{i + 1}" for i in range(n_levels[f])]}
                    for f in names},
        "intercept": not cell_means,
        "terms": term_texts,
    }
    if covariate:
        spec["covariates"] = {"x": {"center": draw(st.sampled_from(["mean", "none"]))}}
    columns_per_level = {f: n_levels[f] if cell_means else n_levels[f] - 1 for f in names}
    return frame, spec, terms, columns_per_level, cell_means


def indicator_design(frame: pd.DataFrame, terms: list[tuple[str, ...]], intercept: bool,
                     levels: dict[str, list[str]]) -> np.ndarray:
    """Products of full 0/1 indicators (and raw covariates) of every term: the same span, built directly."""
    n = len(frame)
    blocks = [np.ones((n, 1))] if intercept else []
    for term in terms:
        block = np.ones((n, 1))
        for m in term:
            if m == "x":
                member = frame["x"].to_numpy(float)[:, None]
            else:
                member = np.column_stack([(frame[m] == lv).to_numpy(float) for lv in levels[m]])
            block = np.column_stack([block[:, i] * member[:, j] for i in range(block.shape[1])
                                     for j in range(member.shape[1])])
        blocks.append(block)
    return np.hstack(blocks)


@settings(max_examples=30, deadline=None)
@given(models())
def test_columns_rank_and_cells_agree_with_a_direct_count(case) -> None:
    frame, spec, terms, per_factor, cell_means = case
    design = design_of(frame, spec)
    names = [f for f in FACTOR_NAMES if any(f in t for t in terms)]  # declared and used: the model factors

    # Column count: intercept + for every term the product of its members' column counts (common practice).
    expected_p = int(spec["intercept"]) + sum(
        int(np.prod([1 if m == "x" else per_factor[m] for m in t])) for t in terms
    )
    assert design.n_columns == expected_p
    assert design.n_observations == len(frame)

    # Rank: numpy on an independent indicator-product design with the same span.
    levels = {f: spec["factors"][f]["levels"] for f in names}
    direct = indicator_design(frame, terms, spec["intercept"], levels)
    rank = matrix_rank(design.matrix)
    assert rank == np.linalg.matrix_rank(direct)
    # The rank-deficiency check fires exactly when rank < p, and says which columns depend on others.
    deficient = [f for f in check_design(design) if f.code == "rank_deficient"]
    assert bool(deficient) == (rank < design.n_columns)
    if deficient:
        assert "equals" in deficient[0].message or "all zero" in deficient[0].message

    # Cells: every cell of the crossing of all factors, counted directly.
    counts = Counter(zip(*(frame[f] for f in names), strict=True))
    assert len(design.cells) == int(np.prod([len(levels[f]) for f in names]))
    for cell, k in zip(design.cells, design.cell_counts, strict=True):
        assert k == counts.get(cell, 0)
    # Per term: the crossing of the term's factors, counted directly.
    by_term = cell_counts_by_term(design)
    for t in terms:
        fs = tuple(m for m in t if m != "x")
        if not fs:
            continue
        table = by_term[":".join(fs)]
        sub = Counter(zip(*(frame[f] for f in fs), strict=True))
        assert len(table) == int(np.prod([len(levels[f]) for f in fs]))
        for combo in itertools.product(*(levels[f] for f in fs)):
            key = ", ".join(f"{f}={lv}" for f, lv in zip(fs, combo, strict=True))
            assert table[key] == sub.get(combo, 0)
