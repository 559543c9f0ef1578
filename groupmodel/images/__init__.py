"""Images: paths and sources, headers and checks, the mask, loading (and spilling) data, writing maps.

No statistics and no participants table here.
"""

from .core import (
    Grid,
    ImageRef,
    ImageSource,
    MaskedData,
    SpillReader,
    check_images,
    chunk_size_for,
    load_mask,
    load_masked,
    load_overhead_bytes,
    release_pages,
    resolve_images,
    storage_dtype,
    unmask,
    write_map,
    write_mask,
)

__all__ = ["Grid", "ImageRef", "ImageSource", "MaskedData", "SpillReader", "check_images", "chunk_size_for",
           "load_mask", "load_masked", "load_overhead_bytes", "release_pages", "resolve_images", "storage_dtype",
           "unmask", "write_map", "write_mask"]
