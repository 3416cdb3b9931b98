"""The HTML report of a finished run: one self-contained file (``<out>/report.html``) with a study
summary, one section per (cohort, analysis) with its figures and tables, the pooled results, the
cautions, and a provenance appendix. It reads only the study-level tables and the spec, draws
the figures into ``<out>/figures/`` and inlines them (SVG as data URIs); a
Content-Security-Policy forbids every fetch.

Layout: ``rows`` prepares what the tables show (pure functions of data frames), ``html`` the
views and the Jinja2 environment (autoescape on), ``sections`` one method per section,
``page`` the page and the entry points, ``drawing`` the figure jobs' entry points;
``templates/`` and ``style.css`` ship as package data.

The names below are imported on first use: a figure job (``draw_cohort_figures``) then loads
neither the sections, which bring the statistics modules, nor the templates.
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from .drawing import FIGURES_DIR, check_spec_matches, draw_cohort_figures, draw_study_figures
    from .html import svg_data_uri
    from .page import REPORT_NAME, Report, build_report, find_spec
    from .sections import CAUTION, Builder

# Each name and the module that defines it.
_HOMES = {"FIGURES_DIR": "drawing", "check_spec_matches": "drawing",
          "draw_cohort_figures": "drawing", "draw_study_figures": "drawing",
          "svg_data_uri": "html",
          "REPORT_NAME": "page", "Report": "page", "build_report": "page", "find_spec": "page",
          "CAUTION": "sections", "Builder": "sections"}

__all__ = ["CAUTION", "FIGURES_DIR", "REPORT_NAME", "Builder", "Report", "build_report",
           "check_spec_matches", "draw_cohort_figures", "draw_study_figures", "find_spec",
           "svg_data_uri"]


def __getattr__(name: str) -> Any:
    home = _HOMES.get(name)
    if home is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    return getattr(import_module(f".{home}", __name__), name)
