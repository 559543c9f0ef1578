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
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any, Literal

import jsonschema

from ..errors import SpecError

Coding = Literal["effect", "treatment", "polynomial", "indicator"]
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


@dataclass(frozen=True)
class CovariateSpec:
    """A numeric column: how it is centred and scaled before entering the design."""

    name: str
    center: str | float | dict[str, str] = "mean"  # "mean", "none", a number, or {"within": factor}
    scale: Literal["sd", "none"] = "none"

    @property
    def within(self) -> str | None:
        return self.center.get("within") if isinstance(self.center, dict) else None


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
        Hypothesis name -> the JSON object as written (interpreted by :mod:`groupmodel.hypotheses`).
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
    hypotheses: dict[str, dict[str, Any]] = field(default_factory=dict)
    images: str | None = None
    mask: Path | None = None
    outcome: str | None = None
    inference: dict[str, Any] = field(default_factory=dict)
    raw: dict[str, Any] = field(default_factory=dict, repr=False)

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
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SpecError(f"model spec {path}: file not found; check the path") from None
    except IsADirectoryError:
        raise SpecError(f"model spec {path}: expected a JSON file, found a folder; give the spec file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SpecError(f"model spec {path}: cannot be read ({exc}); check the file") from None
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise SpecError(
            f"model spec {path} line {exc.lineno}, column {exc.colno}: invalid JSON ({exc.msg}); fix the syntax"
        ) from None


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


def spec_from_dict(raw: Any, path: Path | str) -> ModelSpec:
    """Validate an already-parsed spec; ``path`` anchors relative paths and names the spec in errors."""
    path = Path(path)
    name = path.name
    validator = jsonschema.Draft202012Validator(load_schema())
    errors = sorted(validator.iter_errors(raw), key=lambda e: (len(e.absolute_path), list(map(str, e.path))))
    if errors:
        raise SpecError(_schema_message(errors[0], name))
    base = path.parent

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
        factors[fname] = FactorSpec(fname, levels, f.get("coding", "effect"), ref, scores)

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


    exclude = tuple(raw.get("exclude", []))
    include = {k: tuple(_as_level(v) for v in vals) for k, vals in (raw.get("include") or {}).items()}
    sidecar = raw.get("participants_sidecar")
    participants = base / raw["participants"]
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
        terms=tuple(terms),
        hypotheses=dict(raw.get("hypotheses") or {}),
        images=raw.get("images"),
        mask=(base / raw["mask"]) if "mask" in raw else None,
        outcome=raw.get("outcome"),
        inference=dict(raw.get("inference") or {}),
        raw=raw,
    )
