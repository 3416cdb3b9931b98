"""The spec: its data model (``model``), loading with schema validation and messages
(``load``), and the checks the schema cannot express (``checks``).

A spec is YAML, loaded with ``yaml.safe_load`` and validated against the JSON schema shipped in
``unbin/workflow/schemas/spec.schema.json`` (the same file the Snakefile uses). Nothing in a spec
is ever evaluated as code: filters are structured (variable, min, max, in).
"""

from .checks import semantic_problems
from .load import (
    MAX_SPEC_DEPTH,
    MAX_SPEC_NODES,
    VALIDATED_ENV,
    load_spec,
    named_paths,
    parse_spec,
    read_yaml,
    schema_problems,
    spec_schema,
    validated_spec,
    yaml_message,
)
from .model import (
    DEFAULT_KNOTS,
    DEFAULT_SEED,
    FORMS,
    OPTIONAL_OUTCOME_FIELDS,
    OUTCOME_FIELDS,
    Analysis,
    Cohort,
    ContinuousOptions,
    CutpointSearch,
    Filter,
    Grouping,
    OutcomeSpec,
    Reported,
    Resampling,
    Spec,
    VariableInfo,
    Weighting,
    canonical_json,
    default_labels,
    digest,
)

__all__ = [
    "DEFAULT_KNOTS", "DEFAULT_SEED", "FORMS", "MAX_SPEC_DEPTH", "MAX_SPEC_NODES",
    "OPTIONAL_OUTCOME_FIELDS", "OUTCOME_FIELDS", "Analysis", "Cohort", "ContinuousOptions",
    "CutpointSearch", "Filter", "Grouping", "OutcomeSpec", "Reported", "Resampling", "Spec",
    "VALIDATED_ENV", "VariableInfo", "Weighting", "canonical_json", "default_labels", "digest",
    "load_spec", "named_paths", "parse_spec", "read_yaml", "schema_problems", "semantic_problems",
    "spec_schema", "validated_spec", "yaml_message",
]
