"""What a figure job imports: the figures, not the report's sections (which bring the statistics
modules and scipy, about a quarter of a second of CPU in each figure job) nor its templates. A
structural check, not a timing."""

from __future__ import annotations

import subprocess
import sys

NOT_NEEDED = ("unbin.present.report.sections", "unbin.present.report.html", "unbin.models",
              "unbin.refit", "scipy", "jinja2")


def test_figure_entry_points_import_no_report_sections() -> None:
    code = ("from unbin.present import report\n"
            "report.draw_cohort_figures, report.draw_study_figures, report.FIGURES_DIR\n"
            "import unbin.present.figures as F\nF.all_kinds()\n"
            "import sys\nprint(' '.join(m for m in " + repr(NOT_NEEDED) + " if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    assert out.stdout.strip() == "", f"a figure job imports {out.stdout.strip()}"


def test_report_names_resolve_lazily() -> None:
    from unbin.present import report
    from unbin.present.report import drawing, html, page, sections

    assert report.Builder is sections.Builder and report.build_report is page.build_report
    assert report.svg_data_uri is html.svg_data_uri
    assert report.draw_cohort_figures is drawing.draw_cohort_figures is page.draw_cohort_figures
    assert sorted(report.__all__) == sorted(report._HOMES)
    try:
        report.no_such_name  # noqa: B018
    except AttributeError as exc:
        assert "no_such_name" in str(exc)
    else:
        raise AssertionError("an unknown name must raise AttributeError")
