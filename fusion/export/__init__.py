"""Exports of fused magnitudes and of a model version's station and pair tables.

=================== ===================== ============================================
what                formats               function
=================== ===================== ============================================
network magnitudes  csv, parquet, quakeml :func:`export_magnitudes` (from the store),
                                          :func:`write_magnitudes` (from frames)
stations, pairs,    csv, parquet          :func:`export_model_table`
epochs tables
=================== ===================== ============================================

Conventions shared by every export:

- **Advisory.** Every export writes a README sidecar ``<file>.README.txt`` with the advisory
  caution (:data:`fusion.advisory.ADVISORY`), the format's conventions, provenance (model
  versions, export time, magfuse version) and every column with its unit
  (:mod:`fusion.export.sidecar`). Plain CSV has no place for it (a comment line would break
  CSV readers), so the sidecar is the rule for all formats; Parquet also carries the caution in
  its key-value metadata (``magfuse.advisory``) and QuakeML as the first ``eventParameters``
  comment.
- **Declared columns.** Column names, types, units and descriptions are declared once
  (:data:`~fusion.export.magnitudes.MAGNITUDE_COLUMNS`,
  :data:`~fusion.export.model_tables.MODEL_TABLE_COLUMNS`); Parquet fields carry ``unit`` and
  ``doc`` metadata.
- **Crash safety.** Files are written under a temporary name, synced and renamed, as in the
  store: an interrupted export leaves the old file or the complete new one.
- **Missing values** are empty CSV fields or Parquet nulls; times are UTC (ISO 8601 in CSV);
  confidence levels are fractions, except QuakeML's ``confidenceLevel``, which is percent by
  the standard.

Examples
--------
>>> import tempfile
>>> from pathlib import Path
>>> from fusion.versions.fused_store import FusedStore
>>> root = Path(tempfile.mkdtemp())
>>> report = export_magnitudes(FusedStore(root), "ML", root / "ml.csv")
>>> (report.rows, Path(report.readme).name)
(0, 'ml.csv.README.txt')
"""

from fusion.export.formats import ExportFormat, ExportReport
from fusion.export.magnitudes import (
    MAGNITUDE_COLUMNS,
    export_magnitudes,
    magnitude_table,
    write_magnitudes,
)
from fusion.export.model_tables import MODEL_TABLE_COLUMNS, export_model_table, model_table
from fusion.export.quakeml import build_catalog, write_quakeml
from fusion.export.sidecar import readme_path

__all__ = [
    "MAGNITUDE_COLUMNS",
    "MODEL_TABLE_COLUMNS",
    "ExportFormat",
    "ExportReport",
    "build_catalog",
    "export_magnitudes",
    "export_model_table",
    "magnitude_table",
    "model_table",
    "readme_path",
    "write_magnitudes",
    "write_quakeml",
]
