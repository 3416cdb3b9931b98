"""Figures: produced and non-empty for every analysis of the demo, free of timestamps, drawn only
when their question's table has rows; the palette's colour-vision and greyscale properties; the
small drawing helpers."""

from __future__ import annotations

import json
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from matplotlib.figure import Figure
from PIL import Image

from browser.demo import demo_output
from unbin.present.figures import INDEX, STUDY_DIR, Context, draw_figures, load_tables, plan
from unbin.present.figures import style as st
from unbin.present.figures.curves import draw_rug, legacy_steps
from unbin.results.tables import read_table
from unbin.spec import load_spec


@pytest.fixture(scope="session")
def demo(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory) -> Path:
    return demo_output(request, tmp_path_factory)


# --------------------------------------------------------------------------- colour


# Machado, Oliveira & Fernandes (2009), IEEE TVCG 15(6):1291-1298, simulation matrices for
# dichromats (severity 1.0), applied to linear sRGB. Values as published in the authors' table;
# each row sums to 1 so white stays white (checked where they are used: a typo in a copied
# value would break it).
MACHADO = {
    "protan": [[0.152286, 1.052583, -0.204868], [0.114503, 0.786281, 0.099216],
               [-0.003882, -0.048116, 1.051998]],
    "deutan": [[0.367322, 0.860646, -0.227968], [0.280085, 0.672501, 0.047413],
               [-0.011820, 0.042940, 0.968881]],
    "tritan": [[1.255528, -0.076749, -0.178779], [-0.078411, 0.930809, 0.147602],
               [0.004733, 0.691367, 0.303900]],
}


def linear_rgb(hex_colour: str) -> np.ndarray:
    """sRGB to linear light (IEC 61966-2-1)."""
    c = np.array([int(hex_colour[i:i + 2], 16) for i in (1, 3, 5)]) / 255.0
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def lab(lin: np.ndarray) -> np.ndarray:
    """CIE 1976 L*a*b* of a linear sRGB colour, D65 white (sRGB primaries, IEC 61966-2-1)."""
    m = np.array([[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722],
                  [0.0193, 0.1192, 0.9505]])
    t = (m @ np.clip(lin, 0, 1)) / np.array([0.95047, 1.0, 1.08883])
    f = np.where(t > (6 / 29) ** 3, np.cbrt(t), t / (3 * (6 / 29) ** 2) + 4 / 29)
    return np.array([116 * f[1] - 16, 500 * (f[0] - f[1]), 200 * (f[1] - f[2])])


@pytest.mark.parametrize("vision", [None, "protan", "deutan", "tritan"])
def test_series_colours_stay_apart_for_colour_blind_readers(vision: str | None) -> None:
    """Every pair of series colours differs by ΔE*ab >= 20 (CIE 1976; ~2.3 is a just-noticeable
    difference, Sharma 2003) in normal vision and under each simulated dichromacy."""
    colours = st.SERIES
    if vision:  # the copied matrix keeps white white: guards the values, not unbin
        np.testing.assert_allclose(np.sum(MACHADO[vision], axis=1), 1.0, atol=2e-6)
    for a, ca in colours.items():
        for b, cb in colours.items():
            if a >= b:
                continue
            la, lb = linear_rgb(ca), linear_rgb(cb)
            if vision:
                la, lb = np.array(MACHADO[vision]) @ la, np.array(MACHADO[vision]) @ lb
            assert np.linalg.norm(lab(la) - lab(lb)) >= 20, (vision, a, b)


def test_legacy_differs_in_lightness_from_every_continuous_form() -> None:
    """Printed in grey only lightness is left: the legacy colour must differ from each
    continuous form's by at least 15 L* units (common practice: ~10 is clearly visible)."""
    legacy = lab(linear_rgb(st.LEGACY))[0]
    for form in ("spline", "fp", "linear"):
        assert abs(lab(linear_rgb(st.FORM_COLOURS[form]))[0] - legacy) >= 15, form


def test_series_colours_contrast_with_white() -> None:
    """WCAG 2.1 non-text contrast: at least 3:1 against the white page (W3C relative luminance
    and contrast-ratio formulas)."""
    for name, colour in st.SERIES.items():
        y = float(np.array([0.2126, 0.7152, 0.0722]) @ linear_rgb(colour))
        assert 1.05 / (y + 0.05) >= 3.0, name


# --------------------------------------------------------------------------- helpers


def test_ratio_ticks_are_readable_and_inside() -> None:
    ticks = st.ratio_ticks(0.4, 5.0)
    assert 1.0 in ticks and 2.0 in ticks and 0.5 in ticks
    assert all(0.4 <= t <= 5.0 for t in ticks) and 3 <= len(ticks) <= 8
    narrow = st.ratio_ticks(0.97, 1.01)
    assert len(narrow) >= 3 and all(0.97 <= t <= 1.01 for t in narrow)
    assert st.tick_decimals(narrow) >= 2   # 0.97, 0.98, ... need two decimals to stay apart


def test_effect_axis_log_for_ratios_linear_for_differences() -> None:
    fig = Figure()
    ax1, ax2 = fig.subplots(1, 2)
    st.effect_axis(ax1, "hazard ratio", 0.5, 3.0)
    st.effect_axis(ax2, "mean difference", -2.0, 5.0)
    assert ax1.get_yscale() == "log" and ax2.get_yscale() == "linear"
    lo, hi = ax1.get_ylim()
    assert lo < 0.5 and hi > 3.0


def test_legacy_steps_change_at_the_cut() -> None:
    x = np.linspace(40, 100, 61)   # grid step 1; the cut 60.5 lies between 60 and 61
    eff = np.where(x < 60.5, 2.0, 1.0)
    df = pd.DataFrame({"x": x, "effect": eff, "effect_lower": eff * 0.8,
                       "effect_upper": eff * 1.25})
    steps = legacy_steps(df, [60.5])
    assert [(s["x0"], s["x1"], s["effect"]) for s in steps] == [(40.0, 60.5, 2.0),
                                                                (60.5, 100.0, 1.0)]


def test_rug_hides_suppressed_bins() -> None:
    density = pd.DataFrame({"bin_left": [0.0, 1.0, 2.0, 3.0], "bin_right": [1.0, 2.0, 3.0, 4.0],
                            "count": pd.array([25, None, 40, 0], dtype="Int64"),
                            "suppressed": [False, True, False, False]})
    ax = Figure().subplots()
    hidden = draw_rug(ax, density, (0.0, 4.0))
    bars = [(p.get_x(), p.get_height()) for p in ax.patches]
    assert hidden == 1
    assert bars == [(0.0, 25.0), (2.0, 40.0)]   # the suppressed bin and the empty one not drawn


def test_saved_figures_hold_no_date_or_software(tmp_path: Path) -> None:
    with st.styled():
        fig, main = st.new_figure(4, 3, "a footnote")
        main.subplots().plot([0, 1], [1, 2])
    png, svg = st.save(fig, tmp_path / "x")
    text = svg.read_text()
    assert "<dc:date>" not in text and "Matplotlib v" not in text
    with Image.open(png) as im:
        info = dict(im.info)
    assert not {"Software", "Creation Time", "date:create"} & set(info)


# --------------------------------------------------------------------------- the demo


def _index(demo: Path) -> list[dict[str, str]]:
    records = []
    for path in sorted((demo / "figures").glob(f"*/{INDEX}")):
        records += json.loads(path.read_text())
    return records


@pytest.mark.workflow
def test_every_analysis_has_non_empty_figures(demo: Path) -> None:
    status = read_table(demo / "tables" / "status.parquet")
    records = _index(demo)
    assert records, "no figure index was written"
    for r in status[status["status"] == "ok"].itertuples():
        mine = [x for x in records if x["cohort"] == r.cohort and x["analysis"] == r.analysis]
        kinds = {x["kind"] for x in mine}
        assert "curves" in kinds, (r.cohort, r.analysis)
        for x in mine:
            png, svg = demo / "figures" / x["png"], demo / "figures" / x["svg"]
            assert x["alt"].strip() and x["title"].strip()
            with Image.open(png) as im:
                im.load()
                assert im.width > 300 and im.height > 200
                grey = np.asarray(im.convert("L"), dtype=float)
                assert grey.std() > 5, f"{png} looks blank"
            root = ET.parse(svg).getroot()
            assert root.tag.endswith("svg") and len(list(root.iter())) > 50
    study = {x["kind"] for x in records if x["cohort"] is None}
    assert "information" in study
    assert (demo / "figures" / STUDY_DIR / "information.png").stat().st_size > 0


@pytest.mark.workflow
def test_question_figures_follow_their_tables(demo: Path) -> None:
    """A question's figure exists exactly when its table has rows for the analysis: the
    cut-search profile only where a cut was chosen from the data, the range figure everywhere
    (its table has rows for every analysis), none once the table is gone."""
    ctx = Context(load_tables(demo / "tables"), load_spec(demo / "spec.yaml"))
    drawn = {(x["kind"], x["cohort"], x["analysis"]) for x in _index(demo)}
    cut = ctx.table("cutpoints")
    derived = set(zip(cut.loc[cut["row_type"] == "profile", "cohort"],
                      cut.loc[cut["row_type"] == "profile", "analysis"], strict=True))
    assert derived, "the demo has a cut chosen from the data"
    for cohort, analysis in ctx.jobs():
        has_profile = (cohort, analysis) in derived
        assert (("cut-profile", cohort, analysis) in drawn) == has_profile
        assert ("ranges", cohort, analysis) in drawn
    ctx2 = Context({k: v for k, v in ctx.tables.items() if k != "ranges"}, ctx.spec)
    assert not any(k.name == "ranges" for k, _, _ in plan(ctx2, None, True))


@pytest.mark.workflow
def test_figures_redraw_to_the_same_bytes(demo: Path, tmp_path: Path) -> None:
    """The workflow's figures and a fresh drawing from the same tables are byte-identical."""
    ctx = Context(load_tables(demo / "tables"), load_spec(demo / "spec.yaml"))
    first = ctx.spec.cohorts[0].name
    figs = draw_figures(ctx, tmp_path, cohorts=[first], study=False)
    assert figs
    for f in figs:
        rel = f.png.relative_to(tmp_path)
        assert f.png.read_bytes() == (demo / "figures" / rel).read_bytes(), rel
        assert f.svg.read_bytes() == (demo / "figures" / rel.with_suffix(".svg")).read_bytes()
