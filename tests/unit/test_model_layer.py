"""The model layer's parts as data: the spec read into frozen objects, options overridden with
``dataclasses.replace``, hypotheses built by registered builders, a model rebuilt without reading the table."""

from __future__ import annotations

import argparse
import dataclasses
from pathlib import Path

import numpy as np
import pytest

import groupmodel
from groupmodel.cli.commands import inference_overrides
from groupmodel.errors import InputError
from groupmodel.model.design import Design
from groupmodel.model.hypotheses import BUILDERS, At, CellWeights, build_hypotheses, register
from groupmodel.model.options import InferenceOptions
from groupmodel.model.spec import Compare, HypothesisSpec, Mean, load_spec

EXAMPLE = Path(__file__).resolve().parents[2] / "example_study"


def test_spec_hypotheses_are_frozen_objects_with_their_json_path() -> None:
    spec = load_spec(EXAMPLE / "model.json")
    h = spec.hypotheses["trained_vs_rest"]
    assert isinstance(h, HypothesisSpec) and h.kind == "compare"
    assert h.target == Compare("training", (("sprint", "endurance"), ("rest",)))
    assert h.json_path == "$.hypotheses.trained_vs_rest" and h.tail is None and h.tail_or_default == "two-sided"
    assert spec.hypotheses["late_vs_early_in_sprint"].at == (("training", "sprint"),)
    with pytest.raises(dataclasses.FrozenInstanceError):
        h.marginal = "observed"  # type: ignore[misc]


def test_hypotheses_built_from_read_objects_equal_those_from_json() -> None:
    model = groupmodel.build(EXAMPLE / "model.json")
    raw = build_hypotheses(model.design, model.spec.raw["hypotheses"])
    for name, h in model.hypotheses.items():
        assert raw[name].statement == h.statement
        np.testing.assert_array_equal(raw[name].weights, h.weights)


def test_a_new_kind_is_one_registered_builder() -> None:
    model = groupmodel.build(EXAMPLE / "model.json")

    @register("first_cell")
    def first_cell(h: HypothesisSpec, design: Design, at: At) -> CellWeights:
        w = np.zeros((1, len(design.cells)))
        w[0, 0] = 1.0
        return CellWeights(w, (f"{design.cell_label(design.cells[0])} = 0",), "t")

    try:
        spec = HypothesisSpec("first", "first_cell", Mean(()))
        h = build_hypotheses(model.design, {"first": spec})["first"]
        np.testing.assert_array_equal(h.weights[0], model.design.cell_row(model.design.cells[0]))
        assert h.statement.startswith("training=sprint, chronotype=") and h.test == "t" and h.estimable
    finally:
        del BUILDERS["first_cell"]


def test_options_from_spec_and_overrides() -> None:
    spec = load_spec(EXAMPLE / "model.json")
    base = InferenceOptions.from_spec(spec)
    assert base == InferenceOptions()
    opts = base.with_overrides(permutations=100, tfce=True, seed=4)
    assert (opts.permutations, opts.tfce, opts.seed) == (100, True, 4) and base.permutations == 0
    cli = argparse.Namespace(permutations=100, seed=4, method="auto", blocks=None, whole_blocks=False, tfce=True,
                             cluster_threshold=None, jobs=None, threads=None, ci_level=None)
    assert spec.inference_options.with_overrides(**inference_overrides(cli)) == opts
    with pytest.raises(InputError, match="need permutations"):
        base.with_overrides(tfce=True)
    with pytest.raises(InputError, match="--whole-blocks needs --blocks"):
        opts.with_overrides(whole_blocks=True)
    with pytest.raises(InputError, match="--jobs must be a whole number"):
        InferenceOptions.from_spec(spec, jobs=0)


def test_model_without_participants_reuses_the_sample(monkeypatch: pytest.MonkeyPatch) -> None:
    model = groupmodel.build(EXAMPLE / "model.json")
    dropped = model.design.participant_ids[:2]

    def no_read(path: Path) -> None:
        raise AssertionError("participants.tsv read again")

    monkeypatch.setattr("groupmodel.model.table.read_table", no_read)
    smaller = model.without({pid: "no image" for pid in dropped})
    assert smaller.design.n_observations == model.design.n_observations - 2
    assert [e.participant_id for e in smaller.sample.exclusions if e.reason == "no image"] == dropped
    assert smaller.sample.n_file_rows == model.sample.n_file_rows
    rows = smaller.sample.table_rows()
    assert list(rows.columns) == list(model.sample.table.columns)
    assert rows["participant_id"].tolist() == smaller.design.participant_ids
