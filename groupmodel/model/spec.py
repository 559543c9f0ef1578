"""Read and validate the JSON model spec.

The spec is validated against ``schemas/model.schema.json`` (JSON Schema draft
2020-12), relative paths are resolved against the spec's folder, and the
Wilkinson-Rogers shorthand in ``terms`` is expanded (``a*b`` -> ``a``, ``b``,
``a:b``).  Everything that can be checked without the participants table is
checked here; errors name the JSON path and the fix.
"""

from __future__ import annotations

import itertools
import json
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any, Literal

import jsonschema

from ..errors import SpecError
from ..runtime.paths import text_join
from .jsonfile import check_values, read_json
from .options import InferenceOptions

Coding = Literal["effect", "treatment", "polynomial", "indicator"]
Tail = Literal["two-sided", "greater", "less"]
#: Factor levels as written, in order: ``(("training", "sprint"), ("chronotype", "lark"))``.
Levels = tuple[tuple[str, str], ...]
#: A model term: the names of its members, in the order written (``("training", "chronotype")``).
Term = tuple[str, ...]


def term_label(term: Term) -> str:
    """``("a", "b")`` -> ``"a:b"``; the intercept (empty term) is ``"intercept"``."""
    return ":".join(term) if term else "intercept"


@dataclass(frozen=True)
class FactorSpec:
    """A categorical column as declared in the spec (levels may still be unknown)."""

    name: str
    levels: tuple[str, ...] | None = None
    coding: Coding = "effect"
    reference: str | None = None
    scores: tuple[float, ...] | None = None
    within: bool = False  # a within-participant factor: its levels are rows of the observations table


@dataclass(frozen=True)
class CovariateSpec:
    """A numeric column: how it is centred and scaled before entering the design."""

    name: str
    center: str | float | dict[str, str] = "mean"  # "mean", "none", a number, or {"within": factor}
    scale: Literal["sd", "none"] = "none"

    @property
    def within(self) -> str | None:
        return self.center.get("within") if isinstance(self.center, dict) else None


# --------------------------------------------------------------------------------------------------
# Hypotheses as written: one frozen object per hypothesis, its kind's arguments in their own object
# --------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Main:
    """``{"main": factor}``: all levels of a factor have the same (marginal) mean."""

    factor: str


@dataclass(frozen=True)
class Interaction:
    """``{"interaction": [f1, f2, ...]}``: every interaction contrast of the factors is 0."""

    factors: tuple[str, ...]


@dataclass(frozen=True)
class Compare:
    """``{"compare": {factor: [side, side]}}``: the (average) mean of one side minus the other is 0."""

    factor: str
    sides: tuple[tuple[str, ...], tuple[str, ...]]


@dataclass(frozen=True)
class Mean:
    """``{"mean": {factor: level, ...}}``: a (marginal) mean is 0 (all cells when empty)."""

    levels: Levels


@dataclass(frozen=True)
class Trend:
    """``{"trend": factor, "degree": d}``: the orthogonal-polynomial trend of that degree is 0."""

    factor: str
    degree: int


@dataclass(frozen=True)
class Slope:
    """``{"slope": covariate}``: the slope of a covariate (averaged over cells) is 0."""

    covariate: str


@dataclass(frozen=True)
class CellEntry:
    """One ``{"at": {...}, "weight": w}`` of a ``cells`` hypothesis."""

    levels: Levels
    weight: float


@dataclass(frozen=True)
class Cells:
    """``{"cells": [...]}``: a weighted sum of (marginal) cell means is 0."""

    entries: tuple[CellEntry, ...]


@dataclass(frozen=True)
class Weights:
    """``{"weights": {column: w} or [{...}, ...]}``: raw weights over the design columns."""

    rows: tuple[tuple[tuple[str, float], ...], ...]
    one_row: bool  # written as one object rather than a list of rows (names the JSON path in errors)


Target = Main | Interaction | Compare | Mean | Trend | Slope | Cells | Weights


def _levels(mapping: Any) -> Levels:
    return tuple(dict(mapping).items())


def _side(side: str | list[str]) -> tuple[str, ...]:
    return (side,) if isinstance(side, str) else tuple(side)


def _compare(value: Any, body: Mapping[str, Any]) -> Compare:
    (factor, sides), = value.items()
    return Compare(factor, (_side(sides[0]), _side(sides[1])))


def _weights(value: Any, body: Mapping[str, Any]) -> Weights:
    rows = [value] if isinstance(value, dict) else list(value)
    return Weights(tuple(tuple((col, float(w)) for col, w in row.items()) for row in rows), isinstance(value, dict))


#: kind -> reader of its arguments (the value under the kind's key, and the whole object for extra keys).
#: A new kind of hypothesis is one entry here, a builder in :mod:`groupmodel.model.hypotheses` and its
#: key in the schema.
TARGET_READERS: dict[str, Callable[[Any, Mapping[str, Any]], Target]] = {
    "main": lambda value, body: Main(value),
    "interaction": lambda value, body: Interaction(tuple(value)),
    "compare": _compare,
    "mean": lambda value, body: Mean(_levels(value)),
    "trend": lambda value, body: Trend(value, int(body.get("degree", 1))),
    "slope": lambda value, body: Slope(value),
    "cells": lambda value, body: Cells(tuple(CellEntry(_levels(e["at"]), float(e["weight"])) for e in value)),
    "weights": _weights,
}


@dataclass(frozen=True)
class HypothesisSpec:
    """One hypothesis of the spec, read (checked against the design later, when it is built).

    Attributes
    ----------
    name : str
    kind : str
        The key that names its kind (``main``, ``interaction``, ``compare``, ``mean``, ``trend``, ``slope``,
        ``cells`` or ``weights``).
    target : Main, Interaction, Compare, Mean, Trend, Slope, Cells or Weights
        The kind's arguments.
    at : tuple of (name, value)
        Factor levels (text, or a tuple of levels to average over) and covariate values (numbers) at which it
        is evaluated, in the order written.
    tail : {"two-sided", "greater", "less"} or None
        As written; None when not given (two-sided).
    marginal : {"equal", "observed"}
    degree : int or None
        As written (it belongs to ``trend`` only, which the builder checks).
    description : str or None
    """

    name: str
    kind: str
    target: Target
    at: tuple[tuple[str, str | float | tuple[str, ...]], ...] = ()
    tail: Tail | None = None
    marginal: str = "equal"
    degree: int | None = None
    description: str | None = None

    @property
    def where(self) -> str:
        """Its place in the spec, as error messages start: ``hypotheses.<name>``."""
        return f"hypotheses.{self.name}"

    @property
    def json_path(self) -> str:
        return f"$.{self.where}"

    @property
    def tail_or_default(self) -> Tail:
        return self.tail if self.tail is not None else "two-sided"

    @classmethod
    def read(cls, name: str, body: Mapping[str, Any]) -> HypothesisSpec:
        """Read one hypothesis object (already valid against the schema, or built in code)."""
        kind = next(k for k in TARGET_READERS if k in body)
        return cls(
            name=name,
            kind=kind,
            target=TARGET_READERS[kind](body[kind], body),
            at=tuple((k, tuple(v) if isinstance(v, list) else v) for k, v in (body.get("at") or {}).items()),
            tail=body.get("tail"),
            marginal=body.get("marginal", "equal"),
            degree=body.get("degree"),
            description=body.get("description"),
        )


@dataclass(frozen=True)
class ModelSpec:
    """A validated model spec.

    Attributes
    ----------
    path : Path
        The spec file; every relative path in it is relative to ``path.parent``.
    terms : tuple of Term
        Expanded terms in the order given (shorthand ``a*b`` expanded in place, duplicates removed).
    hypotheses : dict
        Hypothesis name -> its :class:`HypothesisSpec` (built over the design by :mod:`groupmodel.model.hypotheses`).
    inference : dict
        The ``inference`` object as written; ``inference_options`` is the same read into
        :class:`InferenceOptions` (checked as a whole once the command line has had its say).
    """

    path: Path
    participants: Path
    participants_sidecar: Path | None
    include: dict[str, tuple[str, ...]]
    exclude: tuple[str, ...]
    factors: dict[str, FactorSpec]
    covariates: dict[str, CovariateSpec]
    intercept: bool
    terms: tuple[Term, ...]
    hypotheses: dict[str, HypothesisSpec] = field(default_factory=dict)
    images: str | None = None
    mask: Path | None = None
    outcome: str | None = None
    inference: dict[str, Any] = field(default_factory=dict)
    raw: dict[str, Any] = field(default_factory=dict, repr=False)
    inference_options: InferenceOptions = field(default_factory=InferenceOptions)
    #: The observations table (one row per image), when some factors are within-participant.
    observations: Path | None = None
    #: A model factor whose groups get their own residual variance (Welch's v and G), or None.
    variance_groups: str | None = None

    def within_factors(self) -> tuple[str, ...]:
        """Model factors marked ``"within": true``, in declared order."""
        return tuple(f for f in self.model_factors() if self.factors[f].within)

    @property
    def base_dir(self) -> Path:
        return self.path.parent

    @property
    def name(self) -> str:
        return self.path.name

    def model_factors(self) -> tuple[str, ...]:
        """Factors that enter at least one term, in the order they are declared under ``factors``."""
        used = {m for t in self.terms for m in t}
        return tuple(f for f in self.factors if f in used)

    def model_covariates(self) -> tuple[str, ...]:
        """Covariates that enter at least one term, in declared order."""
        used = {m for t in self.terms for m in t}
        return tuple(c for c in self.covariates if c in used)

    def columns_used(self) -> tuple[str, ...]:
        """Every table column the model reads (model factors, covariates, within-centring factors)."""
        cols = list(self.model_factors()) + list(self.model_covariates())
        for c in self.model_covariates():
            w = self.covariates[c].within
            if w and w not in cols:
                cols.append(w)
        return tuple(cols)


def load_schema() -> dict[str, Any]:
    """The model spec's JSON Schema, as shipped inside the installed package."""
    text = resources.files("groupmodel.schemas").joinpath("model.schema.json").read_text(encoding="utf-8")
    return json.loads(text)


def _json_path(parts: Any) -> str:
    out = "$"
    for p in parts:
        out += f"[{p}]" if isinstance(p, int) else f".{p}"
    return out


def _schema_message(error: jsonschema.ValidationError, spec_name: str) -> str:
    # The most specific error is the most useful: descend into oneOf/anyOf contexts.
    best = jsonschema.exceptions.best_match([error]) or error
    where = _json_path(best.absolute_path)
    if best.validator == "additionalProperties":
        allowed = sorted(best.schema.get("properties", {}))
        extra = sorted(set(best.instance) - set(allowed)) if isinstance(best.instance, dict) else []
        return (
            f"{spec_name} {where}: unknown key(s) {extra}; allowed keys are {allowed}; "
            "fix the spelling or remove the key"
        )
    if best.validator == "oneOf" and where.startswith("$.hypotheses"):
        found = sorted(best.instance) if isinstance(best.instance, dict) else repr(best.instance)
        return (
            f"{spec_name} {where}: expected exactly one of the keys main, interaction, compare, mean, trend, "
            f"slope, cells, weights; found {found}; "
            "keep exactly one"
        )
    if best.validator == "anyOf" and ".at." in where:
        return (
            f"{spec_name} {where}: expected a factor level (text), a list of levels, or a covariate value (number); "
            f"found {best.instance!r}; fix the value"
        )
    return f"{spec_name} {where}: {best.message}; fix the value to match the model spec schema (see README)"


def parse_term(text: str) -> list[Term]:
    """Expand one term string: ``"a*b"`` -> ``[("a",), ("b",), ("a", "b")]``; ``"a:b"`` -> ``[("a", "b")]``.

    ``*`` binds as in Wilkinson-Rogers notation: ``a*b:c`` is ``a + b:c + a:b:c``.
    """
    text = text.replace(" ", "")
    crossed = [tuple(part.split(":")) for part in text.split("*")]
    out: list[Term] = []
    for k in range(1, len(crossed) + 1):
        for combo in itertools.combinations(crossed, k):
            out.append(tuple(m for part in combo for m in part))
    return out


def _as_level(value: str | float) -> str:
    """A spec value compared with table text: ``2`` and ``2.0`` both become ``"2"``."""
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


def _read_json(path: Path) -> Any:
    """The spec file's JSON: UTF-8, valid JSON, no absurd nesting, every number a finite float."""
    if path.is_dir():
        raise SpecError(f"model spec {path}: expected a JSON file, found a folder; give the spec file")
    return read_json(path, "model spec", SpecError)


def load_spec(path: Path | str) -> ModelSpec:
    """Read, validate and normalise a model spec.

    Raises
    ------
    SpecError
        Unreadable file, invalid JSON (with line and column), a schema violation (with the JSON path),
        a term naming an undeclared column, or an interaction of a column with itself.
    """
    path = Path(path)
    raw = _read_json(path)
    return spec_from_dict(raw, path)


def _read_factors(raw: Mapping[str, Any], name: str) -> dict[str, FactorSpec]:
    """``factors``: levels, coding, reference and scores, each checked against the others."""
    factors: dict[str, FactorSpec] = {}
    for fname, f in (raw.get("factors") or {}).items():
        levels = tuple(f["levels"]) if "levels" in f else None
        ref = f.get("reference")
        if levels is not None and ref is not None and ref not in levels:
            raise SpecError(
                f"{name} $.factors.{fname}.reference: expected one of the levels {list(levels)}, found {ref!r}; "
                "fix the reference"
            )
        scores = tuple(float(s) for s in f["scores"]) if "scores" in f else None
        if scores is not None and levels is not None and len(scores) != len(levels):
            raise SpecError(
                f"{name} $.factors.{fname}.scores: expected {len(levels)} scores (one per level), "
                f"found {len(scores)}; give one score per level"
            )
        if scores is not None and len(set(scores)) != len(scores):
            raise SpecError(f"{name} $.factors.{fname}.scores: scores must differ; found {list(scores)}")
        factors[fname] = FactorSpec(fname, levels, f.get("coding", "effect"), ref, scores, bool(f.get("within")))
    return factors


def _read_covariates(raw: Mapping[str, Any], name: str, factors: Mapping[str, FactorSpec]) -> dict[str, CovariateSpec]:
    """``covariates``: centring and scaling; a column is a factor or a covariate, not both."""
    covariates: dict[str, CovariateSpec] = {}
    for cname, c in (raw.get("covariates") or {}).items():
        if cname in factors:
            raise SpecError(
                f"{name} $.covariates.{cname}: {cname!r} is also declared under factors; "
                "declare each column once, as a factor or as a covariate"
            )
        center = c.get("center", "mean")
        if isinstance(center, dict) and center["within"] not in factors:
            raise SpecError(
                f"{name} $.covariates.{cname}.center.within: expected a declared factor "
                f"{sorted(factors)}, found {center['within']!r}; declare it under factors"
            )
        covariates[cname] = CovariateSpec(cname, center, c.get("scale", "none"))
    return covariates


def _read_terms(raw: Mapping[str, Any], name: str, factors: Mapping[str, FactorSpec],
                covariates: Mapping[str, CovariateSpec]) -> tuple[Term, ...]:
    """``terms`` expanded (``a*b`` -> ``a``, ``b``, ``a:b``), each member declared, duplicates dropped."""
    terms: list[Term] = []
    for i, text in enumerate(raw.get("terms", [])):
        for term in parse_term(text):
            if len(set(term)) != len(term):
                raise SpecError(
                    f"{name} $.terms[{i}] {text!r}: a column is crossed with itself ({term_label(term)}); "
                    "remove the repeated name"
                )
            for m in term:
                if m not in factors and m not in covariates:
                    raise SpecError(
                        f"{name} $.terms[{i}] {text!r}: {m!r} is not declared under factors or covariates "
                        f"(factors {sorted(factors)}, covariates {sorted(covariates)}); declare it or fix the name"
                    )
            if any(set(term) == set(t) for t in terms):
                continue  # a*b + a:b: the second a:b adds nothing
            terms.append(term)
    return tuple(terms)


def _read_variance_groups(raw: Mapping[str, Any], name: str, factors: Mapping[str, FactorSpec],
                          terms: tuple[Term, ...]) -> str | None:
    """``variance_groups``: a factor that enters the model's terms (its groups' variances are estimated apart)."""
    column = raw.get("variance_groups")
    if column is None:
        return None
    in_model = [f for f in factors if any(f in t for t in terms)]
    if column not in in_model:
        raise SpecError(
            f"{name} $.variance_groups: expected a factor of the model {in_model}, found {column!r}; "
            "name a factor declared under factors and used in terms"
        )
    return str(column)


def spec_from_dict(raw: Any, path: Path | str) -> ModelSpec:
    """Validate an already-parsed spec; ``path`` anchors relative paths and names the spec in errors."""
    path = Path(path)
    name = path.name
    check_values(raw, name, SpecError)  # nesting and numbers first: the schema check recurses and converts
    validator = jsonschema.Draft202012Validator(load_schema())
    errors = sorted(validator.iter_errors(raw), key=lambda e: (len(e.absolute_path), list(map(str, e.path))))
    if errors:
        raise SpecError(_schema_message(errors[0], name))
    base = path.parent

    factors = _read_factors(raw, name)
    covariates = _read_covariates(raw, name, factors)
    terms = _read_terms(raw, name, factors, covariates)

    observations = base / raw["observations"] if "observations" in raw else None
    _check_within(name, factors, covariates, observations, raw.get("variance_groups"))
    exclude = tuple(raw.get("exclude", []))
    include = {k: tuple(_as_level(v) for v in vals) for k, vals in (raw.get("include") or {}).items()}
    sidecar = raw.get("participants_sidecar")
    participants = text_join(base, raw["participants"])
    if sidecar is not None:
        sidecar_path: Path | None = base / sidecar
    else:
        guess = participants.with_suffix(".json")
        sidecar_path = guess if guess.exists() else None
    return ModelSpec(
        path=path,
        participants=participants,
        participants_sidecar=sidecar_path,
        include=include,
        exclude=exclude,
        factors=factors,
        covariates=covariates,
        intercept=bool(raw.get("intercept", True)),
        terms=terms,
        hypotheses={n: HypothesisSpec.read(n, body) for n, body in (raw.get("hypotheses") or {}).items()},
        images=raw.get("images"),
        mask=text_join(base, raw["mask"]) if "mask" in raw else None,
        outcome=raw.get("outcome"),
        inference=dict(raw.get("inference") or {}),
        raw=raw,
        inference_options=InferenceOptions.parse(raw.get("inference") or {}, base),
        observations=observations,
        variance_groups=_read_variance_groups(raw, name, factors, terms),
    )


def _check_within(name: str, factors: Mapping[str, FactorSpec], covariates: Mapping[str, CovariateSpec],
                  observations: Path | None, variance_groups: Any = None) -> None:
    """Within-participant factors need the observations table; covariates are centred by between factors;
    variance groups are not offered with an observations table."""
    if observations is not None and variance_groups is not None:
        raise SpecError(
            f"{name} $.variance_groups: unequal variances by group (Welch's v and G) are not available with an "
            'observations table (several images per participant); remove "variance_groups" or "observations"'
        )
    within = [f for f, fs in factors.items() if fs.within]
    if within and observations is None:
        raise SpecError(
            f"{name} $.factors.{within[0]}.within: a within-participant factor needs one row per image in an "
            'observations table; add "observations": "observations.tsv" to the spec'
        )
    for cname, c in covariates.items():
        if c.within is not None and c.within in within:
            raise SpecError(
                f"{name} $.covariates.{cname}.center.within: {c.within!r} is a within-participant factor and "
                "covariates are between-participant; centre within a between-participant factor or on the mean"
            )
