"""Reading extracts (csv and csv.gz in any common dialect, parquet, dta, sav, sas7bdat): the
needed columns only, row counts, file digests, value labels.

CSV files are read by pyarrow's multithreaded block reader. Their dialect (delimiter, decimal
mark, encoding) is detected from the first 64 KiB unless the cohort's ``csv`` block in the spec
sets it; a value set in the spec always wins over detection."""

from __future__ import annotations

import codecs
import csv
import difflib
import gzip
import hashlib
import io
import re
from collections import Counter
from pathlib import Path
from typing import Any

import pandas as pd

from ..errors import DataError
from ..spec.model import CsvDialect

READERS = (".csv", ".csv.gz", ".parquet", ".pq", ".dta", ".sav", ".sas7bdat")
DELIMITERS = (",", ";", "\t", "|")
SNIFF_BYTES = 1 << 16
_DELIMITER_NAMES = {",": "comma", ";": "semicolon", "\t": "tab", "|": "vertical bar"}
_DECIMAL_COMMA = re.compile(r"^[+-]?\d+,\d+$")
_DECIMAL_POINT = re.compile(r"^[+-]?\d*\.\d+$")


def file_sha256(path: str | Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def file_kind(path: Path) -> str:
    """The reader an extract needs, from its name: '.csv' also for '.csv.gz'."""
    name = path.name.lower()
    if name.endswith(".csv.gz"):
        return ".csv"
    suffix = path.suffix.lower()
    if suffix in READERS:
        return ".parquet" if suffix == ".pq" else suffix
    raise DataError(f"extract {path.name!r}: unknown file type {suffix!r}; use one of "
                    f"{', '.join(READERS)}.")


def _head_bytes(path: Path) -> bytes:
    if path.name.lower().endswith(".gz"):
        try:
            with gzip.open(path, "rb") as fh:
                return fh.read(SNIFF_BYTES)
        except (OSError, EOFError) as exc:
            raise DataError(f"extract {path.name!r} is not a readable gzip file ({exc}); "
                            "compress it with gzip or give the plain .csv.") from None
    with open(path, "rb") as fh:
        return fh.read(SNIFF_BYTES)


def _detect_encoding(head: bytes) -> str:
    """A byte-order mark decides; else UTF-8 when the bytes decode as UTF-8 (a multi-byte
    character cut at the end of the sample is allowed); else Windows-1252, the usual export of
    spreadsheet programs in western Europe (latin-1 when a byte is undefined in it)."""
    if head.startswith(codecs.BOM_UTF8):
        return "utf-8-sig"
    if head.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        return "utf-16"
    try:
        codecs.getincrementaldecoder("utf-8")().decode(head, final=False)
        return "utf-8"
    except UnicodeDecodeError:
        pass
    try:
        head.decode("cp1252")
        return "cp1252"
    except UnicodeDecodeError:
        return "latin-1"


def _sample_lines(text: str, complete: bool) -> list[str]:
    lines = text.splitlines()
    if not complete and len(lines) > 1:
        lines = lines[:-1]  # the last line of a sample may be cut
    return [ln for ln in lines[:200] if ln.strip()]


def _detect_delimiter(lines: list[str]) -> str:
    """The candidate that splits every sampled line (quotes respected) into the same number of
    fields, more than one; among those the one giving most fields; a comma when none does."""
    best: tuple[int, int, str] | None = None
    for d in DELIMITERS:
        counts = [len(row) for row in csv.reader(lines, delimiter=d)]
        if not counts:
            continue
        mode, freq = Counter(counts).most_common(1)[0]
        if mode < 2:
            continue
        score = (freq, mode, d)
        if best is None or score[:2] > best[:2]:
            best = score
    return best[2] if best else ","


def _detect_decimal(lines: list[str], delimiter: str) -> str:
    """A comma when the delimiter is not a comma and the sampled fields hold numbers written
    with a decimal comma (``3,25``) and none with a decimal point."""
    if delimiter == ",":
        return "."
    comma = point = 0
    for row in csv.reader(lines[1:], delimiter=delimiter):
        for field in row:
            f = field.strip()
            comma += bool(_DECIMAL_COMMA.match(f))
            point += bool(_DECIMAL_POINT.match(f))
    return "," if comma and not point else "."


def csv_dialect(path: Path, given: CsvDialect | None = None) -> CsvDialect:
    """The dialect of a CSV extract: what ``given`` sets, the rest detected from the file."""
    given = given or CsvDialect()
    head = _head_bytes(path)
    encoding = given.encoding or _detect_encoding(head)
    try:
        text = codecs.getincrementaldecoder(encoding)().decode(head, final=False)
    except (UnicodeDecodeError, LookupError) as exc:
        raise DataError(f"extract {path.name!r} cannot be decoded as {encoding!r} ({exc}); set "
                        "the cohort's csv.encoding in the spec to the file's encoding (for "
                        "example utf-8, cp1252, latin-1).") from None
    lines = _sample_lines(text.lstrip("\ufeff"), complete=len(head) < SNIFF_BYTES)
    delimiter = given.delimiter or _detect_delimiter(lines)
    decimal = given.decimal or _detect_decimal(lines, delimiter)
    return CsvDialect(delimiter, decimal, encoding, given.date_format)


def _csv_header(path: Path, dialect: CsvDialect) -> list[str]:
    head = _head_bytes(path)
    assert dialect.encoding is not None and dialect.delimiter is not None
    text = codecs.getincrementaldecoder(dialect.encoding)().decode(head, final=False)
    first = next(csv.reader(io.StringIO(text.lstrip("\ufeff")), delimiter=dialect.delimiter), [])
    return list(first)


def extract_columns(path: Path, dialect: CsvDialect | None = None) -> list[str]:
    """Column names of an extract, read from its header or metadata only."""
    kind = file_kind(path)
    if kind == ".csv":
        return _csv_header(path, csv_dialect(path, dialect))
    if kind == ".parquet":
        import pyarrow.parquet as pq

        return list(pq.read_schema(path).names)
    if kind == ".dta":
        with pd.io.stata.StataReader(path) as rdr:
            return list(rdr.variable_labels())  # keyed by variable name, in file order
    import pyreadstat

    reader = pyreadstat.read_sav if kind == ".sav" else pyreadstat.read_sas7bdat
    _, meta = reader(str(path), metadataonly=True)
    return list(meta.column_names)


def extract_rows(path: Path, dialect: CsvDialect | None = None) -> int:
    """Row count of an extract (cheap for parquet: read from the footer)."""
    if file_kind(path) == ".parquet":
        import pyarrow.parquet as pq

        return int(pq.ParquetFile(path).metadata.num_rows)
    first = extract_columns(path, dialect)[:1]
    return len(read_extract(path, first, dialect))


def _read_csv(path: Path, cols: list[str], dialect: CsvDialect) -> pd.DataFrame:
    import pyarrow as pa
    import pyarrow.csv as pacsv

    assert dialect.delimiter is not None and dialect.decimal is not None
    header = _csv_header(path, dialect)
    # pyarrow infers each column's type from the first block; a later value that does not fit
    # (a decimal in a column of whole numbers, text in a date column) is read again wider:
    # whole numbers as floats, anything else as text (then checked like any text column).
    types: dict[str, Any] = {}
    for _ in range(len(cols) + 1):
        try:
            table = pacsv.read_csv(
                path,
                read_options=pacsv.ReadOptions(encoding=dialect.encoding or "utf-8"),
                parse_options=pacsv.ParseOptions(delimiter=dialect.delimiter),
                convert_options=pacsv.ConvertOptions(include_columns=cols, column_types=types,
                                                     decimal_point=dialect.decimal,
                                                     strings_can_be_null=True),
            )
            break
        except (pa.ArrowInvalid, UnicodeDecodeError) as exc:
            m = re.search(r"CSV column #(\d+).*conversion error to (\w+)", str(exc))
            name = header[int(m.group(1))] if m and int(m.group(1)) < len(header) else None
            if name is None or types.get(name) == pa.string():
                raise DataError(f"extract {path.name!r} cannot be read as CSV with delimiter "
                                f"{dialect.delimiter!r}, decimal mark {dialect.decimal!r} and "
                                f"encoding {dialect.encoding!r}: {str(exc).splitlines()[0]}; set "
                                "the cohort's csv block in the spec (delimiter, decimal, "
                                "encoding) to match the file.") from None
            assert m is not None
            wider = m.group(2) == "int64" and name not in types
            types[name] = pa.float64() if wider else pa.string()
    df = table.to_pandas(date_as_object=False)[cols]
    df.attrs["csv_dialect"] = dialect
    return df


def read_extract(path: Path, columns: list[str] | tuple[str, ...],
                 dialect: CsvDialect | None = None) -> pd.DataFrame:
    """Read only ``columns`` of an extract. Missing columns raise a DataError with suggestions.

    Value labels (SPSS, Stata) of the columns read are kept, as codes, in
    ``frame.attrs["value_labels"]`` ({column: {code: label}}); the analysis sample turns the
    categorical ones into labelled factors."""
    if not path.is_file():
        raise DataError(f"extract {str(path)!r} does not exist; fix 'cohorts[].path' in the spec "
                        "(relative paths are relative to the spec file).")
    kind = file_kind(path)
    if kind == ".csv":
        dialect = csv_dialect(path, dialect)
    present = extract_columns(path, dialect)
    missing = [c for c in columns if c not in present]
    if missing:
        raise DataError("; ".join(missing_column_message(c, present, path) for c in missing))
    cols = list(dict.fromkeys(columns))
    labels: dict[str, dict[Any, str]] = {}
    if kind == ".csv":
        assert dialect is not None
        return _read_csv(path, cols, dialect)
    if kind == ".parquet":
        df = _read_parquet(path, cols)
    elif kind == ".dta":
        import pyreadstat

        df = pd.read_stata(path, columns=cols, convert_categoricals=False)
        _, meta = pyreadstat.read_dta(str(path), metadataonly=True)
        labels = {c: dict(v) for c, v in meta.variable_value_labels.items() if c in cols}
    else:
        import pyreadstat

        reader = pyreadstat.read_sav if kind == ".sav" else pyreadstat.read_sas7bdat
        df, meta = reader(str(path), usecols=cols, dates_as_pandas_datetime=True)
        labels = {c: dict(v) for c, v in (meta.variable_value_labels or {}).items() if c in cols}
        df = df[cols]
    df.attrs["value_labels"] = labels
    return df


def _plain_numeric_columns(pf: Any, cols: list[str]) -> set[str]:
    """The columns of a parquet file that ``to_pandas`` would give as a plain numpy integer or
    float column (or float64 for integers with missing values): integer and float32/64 arrow
    types that the file's pandas metadata, if any, records with the same numpy type (not a
    nullable ``Int64``, a categorical, ...). None when the metadata records an index other than
    the default 0..n-1 (``to_pandas`` would restore it)."""
    import json

    import numpy as np
    import pyarrow as pa

    meta = (pf.schema_arrow.metadata or {}).get(b"pandas")
    recorded: dict[str, str] = {}
    if meta is not None:
        pandas_meta = json.loads(meta)
        for ix in pandas_meta.get("index_columns", []):
            if not (isinstance(ix, dict) and ix.get("kind") == "range" and ix.get("start") == 0
                    and ix.get("step") == 1):
                return set()
        recorded = {str(c.get("name")): str(c.get("numpy_type"))
                    for c in pandas_meta.get("columns", [])}
    plain = set()
    names = pf.schema_arrow.names
    for c in cols:
        if names.count(c) != 1:
            continue
        t = pf.schema_arrow.field(c).type
        if not (pa.types.is_integer(t) or pa.types.is_float32(t) or pa.types.is_float64(t)):
            continue
        if meta is not None and recorded.get(c) != np.dtype(t.to_pandas_dtype()).name:
            continue
        plain.add(c)
    return plain


def _read_parquet(path: Path, cols: list[str]) -> pd.DataFrame:
    """``cols`` of a parquet file as ``pyarrow``'s ``read_table(...).to_pandas()`` gives them
    (values, types, missing values, row order), with less memory: the plain numeric columns
    (:func:`_plain_numeric_columns`) are copied row group by row group into numpy arrays of the
    whole length, which the frame takes without a copy, so neither the whole arrow table nor a
    second, consolidated copy of the rows is ever held. Other columns (text, dates, booleans,
    categoricals, nullable integers) go through ``to_pandas``."""
    import numpy as np
    import pyarrow.parquet as pq

    pf = pq.ParquetFile(path)
    plain = _plain_numeric_columns(pf, cols)
    others = [c for c in cols if c not in plain]
    if not plain:
        return pq.read_table(path, columns=cols).to_pandas()
    n = pf.metadata.num_rows
    arrays = {c: np.empty(n, dtype=pf.schema_arrow.field(c).type.to_pandas_dtype())
              for c in plain}
    at = 0
    for i in range(pf.metadata.num_row_groups):
        part = pf.read_row_group(i, columns=sorted(plain))
        rows = part.num_rows
        for c in plain:
            col = part.column(c)
            if col.null_count and arrays[c].dtype.kind in "iu":  # to_pandas: float64, NaN
                arrays[c] = arrays[c].astype(np.float64)
            arrays[c][at:at + rows] = col.to_numpy()
        at += rows
        del part
    assert at == n, (at, n)
    columns: dict[str, Any] = dict(arrays)
    if others:
        rest = pq.read_table(path, columns=others).to_pandas()
        columns.update({c: rest[c] for c in others})
    # a dict of arrays and series: the frame uses them as they are (one block each)
    return pd.DataFrame({c: columns[c] for c in cols}, copy=False)


def joined_header_hint(present: list[str]) -> str:
    """When the header was read as one column that holds another delimiter, name it."""
    if len(present) != 1:
        return ""
    counts = {d: present[0].count(d) for d in DELIMITERS}
    d, n = max(counts.items(), key=lambda kv: kv[1])
    if n == 0:
        return ""
    return (f". The whole header was read as one column: the file looks "
            f"{_DELIMITER_NAMES[d]}-separated; set the cohort's csv.delimiter: {d!r} in the spec "
            "(or remove csv.delimiter to detect it).")


def missing_column_message(col: str, present: list[str], path: Path) -> str:
    close = difflib.get_close_matches(col, present, n=1, cutoff=0.6)
    hint = f" Did you mean {close[0]!r}?" if close else ""
    return (f"column {col!r} is not in extract {path.name!r}.{hint} Its columns are: "
            f"{', '.join(present[:30])}{' ...' if len(present) > 30 else ''}"
            f"{joined_header_hint(present)}")
