"""Reading extracts (csv, parquet, dta, sas7bdat): the needed columns only, row counts, file
digests."""

from __future__ import annotations

import difflib
import hashlib
from pathlib import Path

import pandas as pd

from ..errors import DataError

READERS = (".csv", ".parquet", ".pq", ".dta", ".sas7bdat")


def file_sha256(path: str | Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def extract_columns(path: Path) -> list[str]:
    """Column names of an extract, read from its header or metadata only."""
    suffix = path.suffix.lower()
    if suffix == ".csv":
        return list(pd.read_csv(path, nrows=0).columns)
    if suffix in (".parquet", ".pq"):
        import pyarrow.parquet as pq

        return list(pq.read_schema(path).names)
    if suffix == ".dta":
        with pd.io.stata.StataReader(path) as rdr:
            return list(rdr.variable_labels())  # keyed by variable name, in file order
    if suffix == ".sas7bdat":
        import pyreadstat

        _, meta = pyreadstat.read_sas7bdat(str(path), metadataonly=True)
        return list(meta.column_names)
    raise DataError(f"extract {path.name!r}: unknown file type {suffix!r}; use one of "
                    f"{', '.join(READERS)}.")


def extract_rows(path: Path) -> int:
    """Row count of an extract (cheap for parquet: read from the footer)."""
    if path.suffix.lower() in (".parquet", ".pq"):
        import pyarrow.parquet as pq

        return int(pq.ParquetFile(path).metadata.num_rows)
    first = extract_columns(path)[:1]
    return len(read_extract(path, first))


def read_extract(path: Path, columns: list[str] | tuple[str, ...]) -> pd.DataFrame:
    """Read only ``columns`` of an extract. Missing columns raise a DataError with suggestions."""
    if not path.is_file():
        raise DataError(f"extract {str(path)!r} does not exist; fix 'cohorts[].path' in the spec "
                        "(relative paths are relative to the spec file).")
    present = extract_columns(path)
    missing = [c for c in columns if c not in present]
    if missing:
        raise DataError("; ".join(missing_column_message(c, present, path) for c in missing))
    cols = list(dict.fromkeys(columns))
    suffix = path.suffix.lower()
    if suffix == ".csv":
        return pd.read_csv(path, usecols=cols, low_memory=False)[cols]
    if suffix in (".parquet", ".pq"):
        import pyarrow.parquet as pq

        return pq.read_table(path, columns=cols).to_pandas()
    if suffix == ".dta":
        return pd.read_stata(path, columns=cols, convert_categoricals=False)
    import pyreadstat

    df, _ = pyreadstat.read_sas7bdat(str(path), usecols=cols)
    return df[cols]


def missing_column_message(col: str, present: list[str], path: Path) -> str:
    close = difflib.get_close_matches(col, present, n=1, cutoff=0.6)
    hint = f" Did you mean {close[0]!r}?" if close else ""
    return (f"column {col!r} is not in extract {path.name!r}.{hint} Its columns are: "
            f"{', '.join(present[:30])}{' ...' if len(present) > 30 else ''}")
