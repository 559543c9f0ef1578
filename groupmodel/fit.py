"""Fits of a model: to one table column (:func:`fit_table`) or at every voxel of its images (:func:`fit_images`).

The public face of :mod:`groupmodel.analysis` (and of the writers in :mod:`groupmodel.outputs.fit_files`).
"""

from .analysis.table_fit import TableFit, fit_table, results_table
from .analysis.voxel_fit import F_MAPS, T_MAPS, VoxelFit, fit_images
from .outputs.fit_files import write_table_fit, write_voxel_fit

__all__ = ["F_MAPS", "T_MAPS", "TableFit", "VoxelFit", "fit_images", "fit_table", "results_table",
           "write_table_fit", "write_voxel_fit"]
