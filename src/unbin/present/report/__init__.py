"""The HTML report of a finished run (see ``sections``)."""

from .sections import (CAUTION, FIGURES_DIR, REPORT_NAME, Builder, Report, build_report,
                       check_spec_matches, draw_cohort_figures, find_spec, svg_data_uri)

__all__ = ["CAUTION", "FIGURES_DIR", "REPORT_NAME", "Builder", "Report", "build_report",
           "check_spec_matches", "draw_cohort_figures", "find_spec", "svg_data_uri"]
