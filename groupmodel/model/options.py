"""Settings of corrected inference, as data: built from the spec, overridden by the command line, validated.

:meth:`InferenceOptions.from_spec` reads the spec's ``inference`` object (already checked against the
schema); :meth:`InferenceOptions.with_overrides` applies settings given elsewhere (the command line) with
:func:`dataclasses.replace`.  Both check the combination of settings once, when it is complete.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass, replace
from pathlib import Path
from typing import Any

from ..errors import InputError


@dataclass(frozen=True)
class InferenceOptions:
    """Settings of corrected inference (spec ``inference`` object, overridden by the command line).

    Attributes
    ----------
    permutations : int
        J, the rearrangements including the identity (0: parametric corrections only).  When fewer distinct
        rearrangements exist, all of them are used and the result is exact.
    seed : int
        Seed of the random rearrangements (default 0, always recorded).
    method : {"auto", "permutation", "sign_flip", "both"}
        ``auto``: per hypothesis, sign flips when its weights over cell means do not sum to zero (a mean
        or a combination of means), row permutation when they do (differences, interactions, slopes).
    blocks : str or None
        Table column of exchangeability blocks.
    whole_blocks : bool
        Permute blocks as wholes instead of rows within blocks.
    tfce : bool
        Threshold-free cluster enhancement (E = 0.5, H = 2) and its FWE p.
    tfce_step : float or None
        TFCE step dh in statistic units (default: the largest observed value / 100), recorded.
    cluster_threshold : float or None
        Cluster-forming threshold as a z value, for cluster-extent FWE.
    connectivity : {6, 18, 26}
        Voxel neighbourhood for TFCE and clusters (26: faces, edges and corners).
    mesh : Path or None
        Surface (GIFTI with a triangle array) giving vertex neighbours for surface data.
    jobs : int or None
        Worker processes for TFCE and cluster nulls (default: the cores the process may use); results
        do not depend on it.
    threads : int or None
        Threads for the permutation products (default: the cores the process may use); results do
        not depend on it.
    ci_level : float
        Confidence level of the intervals of effects and of partial eta squared (default 0.95).
    """

    permutations: int = 0
    seed: int = 0
    method: str = "auto"
    blocks: str | None = None
    whole_blocks: bool = False
    tfce: bool = False
    tfce_step: float | None = None
    cluster_threshold: float | None = None
    connectivity: int = 26
    mesh: Path | None = None
    jobs: int | None = None
    threads: int | None = None
    ci_level: float = 0.95

    @property
    def active(self) -> bool:
        return self.permutations > 0

    def as_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["mesh"] = str(self.mesh) if self.mesh else None
        return d

    @classmethod
    def parse(cls, spec_inference: Mapping[str, Any], base_dir: Path) -> InferenceOptions:
        """The spec's ``inference`` object as options, not yet checked as a whole (the command line may
        still complete it); a relative ``mesh`` is taken relative to ``base_dir``."""
        return cls(**{k: v for k, v in spec_inference.items() if k != "mesh"},
                   mesh=(base_dir / spec_inference["mesh"]) if spec_inference.get("mesh") else None)

    @classmethod
    def from_spec(cls, spec: Any, **overrides: Any) -> InferenceOptions:
        """A spec's settings (``spec.inference_options``) with ``overrides`` applied, validated."""
        return spec.inference_options.with_overrides(**overrides)

    def with_overrides(self, **given: Any) -> InferenceOptions:
        """These settings with ``given`` ones replaced (``dataclasses.replace``), validated."""
        return replace(self, **given).validated()

    def validated(self) -> InferenceOptions:
        """Check the combination of settings; returns self.

        Raises
        ------
        InputError
            TFCE, clusters or blocks without permutations; ``permutations`` or ``seed`` below 0;
            ``jobs``/``threads`` below 1; a cluster threshold or TFCE step that is not a finite number (the
            step also > 0); whole blocks without blocks; a ``ci_level`` not strictly between 0 and 1.
        """
        for option, value, least in (("--permutations", self.permutations, 0), ("--seed", self.seed, 0),
                                     ("--jobs", self.jobs, 1), ("--threads", self.threads, 1)):
            if value is not None and (isinstance(value, bool) or not isinstance(value, int) or value < least):
                example = {"--permutations": 5000, "--seed": 1}.get(option, 2)
                raise InputError(
                    f"{option} must be a whole number >= {least}; got {value!r}; give e.g. {option} {example}"
                )
        for option, number in (("--cluster-threshold", self.cluster_threshold), ("tfce_step", self.tfce_step)):
            if number is not None and not (isinstance(number, int | float) and math.isfinite(number)):
                raise InputError(f"{option} must be a finite number; got {number!r}; give e.g. 3.1")
        check_ci_level(self.ci_level)
        if self.tfce_step is not None and self.tfce_step <= 0:
            raise InputError(f"inference.tfce_step must be > 0; got {self.tfce_step!r}; leave it out for the default")
        if (self.tfce or self.cluster_threshold is not None or self.blocks or self.whole_blocks) \
                and not self.active:
            raise InputError(
                "TFCE, cluster-extent and exchangeability blocks need permutations; found --permutations 0; "
                "add --permutations J (e.g. 5000) or inference.permutations to the spec"
            )
        if self.whole_blocks and not self.blocks:
            raise InputError("--whole-blocks needs --blocks COLUMN (the exchangeability blocks); add it")
        return self


def check_ci_level(level: Any) -> float:
    """``level`` if it is a number strictly between 0 and 1 (a confidence level such as 0.95), else an InputError."""
    if isinstance(level, bool) or not isinstance(level, int | float) or not 0 < level < 1:
        raise InputError(
            f"--ci-level (inference.ci_level) must be a number between 0 and 1; got {level!r}; "
            "give e.g. --ci-level 0.95 for 95% intervals"
        )
    return float(level)
