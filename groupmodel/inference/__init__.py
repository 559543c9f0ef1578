"""Corrected inference on arrays: neighbourhood graphs, TFCE, clusters, FDR and Bonferroni, rearrangements,
Freedman-Lane permutation tests.

Submodules are imported on first use, so that a worker process that only enhances maps does not import the
whole package.
"""
