"""Ingestion: raw station dumps (several layouts) -> canonical clean Parquet table + QC JSON per city.

Reads data/raw/<city>/... (as the city's format dict in config `data.cities.<city>` describes) and the
station table `data.stations`; writes data/clean/<city>.parquet and data/qc/<city>.json (atomically).
Config keys obeyed: `cities.<city>`, `stations`, `raw_dir`, `clean_dir`, `qc_dir`,
`reference_temperature_c`.

Public API:
    ingest_city(city, fmt, raw_dir, stations, reference_temperature_c=25.0, *, config_file=None)
        -> (clean DataFrame, qc dict)       # reads, never writes
    run_ingest(city, fmt, raw_dir, stations_csv, out_parquet, out_qc, reference_temperature_c=25.0,
               *, config_file=None) -> qc dict   # ingest_city + atomic writes
"""

from pipeline.ingest.core import DROP_REASONS, READERS, ingest_city, raw_files, run_ingest
from pipeline.ingest.formats import LAYOUTS, validate_format

__all__ = ["ingest_city", "raw_files", "run_ingest", "validate_format", "LAYOUTS", "DROP_REASONS", "READERS"]
