"""Everything groupmodel writes: atomic output folders, TSV and JSON files, pictures.

- :mod:`.folder`: the atomic output folder, JSON and TSV text;
- :mod:`.provenance`: the header (software, version, research-use note) every sidecar carries, and the run
  record (SHA-256 of the inputs, software versions, start and wall time);
- :mod:`.index`: where each file goes (one folder per hypothesis) and the index ``outputs.json``;
- :mod:`.dataset`: ``dataset_description.json`` (the folder as a BIDS derivatives dataset);
- :mod:`.summary`: summary.tsv/json rows: peaks with their location, counts, clusters;
- :mod:`.design_files`: design.tsv/json, contrasts.tsv/json and their pictures (:mod:`.figures`);
- :mod:`.fit_files`: results of a table fit; maps, sidecars, cluster tables and summary of a voxel fit;
- :mod:`.report`: report.html, built from the files of a folder (where they are: :mod:`.report.locate` only).
"""

from .folder import NA, OutputFolder, dumps_json, format_tsv

__all__ = ["NA", "OutputFolder", "dumps_json", "format_tsv"]
