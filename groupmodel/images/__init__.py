"""Find, check and read the images of a group fit; the analysis mask; chunks of voxels; write maps.

NIfTI volumes and GIFTI surfaces are handled behind one face: a :class:`Grid` says what every image of a
study shares, an :class:`ImageSource` says which file (and volume) belongs to each observation, and
:class:`MaskedData` holds the in-mask values of every image as an ``(n_obs, n_in_mask)`` float32 matrix.

The road through this package::

    source = resolve_images(spec_images, ids, table, base_dir)       # no file is opened
    source, dropped = check_images(source, drop_missing=...)          # headers only (NIfTI)
    with load_masked(source, mask, memory_bytes) as data:             # every image read exactly once
        for cols, y in data.chunks(chunk_size_for(n, n_tests, budget)):
            ...                                                       # y: (n_obs, len) float64
    write_map(path, values, data.mask, data.grid)                     # float32, 0 outside the mask

Voxel order.  Images are indexed as nibabel presents them (``[i, j, k]`` for volumes, ``[vertex]`` for
surfaces).  The columns of the data matrix, and the values given to :func:`write_map`, follow the mask in
C (row-major) order of that indexing, i.e. the order of ``np.flatnonzero(mask)``.

Memory.  :func:`load_masked` keeps the data matrix in RAM when it fits in ``memory_bytes``, else in a numpy
memmap in a temporary folder that :meth:`MaskedData.close` removes.  On top of the budget it needs at most
:func:`load_overhead_bytes` (a few single images' worth; see there).

Modules (imports point down the list)::

    grid       Grid, file kinds, the short texts messages use for shapes and affines
    sources    ImageRef, ImageSource, resolve_images (a path pattern, a column of paths, one 4-D file)
    headers    header facts (NIfTI header, GIFTI XML attributes), check_images and its comparisons
    fastread   .nii.gz files read whole and decompressed in threads (isal or zlib); the fast gzip writer
    reading    the values of one image; every image of a source exactly once
    mask       load_mask
    packed     rows that keep only the candidates in play, and their in-place compaction
    spill      the spill file, SpillReader, release_pages, the compaction of RAM and spilled buffers
    masked     MaskedData (the loaded matrix, in chunks)
    loading    load_masked, storage_dtype, load_overhead_bytes, chunk_size_for
    writing    unmask, write_map, write_mask

No statistics and no participants table here: the rows of the table that are needed come as arguments.
"""

from .grid import Grid
from .headers import check_images
from .loading import chunk_size_for, load_masked, load_overhead_bytes, storage_dtype
from .mask import load_mask
from .masked import MaskedData
from .sources import ImageRef, ImageSource, resolve_images
from .spill import SpillReader, release_pages
from .writing import unmask, write_map, write_mask

__all__ = ["Grid", "ImageRef", "ImageSource", "MaskedData", "SpillReader", "check_images", "chunk_size_for",
           "load_mask", "load_masked", "load_overhead_bytes", "release_pages", "resolve_images", "storage_dtype",
           "unmask", "write_map", "write_mask"]
