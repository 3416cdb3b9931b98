"""The HTML report of a finished run: one self-contained file (``<out>/report.html``) with a study
summary, one section per (cohort, analysis) with its figures and tables, the pooled results, the
cautions, and a provenance appendix. It reads only the study-level tables and the spec, draws
the figures into ``<out>/figures/`` and inlines them (SVG as data URIs); a
Content-Security-Policy forbids every fetch.

Layout: ``rows`` prepares what the tables show (pure functions of data frames), ``html`` the
views and the Jinja2 environment (autoescape on), ``sections`` one method per section,
``page`` the page and the entry points; ``templates/`` and ``style.css`` ship as package data.
"""

from .html import svg_data_uri
from .page import (
                   FIGURES_DIR,
                   REPORT_NAME,
                   Report,
                   build_report,
                   check_spec_matches,
                   draw_cohort_figures,
                   draw_study_figures,
                   find_spec,
)
from .sections import CAUTION, Builder

__all__ = ["CAUTION", "FIGURES_DIR", "REPORT_NAME", "Builder", "Report", "build_report",
           "check_spec_matches", "draw_cohort_figures", "draw_study_figures", "find_spec", "svg_data_uri"]
