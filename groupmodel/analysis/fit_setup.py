"""A voxelwise fit's set-up: the spec built into a model, its images resolved and checked, and every check that
needs no image data, so that a refusal comes before any image is read."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from ..engine.ols import Prepared, prepare
from ..errors import InputError
from ..model.assembly import Model, build
from ..model.spec import ModelSpec
from .corrections import InferenceOptions
from .strata_inference import check_strata_inference
from .table_fit import require_fittable
from .welch_fit import WelchSetup, welch_setup
from .welch_inference import check_welch_inference

__all__ = ["Opened", "open_images", "opened_model"]


def open_images(model: Model, drop_missing: bool = False) -> tuple[Model, Any, list[tuple[str, str]]]:
    """Resolve and check the images of a model's observations; rebuild the model if some are dropped.

    Returns
    -------
    model : Model
        With participants without images left out (listed among the exclusions) when ``drop_missing``.
    source : groupmodel.images.ImageSource
        Checked, in design-row order.
    dropped : list of (participant_id, reason)
    """
    from ..images import check_images, resolve_images

    spec = model.spec
    if not spec.images:
        raise InputError(
            f'{spec.name}: expected an "images" entry (a path pattern such as '
            '"maps/{participant_id}_effect.nii.gz", a column of paths, or one 4-D file); found none; '
            "add it, or fit one table column with --outcome"
        )
    # The participants table was read once, by build: its rows come from the sample.
    sample = model.sample
    source = resolve_images(spec.images, model.design.participant_ids, sample.table_rows(), spec.base_dir,
                            source_label=f'{spec.name} "images"', file_rows=sample.file_rows,
                            n_file_rows=sample.n_file_rows)
    source, dropped = check_images(source, drop_missing=drop_missing)
    if dropped:
        model = model.without({pid: reason for pid, reason in dropped})
        source = resolve_images(spec.images, model.design.participant_ids, model.sample.table_rows(),
                                spec.base_dir, source_label=f'{spec.name} "images"')
        source, _ = check_images(source)
    return model, source, dropped


@dataclass(frozen=True)
class Opened:
    """A spec built into a model whose images are resolved and checked, with what the fit needs of the design."""

    model: Model
    source: Any
    dropped: list[tuple[str, str]]
    prepared: Prepared | None  # None with within-participant factors (each hypothesis in its stratum)
    welch: WelchSetup | None


def opened_model(spec: ModelSpec, inference: InferenceOptions, drop_missing: bool, client: Any) -> Opened:
    """The model and its images, after every check that needs no image data (so a refusal comes before reading)."""
    model = build(spec)
    require_fittable(model)
    model, source, dropped = open_images(model, drop_missing)
    require_fittable(model)
    if model.strata is not None:
        check_strata_inference(model, inference)
        if client is not None:
            raise InputError(f"{spec.name}: within-participant factors are fitted on this machine only, not on a "
                             "Dask cluster; leave out --scheduler (client)")
    prepared = prepare(model.design.matrix, model.tests()) if model.strata is None else None
    welch = welch_setup(model, prepared) if prepared is not None else None
    if welch is not None:
        check_welch_inference(inference)
    return Opened(model, source, dropped, prepared, welch)
