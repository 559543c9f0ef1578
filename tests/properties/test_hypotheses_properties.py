"""Property tests of hypotheses (hypothesis): coding invariance and estimability.

References: common practice -- a hypothesis stated over cell means is a property of the data, not of the
coding, so its statistic must not change with the coding or with centring the covariates (the designs span
the same space); a linear function of cell means is estimable exactly when it does not need an empty cell
(in a full factorial model).  Statistics are computed with groupmodel.ols directly.
"""

from __future__ import annotations

import itertools
from pathlib import Path

import numpy as np
import pandas as pd
from hypothesis import given, settings
from hypothesis import strategies as st

from groupmodel.engine.ols import Test, fit_chunk, prepare
from groupmodel.model.design import Design, build_design
from groupmodel.model.hypotheses import build_hypotheses
from groupmodel.model.spec import spec_from_dict
from groupmodel.model.table import select_sample

NAMES = ("A", "B", "D")
CODINGS = ("effect", "treatment", "polynomial", "indicator")


def design_of(frame: pd.DataFrame, spec: dict) -> Design:
    table = frame.copy()
    table.insert(0, "participant_id", [f"sub-{i:03d}" for i in range(len(table))])
    spec = spec_from_dict({"participants": "participants.tsv", **spec}, Path("/nonexistent/model.json"))
    sample = select_sample(spec, table=table.astype(str).astype(object), sidecar_levels={}, numeric_columns=["y"])
    return build_design(spec, sample)


def model_spec(names: tuple[str, ...], levels: dict[str, list[str]], codings: dict[str, str],
               center: object, scale: str, hypotheses: dict) -> dict:
    """Full factorial of ``names`` plus x and x by the first factor, under the given codings.

    All-indicator coding is written as the cell-means model (no intercept), which spans the same space.
    """
    cell_means = all(c == "indicator" for c in codings.values())
    if cell_means:
        terms, intercept = [":".join(names), f"{names[0]}:x"], False
    else:
        codings = {f: ("effect" if c == "indicator" else c) for f, c in codings.items()}
        terms, intercept = ["*".join(names), f"x*{names[0]}"], True
    return {
        "factors": {f: {"coding": codings[f], "levels": levels[f]} for f in names},
        "covariates": {"x": {"center": center, "scale": scale}},
        "intercept": intercept,
        "terms": terms,
        "hypotheses": hypotheses,
    }


def statistics(design: Design, hypotheses: dict) -> dict[str, tuple[float, float]]:
    """(statistic, estimate or nan) of every hypothesis, by groupmodel.ols."""
    hyps = build_hypotheses(design, hypotheses)
    assert all(h.estimable for h in hyps.values())
    tests = [Test(h.name, h.weights, h.test, h.test_tail) for h in hyps.values()]
    assert design.sample is not None
    y = design.sample.data["y"].to_numpy(float)[:, None]
    result = fit_chunk(prepare(design.matrix, tests), y)
    out = {}
    for h in hyps.values():
        r = result[h.name]
        out[h.name] = (float(r.statistic[0]), float(r.effect[0]) if h.test == "t" else float("nan"))
    return out


@st.composite
def factorial_data(draw: st.DrawFn, allow_empty: bool = False):
    n_factors = draw(st.integers(2, 3))
    names = NAMES[:n_factors]
    levels = {f: [f"{f.lower()}{i + 1}" for i in range(draw(st.integers(2, 3)))] for f in names}
    cells = list(itertools.product(*(levels[f] for f in names)))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    # Unbalanced, every cell with at least 2 (so that slopes within a factor level are estimable) ...
    counts = rng.integers(2, 6, len(cells))
    empty = None
    if allow_empty:
        empty = draw(st.integers(0, len(cells) - 1))
        counts[empty] = 0  # ... except one
    counts[int(np.argmax(counts))] += 3  # residual degrees of freedom beyond the cells and slopes
    rows = [c for c, k in zip(cells, counts, strict=True) for _ in range(k)]
    frame = pd.DataFrame(rows, columns=list(names))
    n = len(frame)
    frame["x"] = rng.normal(50, 10, n).round(3)
    frame["y"] = (rng.normal(0, 1, n) + 0.05 * frame["x"] + (frame[names[0]] == levels[names[0]][0])).round(6)
    frame = frame.sample(frac=1.0, random_state=seed % 1000).reset_index(drop=True)
    return names, levels, cells, frame, (cells[empty] if empty is not None else None)


def invariant_hypotheses(names: tuple[str, ...], levels: dict[str, list[str]]) -> dict:
    a, b = names[0], names[1]
    la, lb = levels[a], levels[b]
    hyps: dict = {f"main_{f}": {"main": f} for f in names}
    hyps["inter_ab"] = {"interaction": [a, b]}
    if len(names) == 3:
        hyps["inter_all"] = {"interaction": list(names)}
    hyps["compare"] = {"compare": {a: [la[0], la[-1]]}, "tail": "greater"}
    hyps["compare_at"] = {"compare": {b: [lb[-1], lb[0]]}, "at": {a: la[-1], "x": 55.5}}
    hyps["compare_observed"] = {"compare": {a: [la[0], la[1]]}, "marginal": "observed"}
    hyps["mean_cell"] = {"mean": {f: levels[f][0] for f in names}}
    hyps["mean_margin"] = {"mean": {b: lb[-1]}}
    hyps["trend"] = {"trend": a, "degree": len(la) - 1}
    hyps["slope"] = {"slope": "x"}
    hyps["slope_at"] = {"slope": "x", "at": {a: la[-1]}}
    hyps["cells"] = {"cells": [{"at": {a: la[0], b: lb[0]}, "weight": 2},
                               {"at": {a: la[1], b: lb[-1]}, "weight": -1.5}]}
    return hyps


centers = st.one_of(st.sampled_from(["mean", "none"]), st.floats(-100, 100, allow_nan=False).map(lambda v: round(v, 2)))


@settings(max_examples=25, deadline=None)
@given(factorial_data(), st.data())
def test_statistics_do_not_depend_on_coding_or_centring(case, data) -> None:
    names, levels, _, frame, _ = case
    hyps = invariant_hypotheses(names, levels)
    results = []
    for _ in range(2):
        codings = {f: data.draw(st.sampled_from(CODINGS)) for f in names}
        spec = model_spec(names, levels, codings, data.draw(centers), data.draw(st.sampled_from(["none", "sd"])),
                          hyps)
        results.append(statistics(design_of(frame, spec), hyps))
    first, second = results
    for name in hyps:
        for u, v in zip(first[name], second[name], strict=True):
            if np.isnan(u):
                assert np.isnan(v)
                continue
            # Common practice: the same hypothesis gives the same statistic whatever the coding/centring.
            assert abs(u - v) <= 1e-7 * max(abs(u), abs(v)) + 1e-9, (name, u, v)


@settings(max_examples=30, deadline=None)
@given(factorial_data(allow_empty=True), st.data())
def test_a_hypothesis_touching_an_empty_cell_is_not_estimable(case, data) -> None:
    names, levels, cells, frame, empty = case
    full = next(c for c in cells if c != empty)
    codings = {f: data.draw(st.sampled_from(CODINGS)) for f in names}
    spec = model_spec(names, levels, codings, "mean", "none", {})
    design = design_of(frame, spec)
    at_empty = dict(zip(names, empty, strict=True))
    at_full = dict(zip(names, full, strict=True))
    other = next(c for c in cells if c not in (empty, full))
    hyps = {
        "empty_mean": {"mean": at_empty},
        "empty_vs_full": {"cells": [{"at": at_empty, "weight": 1}, {"at": at_full, "weight": -1}]},
        "main": {"main": names[0]},  # averages equally over every cell, the empty one included
        "full_mean": {"mean": at_full},
        "full_vs_other": {"cells": [{"at": at_full, "weight": 1},
                                    {"at": dict(zip(names, other, strict=True)), "weight": -1}]},
        "slope_full": {"slope": "x", "at": {names[0]: full[0]}},
    }
    built = build_hypotheses(design, hyps)
    label = ", ".join(f"{f}={lv}" for f, lv in at_empty.items())
    for name in ("empty_mean", "empty_vs_full", "main"):
        h = built[name]
        assert not h.estimable, name
        assert any(f"no participant has {label}" in p for p in h.problems), (name, h.problems)
    for name in ("full_mean", "full_vs_other", "slope_full"):
        assert built[name].estimable, (name, built[name].problems)
