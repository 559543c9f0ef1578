"""``groupmodel check --images``: do a factor's groups differ in residual variance across the images?

The listed images (one per design row, in design-row order: only when the rows section finds the list in order)
are read as a fit reads them (:func:`groupmodel.images.loading.load_masked`: voxels finite in every image and
not zero in all), fitted with the hand-written design, and for every identified factor the voxels are counted
where the rule of :mod:`groupmodel.engine.variance_check` holds (group variance ratio above
``VARIANCE_RATIO_WARN`` and Levene's test, ``scipy.stats.levene`` centred on medians, below ``LEVENE_ALPHA``),
as a voxelwise fit counts them (:func:`~groupmodel.engine.variance_check.count_unequal`).  More than
``VOXEL_SHARE_WARN`` of the voxels: a warning suggesting
``variance_groups`` (Welch's v and G).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..engine.variance_check import LEVENE_ALPHA, VARIANCE_RATIO_WARN, count_unequal, widespread
from ..errors import InputError
from ..images.loading import load_masked
from ..images.sources import ImageRef, ImageSource
from ..runtime.progress import progress_bar
from ..text import number_text
from .context import AuditContext
from .read import AuditFinding, listed_file, participant_in_path, read_image_list
from .variances import FactorGroups, checkable_groups, column_space

__all__ = ["CHECK_MEMORY", "image_variance_findings"]

#: Memory for the images' in-mask values (beyond it they are spilled to a temporary file), as a fit's default.
CHECK_MEMORY = 2 * 1024**3
#: Voxels whose residuals are formed at once.
_CHUNK = 20_000


def _listed_paths(ctx: AuditContext, claimed: np.ndarray) -> list[Path] | None:
    """The image of every design row, in row order, or None when the list does not follow the rows (the rows
    section says why) or a file does not exist."""
    path = ctx.request.images
    assert path is not None and ctx.alignment is not None
    entries = read_image_list(path)
    if len(entries) != ctx.files.x.n_rows:
        return None
    ids = ctx.alignment.table.ids
    out = []
    for (_, text), row in zip(entries, claimed, strict=True):
        pid = participant_in_path(text)
        if pid is not None and pid != ids[row]:
            return None
        found = listed_file(path, text)
        if found is None:
            return None
        out.append(found)
    return out


def _counts(y: np.ndarray, u: np.ndarray, groups: list[FactorGroups]) -> dict[str, tuple[int, int]]:
    """Factor -> (voxels whose groups' variances differ, voxels tested), over column blocks of the data (n, V)."""
    hit = dict.fromkeys((g.factor for g in groups), 0)
    tested = dict(hit)
    for s in range(0, y.shape[1], _CHUNK):
        block = np.asarray(y[:, s : s + _CHUNK], dtype=np.float64)
        resid = block - u @ (u.T @ block)
        for g in groups:
            h, t = count_unequal(resid, g.labels, g.rho)
            hit[g.factor] += h
            tested[g.factor] += t
    return {f: (hit[f], tested[f]) for f in hit}


def image_variance_findings(ctx: AuditContext) -> list[AuditFinding]:
    """A warning for each identified factor whose groups' residual variances differ in more than
    ``VOXEL_SHARE_WARN`` of the voxels of the listed images (:func:`~groupmodel.engine.variance_check.widespread`);
    a note when the images cannot be read."""
    images, alignment = ctx.request.images, ctx.alignment
    if images is None or ctx.columns is None or alignment is None or alignment.claimed is None:
        return []
    claimed = np.asarray(alignment.claimed)
    if np.any(claimed < 0):
        return []
    paths = _listed_paths(ctx, claimed)
    if paths is None:
        return []
    u = column_space(ctx)
    groups = checkable_groups(ctx, u, claimed)
    if not groups:
        return []
    ids = alignment.table.ids
    source = ImageSource(tuple(ImageRef(i, ids[t], p) for i, (p, t) in enumerate(zip(paths, claimed, strict=True))),
                         "column", f"--images {images.name}")
    bar = progress_bar(len(source), "reading images for the variance check", unit="image")  # on a terminal only
    try:
        with load_masked(source, None, CHECK_MEMORY, progress=lambda done, _: bar.update_to(done)) as data:
            counts = _counts(data.data, u, groups)
            elements = "vertices" if data.grid.kind == "gifti" else "voxels"
    except InputError as exc:
        return [AuditFinding("note", "image_variances_unread",
                             f"{images.name}: the residual variances of the images were not checked: {exc}",
                             "variances")]  # type: ignore[arg-type]
    finally:
        bar.close()
    out = []
    for factor, (hit, total) in counts.items():
        if widespread(hit, total):
            out.append(AuditFinding(
                "warning", "unequal_variances_images",
                f"{images.name} (fitted with this design): in {hit} of {total} {elements} "
                f"({number_text(100 * hit / total)}%) the residual variances of the groups of {factor!r} differ by "
                f"more than a factor of {number_text(VARIANCE_RATIO_WARN)} with Levene's test (scipy.stats.levene, "
                f"centred on medians) p < {number_text(LEVENE_ALPHA)}; pooled t and F assume equal variances: "
                f'consider "variance_groups": "{factor}" in the spec',
                "variances"))  # type: ignore[arg-type]
    return out
