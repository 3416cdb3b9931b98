"""The HTML report: written by the workflow as its last step, self-contained (no fetch of any
kind), accessible (alt texts, real tables), deterministic and rebuilt byte for byte by
``unbin report``; it opens in headless Chromium without console errors and every image decodes.
Also the terminal's job tracking read from Snakemake's log."""

from __future__ import annotations

import hashlib
import os
import re
import shutil
import subprocess
import sys
import tempfile
from html.parser import HTMLParser
from pathlib import Path

import pytest
import yaml

from browser.cdp import IMAGES_JS, Chromium, install_chromium, open_report
from browser.demo import demo_output
from unbin.pipeline.runner import JobTracker
from unbin.present.figures import Context, load_tables
from unbin.present.report import Builder
from unbin.results.tables import read_provenance
from unbin.spec import load_spec


@pytest.fixture(scope="session")
def demo(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory) -> Path:
    return demo_output(request, tmp_path_factory)


class Page(HTMLParser):
    """Every start tag with its attributes, and the text inside <caption> and <th>."""

    def __init__(self, text: str) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.open: list[str] = []
        self.feed(text)

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, dict(attrs)))

    def all(self, tag: str) -> list[dict[str, str | None]]:
        return [a for t, a in self.tags if t == tag]


def cli(*args: str, env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "unbin.cli", *args], capture_output=True,
                          text=True, timeout=600, env={**os.environ, **(env or {})})


# --------------------------------------------------------------------------- the demo's report


@pytest.mark.workflow
def test_workflow_writes_a_self_contained_report(demo: Path) -> None:
    text = (demo / "report.html").read_text(encoding="utf-8")
    page = Page(text)
    # Nothing is fetched: every image is inline, links only jump inside the page, and the
    # Content-Security-Policy forbids every other request.
    csp = [a for a in page.all("meta") if a.get("http-equiv") == "Content-Security-Policy"]
    assert csp and "default-src 'none'" in str(csp[0]["content"])
    for tag, attrs in page.tags:
        for key in ("src", "href", "srcset", "data", "action"):
            value = attrs.get(key)
            if value is None:
                continue
            assert value.startswith(("data:image/svg+xml;charset=utf-8,", "#")), (tag, key,
                                                                               value[:60])
    assert not page.all("script") and not page.all("link")
    images = page.all("img")
    assert images
    assert all((a.get("alt") or "").strip() for a in images), "an image without alt text"
    # Real tables: a caption and column headers with scope.
    assert page.all("table") and len(page.all("caption")) == len(page.all("table"))
    assert all(a.get("scope") == "col" for a in page.all("th"))
    # No date or clock time anywhere (README: no timestamps in results), the inline figures
    # included (their SVG carries no date either).
    assert "<dc:date>" not in text
    assert not re.search(r"\b(19|20)\d\d-[01]\d-[0-3]\d\b", text), "a date in the report"
    assert not re.search(r"\b[0-2]\d:[0-5]\d:[0-5]\d\b", text), "a clock time in the report"


@pytest.mark.workflow
def test_report_has_a_section_per_analysis_and_the_provenance(demo: Path) -> None:
    spec = load_spec(demo / "spec.yaml")
    page = Page((demo / "report.html").read_text(encoding="utf-8"))
    ids = {a.get("id") for t, a in page.tags if t == "section"}
    for c in spec.cohorts:
        for a in spec.analyses:
            assert f"a-{c.name}-{a.name}" in ids
    assert {"summary", "cautions", "provenance"} <= ids
    text = (demo / "report.html").read_text(encoding="utf-8")
    prov = read_provenance(demo / "tables" / "status.parquet")
    assert prov["spec_digest"] in text
    for c in spec.cohorts:
        # The input's hash as computed here, outside unbin, must be the one the report shows.
        assert hashlib.sha256(c.path.read_bytes()).hexdigest() in text
    for table in sorted((demo / "tables").glob("*.parquet")):
        assert hashlib.sha256(table.read_bytes()).hexdigest() in text, table.name
    assert "Decisions about the care of patients" in text


@pytest.mark.workflow
def test_unbin_report_rebuilds_the_same_bytes(demo: Path, tmp_path: Path) -> None:
    """`unbin report` on a copy of the run's tables and spec gives the workflow's bytes, for the
    report and for every figure; --quiet prints nothing."""
    shutil.copytree(demo / "tables", tmp_path / "tables")
    shutil.copytree(demo / "data", tmp_path / "data")
    shutil.copy(demo / "spec.yaml", tmp_path / "spec.yaml")
    proc = cli("report", str(tmp_path), "--quiet")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert proc.stdout == ""
    assert (tmp_path / "report.html").read_bytes() == (demo / "report.html").read_bytes()
    def files(root: Path) -> list[Path]:
        # Snakemake marks a directory output with a hidden timestamp file of its own.
        return sorted(p.relative_to(root) for p in (root / "figures").rglob("*")
                      if p.is_file() and not p.name.startswith(".snakemake"))

    mine, theirs = files(tmp_path), files(demo)
    assert mine == theirs
    for rel in mine:
        assert (tmp_path / rel).read_bytes() == (demo / rel).read_bytes(), rel


@pytest.mark.workflow
def test_unbin_report_refuses_another_spec(demo: Path, tmp_path: Path) -> None:
    raw = yaml.safe_load((demo / "spec.yaml").read_text())
    raw["seed"] = int(raw["seed"]) + 1
    shutil.copytree(demo / "data", tmp_path / "data")
    (tmp_path / "other.yaml").write_text(yaml.safe_dump(raw))
    proc = cli("report", str(demo), "--spec", str(tmp_path / "other.yaml"))
    assert proc.returncode == 2
    assert "not the one the tables" in proc.stdout + proc.stderr


@pytest.mark.workflow
def test_a_failed_analysis_is_reported_not_fatal(demo: Path) -> None:
    """The page still builds when an analysis failed: its section says so and the cautions
    carry its message (tables edited here to what a failure writes: a status row, no results)."""
    spec = load_spec(demo / "spec.yaml")
    tables = load_tables(demo / "tables")
    cohort, analysis = spec.cohorts[0].name, spec.analyses[1].name
    for name, df in tables.items():
        if name != "status" and "analysis" in df and "cohort" in df:
            tables[name] = df[~((df["cohort"] == cohort) & (df["analysis"] == analysis))]
    st = tables["status"].copy()
    hit = (st["cohort"] == cohort) & (st["analysis"] == analysis)
    st.loc[hit, "status"] = "failed"
    st.loc[hit, "message"] = "only 3 rows are left after filters"
    tables["status"] = st
    html = Builder(Context(tables, spec), [], demo).page()
    section = html.split(f'id="a-{cohort}-{analysis}"')[1].split("</section>")[0]
    assert "failed" in section and "only 3 rows are left" in section
    cautions = html.split('id="cautions"')[1].split("</section>")[0]
    assert "only 3 rows are left after filters" in cautions


# --------------------------------------------------------------------------- in a browser


@pytest.fixture(scope="session")
def chromium() -> str:
    path, how = install_chromium()
    if path is None:
        pytest.skip("CHROMIUM IS MISSING AND COULD NOT BE INSTALLED: the report was NOT opened in "
                    f"a browser ({how}). Install Debian's chromium package to run this check.")
    return path


@pytest.mark.workflow
def test_report_opens_in_chromium(demo: Path, chromium: str, tmp_path: Path) -> None:
    with tempfile.TemporaryDirectory() as profile, Chromium(chromium, Path(profile)) as browser:
        page = open_report(browser, demo / "report.html")
        images = page.evaluate(IMAGES_JS)
        assert page.evaluate("document.title").endswith("unbin report")
        shot = tmp_path / "report.png"
        page.screenshot(shot, 1366, 900)
        errors = page.errors()
        requests = page.requests()
    assert errors == [], errors
    assert all(u.startswith(("file:", "data:")) for u in requests), requests
    n_img = len(Page((demo / "report.html").read_text(encoding="utf-8")).all("img"))
    assert len(images) == n_img > 0
    bad = [i for i in images if i["width"] <= 0 or i["height"] <= 0]
    assert not bad, bad
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and shot.stat().st_size > 20_000
    keep = os.environ.get("UNBIN_SCREENSHOTS")
    if keep:
        Path(keep).mkdir(parents=True, exist_ok=True)
        shutil.copy(shot, Path(keep) / "report.png")


LAYOUT_JS = """
(() => {
  document.querySelectorAll('details').forEach(d => { d.open = true; });
  const width = document.documentElement.clientWidth;
  const overflow = [];
  for (const el of document.body.querySelectorAll('*')) {
    if (el.closest('.scroll, pre')) continue;          // wide tables scroll inside their box
    const r = el.getBoundingClientRect();
    if (r.width > 0 && (r.right > width + 0.5 || r.left < -0.5)) {
      overflow.push(`${el.tagName}.${el.className} ${Math.round(r.left)}-${Math.round(r.right)}`);
    }
  }
  document.querySelectorAll('pre').forEach(p => p.remove());   // the spec as the user wrote it
  return {width, scrollWidth: document.documentElement.scrollWidth, overflow,
          text: document.body.innerText};
})()
"""

# Codes of the tables' cells that are internal names too (the column names come from the tables).
INTERNAL_CODES = ("common_spline", "test_spline", "legacy+test_spline", "per_unit")


@pytest.mark.workflow
def test_report_fits_1280_px_and_shows_no_internal_name(demo: Path, chromium: str,
                                                        tmp_path: Path) -> None:
    """At 1,280 px nothing sticks out of the page except inside the scroll boxes wide tables
    live in, and no internal column name of any study-level table (the ones with an underscore:
    the others are plain words) appears in the visible text, every fold opened."""
    import pandas as pd

    report = demo / "report.html"
    # Under 3 MB for the demo's 3 cohorts x 5 analyses with every figure inlined (README).
    assert report.stat().st_size < 3_000_000, report.stat().st_size
    names = {c for p in (demo / "tables").glob("*.parquet")
             for c in pd.read_parquet(p).columns if "_" in c} | set(INTERNAL_CODES)
    assert {"q_df", "cut_rank", "lr_test_spline"} <= names
    with tempfile.TemporaryDirectory() as profile, Chromium(chromium, Path(profile)) as browser:
        page = open_report(browser, report)
        page.call("Emulation.setDeviceMetricsOverride", width=1280, height=900,
                  deviceScaleFactor=1, mobile=False)
        got = page.evaluate(LAYOUT_JS)
        page.screenshot(tmp_path / "report-1280.png", 1280, 900)
    assert got["width"] == 1280 and got["scrollWidth"] <= 1280, got["scrollWidth"]
    assert got["overflow"] == [], got["overflow"][:10]
    visible = got["text"]
    assert "Study summary" in visible and len(visible) > 10_000
    raw = sorted(n for n in names
                 if re.search(rf"(?<![\w.+]){re.escape(n)}(?![\w.+])", visible))
    assert raw == [], raw
    keep = os.environ.get("UNBIN_SCREENSHOTS")
    if keep:
        Path(keep).mkdir(parents=True, exist_ok=True)
        shutil.copy(tmp_path / "report-1280.png", Path(keep) / "report-1280.png")


# --------------------------------------------------------------------------- the terminal


SNAKEMAKE_LOG = """\
Job stats:
job               count
--------------  -------
fit_analysis          2
collect_tables        1
build_report          1
all                   1
total                 5

[Wed Dec  2 12:05:06 2026]
localrule fit_analysis:
    output: work/north/a1/fits.parquet
    jobid: 3
    wildcards: cohort=north, analysis=a1
[Wed Dec  2 12:05:06 2026]
localrule fit_analysis:
    jobid: 4
    wildcards: cohort=north, analysis=a2
[Wed Dec  2 12:05:09 2026]
Finished jobid: 3 (Rule: fit_analysis)
1 of 5 steps (20%) done
[Wed Dec  2 12:05:11 2026]
Finished jobid: 4 (Rule: fit_analysis)
2 of 5 steps (40%) done
localrule collect_tables:
    jobid: 2
Finished jobid: 2 (Rule: collect_tables)
3 of 5 steps (60%) done
localrule build_report:
    jobid: 1
"""


def test_job_tracker_follows_the_log() -> None:
    t = JobTracker()
    seen = []
    for line in SNAKEMAKE_LOG.splitlines(keepends=True):
        if t.feed(line):
            seen.append((t.done, t.total, t.current()))
    assert seen[0] == (0, 5, "")                                   # total known before any job
    assert (0, 5, "north/a1, north/a2") in seen                    # both fits running
    assert (1, 5, "north/a2") in seen                              # one finished
    assert (3, 5, "") in seen
    assert seen[-1] == (3, 5, "drawing the figures and the report")


def test_summary_respects_no_color(demo_tables_only: Path) -> None:
    forced = cli("summary", str(demo_tables_only), env={"FORCE_COLOR": "1", "NO_COLOR": ""})
    plain = cli("summary", str(demo_tables_only), env={"FORCE_COLOR": "1", "NO_COLOR": "1"})
    assert forced.returncode == plain.returncode == 0
    colour = ("\x1b[31m", "\x1b[32m", "\x1b[33m", "\x1b[34m", "\x1b[35m", "\x1b[36m", "\x1b[38")
    assert not any(c in plain.stdout for c in colour), plain.stdout[:200]


@pytest.fixture
def demo_tables_only(demo: Path, tmp_path: Path) -> Path:
    shutil.copytree(demo / "tables", tmp_path / "tables")
    return tmp_path

