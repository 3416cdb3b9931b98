"""The data: reading extracts (``extracts``), checking them against the spec (``checks``) and
the analysis sample (``sample``)."""

from .checks import _type_problems, data_problems, group_problems, grouping_warnings
from .extracts import extract_columns, extract_rows, file_sha256, read_extract
from .sample import MIN_SAMPLE_ROWS, Sample, analysis_sample, coerce_numeric

__all__ = [
    "MIN_SAMPLE_ROWS", "Sample", "_type_problems", "analysis_sample", "coerce_numeric",
    "data_problems", "extract_columns", "extract_rows", "file_sha256", "group_problems",
    "grouping_warnings", "read_extract",
]
