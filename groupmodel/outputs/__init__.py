"""Everything groupmodel writes: atomic output folders, TSV and JSON files, pictures."""

from .folder import NA, OutputFolder, dumps_json, format_tsv

__all__ = ["NA", "OutputFolder", "dumps_json", "format_tsv"]
