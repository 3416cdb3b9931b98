"""The data: reading extracts (``extracts``), checking them against the spec (``checks``) and
the analysis sample (``sample``)."""

from .checks import (
    _type_problems,
    data_problems,
    group_problems,
    grouping_warnings,
)
from .extracts import (
    READERS,
    extract_columns,
    extract_rows,
    file_sha256,
    missing_column_message,
    read_extract,
)
from .sample import Sample, analysis_sample, coerce_numeric

__all__ = [
    "READERS", "Sample", "_type_problems", "analysis_sample",
    "coerce_numeric", "data_problems", "extract_columns", "extract_rows", "file_sha256",
    "group_problems", "grouping_warnings", "missing_column_message",
    "read_extract",
]
