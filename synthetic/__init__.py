"""Synthetic OMOP CDM v5.4 extracts of the fictional Harrowmere Valley Health network.

The generator writes the same files a real system would export (one Parquet file per CDM
table) under ``OUT/extract`` and the ground truth it planted under ``OUT/truth``. It never
imports :mod:`cohort`.

Examples
--------
>>> import tempfile, pathlib
>>> from synthetic import generate_extract
>>> summary = generate_extract(persons=300, seed=7, out=pathlib.Path(tempfile.mkdtemp()), progress=False)
>>> summary.rows_per_table["person"]
300
"""

from synthetic._generate import SynthError, SynthSummary, generate_extract

__all__ = ["SynthError", "SynthSummary", "generate_extract"]
