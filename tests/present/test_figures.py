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
from unbin.present.figures import confounding as cf
from unbin.present.figures import curves as cv
from unbin.present.figures import cutpoints as cp
from unbin.present.figures import decisions as dc
from unbin.present.figures import information as inf
from unbin.present.figures import levels as lv
from unbin.present.figures import ranges as rg
from unbin.present.figures import style as st
from unbin.present.figures import windows as wn
from unbin.present.figures.curves import draw_rug, legacy_steps
from unbin.results.tables import read_table
from unbin.spec import Spec, load_spec, parse_spec


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
    drawn = [(float(e[0]), float(e[-1]), v.tolist()) for v, e, _ in
             (p.get_data() for p in ax.patches)]
    assert hidden == 1
    assert drawn == [(0.0, 1.0, [25.0]), (2.0, 3.0, [40.0])]   # suppressed and empty bins left out


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


# --------------------------------------------------------------------------- selection, labels, alt
#
# A small invented survival analysis ("a": exposure x in mg, outcome d by time t in years, a
# 5-year horizon), with hand-made tables in their oldest shape (no status, in_range, interval
# limits or bootstrap columns): every kind must still draw from them. Expected values below are
# computed by hand from the rows written here, not by the figure code.


def tiny_spec(outcome: dict[str, object] | None = None) -> Spec:
    raw = {"study": "tiny", "cohorts": [{"name": "sim", "path": "sim.parquet"}],
           "variables": {"x": {"label": "Marker", "unit": "mg"}, "t": {"unit": "years"}},
           "groupings": {"x": {"cuts": [2.0]}},
           "analyses": [{"name": "a", "exposure": "x",
                         "outcome": outcome or {"type": "survival", "time": "t", "event": "d",
                                                "horizon": 5}}],
           "risk_thresholds": [0.1, 0.2]}
    return parse_spec(raw, base=Path("."))


def _keyed(df: pd.DataFrame) -> pd.DataFrame:
    return df.assign(cohort="sim", analysis="a")


def tiny_curves() -> pd.DataFrame:
    x = np.linspace(0.5, 4.5, 21)
    parts = []
    for form, log_hr in (("spline", 0.4 * (x - 2.5) ** 2 / 4 - 0.1 * (x - 2.5)),
                         ("linear", -0.2 * (x - 2.5)),
                         ("legacy", np.where(x < 2.0, 0.5, 0.0))):
        se = np.where(log_hr == 0, 0.0, 0.1)
        parts.append(pd.DataFrame({"form": form, "adjustment": "legacy", "x": x,
                                   "effect": np.exp(log_hr), "effect_lower": np.exp(log_hr - 2 * se),
                                   "effect_upper": np.exp(log_hr + 2 * se),
                                   "scale": "hazard ratio", "x_reference": 2.5}))
    return _keyed(pd.concat(parts, ignore_index=True))


def tiny_windows() -> pd.DataFrame:
    """A windows table with cuts [1] (windows 0-1 and 1+ of t in years): the spline's curve
    log HR 0.3 (x - 2.5) before t = 1 and 0 after, two groups at medians 1.2 and 3.6 mg, the
    reference group at 2.5 mg; an unadjusted coding too; the curve's rows listed last first."""
    x = np.linspace(0.5, 4.5, 9)[::-1]
    parts = []
    for adj in ("none", "legacy"):
        for window, lo, hi, slope, events in (("0-1", 0.0, 1.0, 0.3, 40), ("1+", 1.0, np.inf,
                                                                           0.0, 25)):
            est = slope * (x - 2.5)
            parts.append(pd.DataFrame({
                "row_type": "curve", "form": "test_spline", "adjustment": adj, "window": window,
                "window_lower": lo, "window_upper": hi, "events": events, "x": x,
                "x_reference": 2.5, "effect": np.exp(est), "effect_lower": np.exp(est - 0.2),
                "effect_upper": np.exp(est + 0.2), "scale": "hazard ratio", "status": "ok"}))
            g = np.array([slope * (1.2 - 2.5), slope * (3.6 - 2.5)])
            parts.append(pd.DataFrame({
                "row_type": "group", "form": "legacy", "adjustment": adj, "window": window,
                "window_lower": lo, "window_upper": hi, "events": events,
                "group": ["<2 vs 2-3", ">=3 vs 2-3"], "x": [1.2, 3.6], "x_reference": 2.5,
                "effect": np.exp(g), "effect_lower": np.exp(g - 0.3),
                "effect_upper": np.exp(g + 0.3), "scale": "hazard ratio", "status": "ok"}))
        for form, p in (("legacy", 0.2), ("test_spline", 0.0004)):
            parts.append(pd.DataFrame({"row_type": ["test"], "form": form, "adjustment": adj,
                                       "window": "all", "p": p if adj == "legacy" else 0.5,
                                       "scale": "hazard ratio", "status": "ok"}))
    # the spline of the legacy coding failed in no window; the unadjusted one lost a window
    out = pd.concat(parts, ignore_index=True)
    return _keyed(out)


def tiny_tables() -> dict[str, pd.DataFrame]:
    thr = np.round(np.arange(0.01, 1.0, 0.01), 2)
    nb = []
    for rule, kind, model, values in (
            ("treat all", "reference", "", 0.15 - 0.85 * thr / (1 - thr)),
            ("treat none", "reference", "", 0 * thr),
            ("legacy: x < 2", "legacy", "", 0.05 - 0.2 * thr / (1 - thr)),
            ("risk: spline", "model", "spline", np.where((thr > 0.3) & (thr < 0.5), 0.08, 0.04)
             * (thr < 0.7)),
            ("risk: linear", "model", "linear", 0.04 * (thr < 0.7))):
        nb.append(pd.DataFrame({"rule": rule, "rule_type": kind, "model": model,
                                "threshold": thr, "net_benefit": values, "status": "ok"}))
    prof = pd.DataFrame({"row_type": "profile", "variable": "x", "cut": [1.0, 1.5, 2.0, 2.5, 3.0],
                         "statistic": [1.0, 4.0, 9.0, 6.0, 2.0]})
    cut_rows = pd.DataFrame({"row_type": ["cut", "search"], "variable": ["x", "x"],
                             "role": ["exposure", None], "cut": [2.0, 2.0],
                             "percentile": [41.0, np.nan], "statistic": [np.nan, 9.0],
                             "p_naive": [np.nan, 0.003], "p_lausen": [np.nan, 0.06]})
    thresholds = pd.DataFrame({
        "model": "spline", "by": None, "level": None, "threshold": [0.1, 0.1, 0.1, 0.2],
        "profile_quantile": [0.1, 0.5, 0.9, 0.5], "crossing": [1, 1, 1, 0],
        "position": ["crossing", "crossing", "crossing", "always below"],
        "exposure_value": [1.2, 1.6, 2.2, np.nan], "range_lower": 0.5, "range_upper": 4.5,
        "status": "ok"})
    ranges = pd.DataFrame({
        "form": ["legacy", "legacy", "linear", "linear"], "trim": ["none", "lower"] * 2,
        "share_lower": [0.0, 0.1] * 2, "share_upper": 0.0, "scale": "hazard ratio",
        "status": "ok", "estimate": [0.5, 0.8, -0.2, -0.25], "lower": [0.3, 0.5, -0.3, -0.4],
        "upper": [0.7, 1.1, -0.1, -0.1], "extrapolated": [False, False, False, True],
        "contrast": ["<2 vs >=2", "<2 vs >=2", "1 vs 3", "1 vs 3"]})
    confounding = pd.DataFrame({
        "exposure_form": ["linear", "legacy"], "scope": "all", "contrast": ["1 vs 3", "<2 vs >=2"],
        "scale": "hazard ratio", "estimate_crude": [0.6, 0.9], "se_crude": 0.1,
        "estimate_grouped": [0.4, 0.7], "se_grouped": 0.1, "estimate_continuous": [0.3, 0.6],
        "se_continuous": 0.1, "confounding_clear": True, "share_left": [1 / 3, 1 / 3]})
    information = pd.DataFrame({"adjustment": ["legacy", "none"], "info_kept": [0.62, 0.5],
                                "lr_legacy": [31.0, 20.0], "lr_linear": [12.0, 10.0],
                                "lr_spline": [50.0, 40.0]})
    density = pd.DataFrame({"bin_left": [0.5, 1.5, 2.5, 3.5], "bin_right": [1.5, 2.5, 3.5, 4.5],
                            "count": pd.array([40, 120, None, 30], dtype="Int64"),
                            "suppressed": [False, False, True, False]})
    return {"curves": tiny_curves(), "windows": tiny_windows(),
            "net_benefit": _keyed(pd.concat(nb, ignore_index=True)),
            "cutpoints": _keyed(pd.concat([prof, cut_rows], ignore_index=True)),
            "thresholds": _keyed(thresholds), "ranges": _keyed(ranges),
            "confounding": _keyed(confounding), "information": _keyed(information),
            "density": _keyed(density)}


def test_every_kind_draws_from_the_oldest_table_shapes(tmp_path: Path) -> None:
    """Tables without the optional columns (status, in_range, interval limits, bootstrap): every
    kind with rows draws, none records a problem in index.json."""
    ctx = Context(tiny_tables(), tiny_spec())
    done = draw_figures(ctx, tmp_path)
    drawn = {f.kind for f in done if f.svg is not None}
    assert not [f.problem for f in done if f.problem]
    assert drawn == {"information", "curves", "ranges", "confounding", "cut-positions",
                     "cut-profile", "thresholds", "decision-curves", "windows"}
    index = json.loads((tmp_path / "sim" / INDEX).read_text())
    assert {r["kind"] for r in index} == drawn - {"information"}


def test_a_failing_kind_is_recorded_in_the_index(tmp_path: Path) -> None:
    from unbin.present.figures import KINDS, Kind

    def broken(ctx: Context, cohort: str | None, analysis: str | None) -> None:
        raise ValueError("no scale")

    kinds = (Kind("broken", "curves", "analysis", broken), *(k for k in KINDS
                                                             if k.name == "curves"))
    done = draw_figures(Context(tiny_tables(), tiny_spec()), tmp_path, kinds=kinds)
    index = {r["kind"]: r for r in json.loads((tmp_path / "sim" / INDEX).read_text())}
    assert index["broken"]["svg"] is None and "ValueError: no scale" in index["broken"]["problem"]
    assert index["curves"]["svg"] and [f.kind for f in done] == ["broken", "curves"]


@pytest.mark.parametrize(("outcome", "label"), [
    ({"type": "survival", "time": "t", "event": "d", "horizon": 5}, "Risk of d within 5 years"),
    ({"type": "survival", "time": "u", "event": "d", "horizon": 2.5}, "Risk of d by u = 2.5"),
    ({"type": "binary", "event": "d"}, "Risk of d"),
    ({"type": "count", "count": "n", "persontime": "t"}, "Expected n per t (years)"),
    ({"type": "continuous", "value": "y"}, "Mean y"),
])
def test_risk_label_names_the_risk_and_its_horizon(outcome: dict[str, object],
                                                    label: str) -> None:
    assert Context({}, tiny_spec(outcome)).risk_label("a") == label


def test_axes_name_the_scale_and_the_horizon(tmp_path: Path) -> None:
    """The effect axes say the outcome's scale and the log scale; the decision-curve and
    threshold axes say the risk by the horizon; the strip under the curves has a count axis."""
    ctx = Context(tiny_tables(), tiny_spec())
    with st.styled():
        curves = cv.draw(ctx, "sim", "a")
        nb = dc.draw_net_benefit(ctx, "sim", "a")
        thr = dc.draw_thresholds(ctx, "sim", "a")
        conf = cf.draw(ctx, "sim", "a")
        ranges = rg.draw(ctx, "sim", "a")
    assert curves is not None and nb is not None and thr is not None and conf is not None
    assert ranges is not None
    main, rug = curves.figure.subfigs[0].get_axes()[:2]
    assert main.get_ylabel().startswith("Hazard ratio (log scale)")
    assert rug.get_ylabel() == cv.RUG_LABEL and [t.get_text() for t in rug.get_yticklabels()] \
        == ["0", "120"]   # the largest bin not suppressed
    assert "risk of d within 5 years" in nb.figure.subfigs[0].get_axes()[0].get_xlabel()
    assert thr.figure.subfigs[0].get_axes()[0].get_title(loc="left") == \
        "Risk of d within 5 years reaches 10%"
    assert conf.figure.subfigs[0].get_axes()[0].get_xlabel().startswith(
        "Hazard ratio (log scale)")
    assert ranges.figure.subfigs[0].get_axes()[0].get_ylabel().startswith(
        "Hazard ratio, trimmed / full range")
    assert st.effect_label("mean difference", "sbp") == "Difference in mean sbp"
    for scale in ("odds ratio", "rate ratio"):
        assert st.effect_label(scale) == scale.capitalize() + " (log scale)"


def test_curve_selection_keeps_usable_rows_of_the_legacy_coding() -> None:
    cur = tiny_curves()
    extra = cur[cur["form"] == "spline"].assign(adjustment="continuous")
    bad = cur.assign(status="ok", in_range=True)
    bad.loc[0, "status"] = "failed"          # a spline row of the legacy coding
    bad.loc[1, "in_range"] = False
    sel = cv.select_curves(pd.concat([bad, extra.assign(status="ok")], ignore_index=True))
    assert sel is not None and sel.adjustment == "legacy" and sel.forms == ["spline", "linear"]
    assert len(sel.form("spline")) == 19 and len(sel.form("legacy")) == 21
    assert sel.scale == "hazard ratio" and sel.x_reference == 2.5
    assert cv.select_curves(cur[cur["form"] == "legacy"]) is None


def test_curve_alt_states_the_table_values() -> None:
    sel = cv.select_curves(tiny_curves())
    assert sel is not None
    steps = cv.legacy_steps(sel.form("legacy"), [2.0])
    bars, hidden = cv.rug_bars(tiny_tables()["density"])
    alt = cv.curves_alt(sel, steps, Context({}, tiny_spec()).exposure("a"), "d", bars, hidden)
    lin = tiny_curves().query("form == 'linear'")
    first, last = float(lin["effect"].iloc[0]), float(lin["effect"].iloc[-1])
    assert f"linear from {st.fmt_ratio(first)} at 0.5 mg to {st.fmt_ratio(last)} at 4.5 mg" in alt
    assert f"0.5–2 mg: {st.fmt_ratio(np.exp(0.5))} ({st.fmt_ratio(np.exp(0.3))} to " \
           f"{st.fmt_ratio(np.exp(0.7))})" in alt
    assert f"2–4.5 mg: {st.fmt_ratio(1.0)} (reference group)" in alt
    assert "(largest bar 120 rows); 1 small bin(s) hidden." in alt


def test_range_points_are_relative_to_the_full_range() -> None:
    sel = rg.select_ranges(tiny_tables()["ranges"])
    assert sel is not None
    pts = sel.points.set_index(["form", sel.points["scenario"].map(lambda s: s[0])])
    # exp(estimate - full-range estimate), by hand from the rows above
    assert pts.loc[("legacy", "lower"), "y"] == pytest.approx(np.exp(0.3))
    assert pts.loc[("legacy", "lower"), "lower"] == pytest.approx(np.exp(0.0))
    assert pts.loc[("linear", "lower"), "y"] == pytest.approx(np.exp(-0.05))
    assert bool(pts.loc[("linear", "lower"), "hollow"])
    moves = rg.largest_moves(sel)
    assert set(moves) == {"legacy"}    # the linear move is hollow (outside the trimmed range)
    assert moves["legacy"][0] == pytest.approx(0.3)
    assert f"moves at most ×{st.fmt_ratio(np.exp(0.3))} (low tail 10%)" in rg.ranges_alt(sel, "x")


def test_confounding_selection_uses_the_standard_error_of_older_tables() -> None:
    sel = cf.select_confounding(tiny_tables()["confounding"])
    assert sel is not None and not sel.marginal
    label, (e, lo, hi), _ = sel.panels[0].rows[0]
    z = 1.959963984540054   # the 97.5th normal percentile (scipy.stats.norm.ppf(0.975))
    assert label == "crude" and e == pytest.approx(np.exp(0.6))
    assert (lo, hi) == pytest.approx((np.exp(0.6 - z * 0.1), np.exp(0.6 + z * 0.1)))
    alt = cf.confounding_alt(sel)
    assert (f"crude {st.fmt_ratio(np.exp(0.6))}, with grouped confounders "
            f"{st.fmt_ratio(np.exp(0.4))}, with continuous confounders "
            f"{st.fmt_ratio(np.exp(0.3))}; share left by the grouped adjustment: 33%") in alt


def test_information_selection_joins_the_bootstrap_interval() -> None:
    info = tiny_tables()["information"]
    jobs = [("sim", "a")]
    plain = inf.select_information(info, pd.DataFrame(), jobs)
    assert len(plain) == 1 and plain["kept_lower"].isna().all()
    boot = _keyed(pd.DataFrame({"adjustment": ["legacy", "none"], "info_kept": [0.62, 0.5],
                                "info_kept_lower": [0.51, 0.4], "info_kept_upper": [0.7, 0.6],
                                "level": 0.95, "replicates": 200, "replicates_used": [198, 200],
                                "status": "ok", "message": ""}))
    rows = inf.select_information(info, boot, jobs)
    assert rows[["kept_lower", "kept_upper", "replicates_used"]].iloc[0].tolist() == \
        [0.51, 0.7, 198]
    alt = inf.information_alt(rows, ["a"], inf.lr_forms(rows))
    assert "a: groups keep 62% of the information, 95% bootstrap interval 51% to 70%" in alt
    assert "LR χ² legacy groups 31.0, linear 12.0, spline 50.0" in alt
    older = inf.select_information(info.drop(columns="adjustment").iloc[:1], boot, jobs)
    assert older[["kept_lower", "kept_upper"]].iloc[0].tolist() == [0.51, 0.7]
    failed = inf.select_information(info, boot.assign(status="failed"), jobs)
    assert failed["kept_lower"].isna().all()
    assert "bootstrap" not in inf.information_alt(failed, ["a"], inf.lr_forms(failed))


def test_decision_curves_span_where_the_risk_rules_differ() -> None:
    """The two risk rules of tiny_tables differ only for thresholds 0.31-0.49 (0.08 vs 0.04,
    far above 5% of the largest); with the study's thresholds 0.1 and 0.2 and one grid step on
    each side the range is 0.09-0.50."""
    nb = tiny_tables()["net_benefit"]
    (lo, hi), differing = dc.differing_range(nb, [0.1, 0.2])
    assert differing and (lo, hi) == pytest.approx((0.09, 0.50))
    same = nb[nb["rule"] != "risk: spline"]
    (lo, hi), differing = dc.differing_range(same, [])
    assert not differing and (lo, hi) == pytest.approx((0.0, 0.70))   # where a rule is useful
    sel = dc.select_net_benefit(nb, [0.1, 0.2])
    assert sel is not None and "treat none" not in [r.name for r in sel.rules]
    alt = dc.net_benefit_alt(sel, [0.1], "Risk of d within 5 years")
    treat_all = 0.15 - 0.85 * 0.1 / 0.9
    assert f"at 10%: treat all {treat_all:.3f}, treat none 0.000, legacy: x < 2 " \
           f"{0.05 - 0.2 * 0.1 / 0.9:.3f}, risk: spline 0.040, risk: linear 0.040" in alt
    styles = [dc.rule_style(r, 0) for r in sel.rules]
    assert len({(s["ls"] if isinstance(s["ls"], str) else str(s["ls"]), s["marker"])
                for s in styles}) == len(styles)   # told apart without colour


@pytest.mark.parametrize(("thr", "percent", "text"), [
    (0.07, True, "7%"), (0.1, True, "10%"), (0.025, True, "2.5%"), (140.0, False, "140"),
    (1.5, False, "1.5")])
def test_threshold_text(thr: float, percent: bool, text: str) -> None:
    assert dc.threshold_text(thr, percent) == text


def test_threshold_selection_and_alt_state_the_middle_crossing() -> None:
    sel = dc.select_thresholds(tiny_tables()["thresholds"])
    assert sel is not None and sel.thresholds == [0.1, 0.2] and sel.lines == [("spline", "all")]
    assert dc.middle_crossings(sel) == [(0.1, "spline", "all", [1.6])]
    alt = dc.thresholds_alt(sel, "Marker (mg)", [2.0], " mg", "Risk of d within 5 years")
    assert "threshold 10%, spline: 1.6." in alt and "legacy cut(s) at 2 mg" in alt


def test_cut_profile_selection_and_alt() -> None:
    sel = cp.select_profile(tiny_tables()["cutpoints"])
    assert sel is not None and sel.maximum == (2.0, 9.0) and sel.legacy_cuts == [2.0]
    assert sel.boot is None and sel.profile["cut"].tolist() == [1.0, 1.5, 2.0, 2.5, 3.0]
    alt = cp.profile_alt(sel, "Marker (mg)")
    assert "5 candidate cuts of Marker (mg) from 1 to 3; maximum 9.0 at 2" in alt
    assert "naive p 0.003 · corrected p (Lausen–Schumacher) 0.060" in alt
    pos = cp.select_positions(tiny_tables()["cutpoints"])
    assert pos is not None and list(pos) == ["x"]
    assert "2 at the 41th percentile" in cp.positions_alt(pos, str)


def test_level_selection_and_alt_state_each_level_and_the_interaction_test() -> None:
    x = np.linspace(1.0, 3.0, 5)
    rows = []
    for level, slope, ref in (("young", 0.2, 2.0), ("old", 0.5, 2.5)):
        eff = np.exp(slope * (x - ref))
        rows.append(pd.DataFrame({"form": lv.FORM, "by_level": level, "adjustment": "continuous",
                                  "x": x, "effect": eff, "effect_lower": eff / 1.2,
                                  "effect_upper": eff * 1.2, "scale": "odds ratio",
                                  "x_reference": ref, "status": "ok", "in_range": True}))
    plain = tiny_curves().assign(by_level=None, status="ok", in_range=True)
    sel = lv.select_levels(pd.concat([plain, *rows], ignore_index=True))
    assert sel is not None and sel.levels == ["young", "old"] and sel.adjustment == "continuous"
    info = pd.DataFrame({"adjustment": ["continuous"], "interaction_lr": [12.34],
                         "interaction_df": [3], "interaction_p": [0.0063]})
    test = lv.interaction_text(info, "continuous")
    assert test == "interaction LR χ² 12.3 on 3 df, p = 0.0063"
    alt = lv.levels_alt(sel, Context({}, tiny_spec()).exposure("a"), "d", "age group", test)
    # exp(0.5 * (1 - 2.5)) and exp(0.5 * (3 - 2.5)), by hand
    assert (f"old (reference 2.5 mg): from {st.fmt_ratio(np.exp(-0.75))} at 1 mg to "
            f"{st.fmt_ratio(np.exp(0.25))} at 3 mg") in alt
    assert "in 2 panels, one per level of age group" in alt
    assert lv.select_levels(plain) is None


def test_window_selection_follows_the_table() -> None:
    tab = tiny_windows()
    sel = wn.select_windows(tab, "years")
    assert sel is not None and sel.adjustment == "legacy" and sel.scale == "hazard ratio"
    assert [w.label for w in sel.windows] == ["0–1 years", "1+ years"]
    assert [w.events for w in sel.windows] == [40.0, 25.0]
    assert sel.x_reference == 2.5
    assert sel.p_curve == pytest.approx(0.0004) and sel.p_groups == pytest.approx(0.2)
    first = sel.windows[0]
    # the curve sorted by x, its values those of the table's rows (exp(0.3 (x - 2.5)) by hand)
    np.testing.assert_allclose(first.curve["x"], np.linspace(0.5, 4.5, 9))
    np.testing.assert_allclose(first.curve["effect"], np.exp(0.3 * (np.linspace(0.5, 4.5, 9)
                                                                     - 2.5)))
    assert list(first.groups["group"]) == ["<2 vs 2-3", ">=3 vs 2-3"]
    np.testing.assert_allclose(first.groups["effect_upper"], np.exp(0.3 * np.array(
        [-1.3, 1.1]) + 0.3))
    np.testing.assert_allclose(sel.windows[1].curve["effect"], 1.0)
    # a coding whose spline misses a window is passed over; failed rows are dropped
    lost = tab[~((tab["adjustment"] == "legacy") & (tab["window"] == "1+"))
               & ~((tab["adjustment"] == "none") & (tab["row_type"] == "test"))]
    sel = wn.select_windows(lost)
    assert sel is not None and sel.adjustment == "none"
    assert [w.label for w in sel.windows] == ["0–1", "1+"]
    assert np.isnan(sel.p_curve)
    failed = tab.assign(status=np.where(tab["row_type"] == "curve", "failed", "ok"))
    assert wn.select_windows(failed) is None
    assert wn.select_windows(tab[tab["row_type"] == "test"]) is None
    # older tables without group positions: the groups are left out, the curve still drawn
    sel = wn.select_windows(tab.assign(x=np.where(tab["row_type"] == "group", np.nan, tab["x"])))
    assert sel is not None and all(w.groups.empty for w in sel.windows)


def test_window_alt_and_title_state_the_table_values(tmp_path: Path) -> None:
    sel = wn.select_windows(tiny_windows(), "years")
    assert sel is not None
    alt = wn.windows_alt(sel, Context({}, tiny_spec()).exposure("a"), "d")
    # exp(0.3 * (0.5 - 2.5)) and exp(0.3 * (4.5 - 2.5)) by hand
    assert (f"0–1 years, 40 events: spline from {st.fmt_ratio(np.exp(-0.6))} at 0.5 mg to "
            f"{st.fmt_ratio(np.exp(0.6))} at 4.5 mg") in alt
    assert (f"legacy groups <2 vs 2-3 {st.fmt_ratio(np.exp(-0.39))} "
            f"({st.fmt_ratio(np.exp(-0.69))} to {st.fmt_ratio(np.exp(-0.09))})") in alt
    assert "spline p < 0.001, legacy groups p = 0.200." in alt
    ctx = Context({"windows": tiny_windows()}, tiny_spec())
    drawn = wn.draw(ctx, "sim", "a")
    assert drawn is not None
    heads = [t.get_text() for t in drawn.figure.subfigs[0].texts]
    assert any("spline p < 0.001, groups p = 0.200" in h for h in heads)
    axes = drawn.figure.subfigs[0].axes
    assert [a.get_title() for a in axes] == ["0–1 years · 40 events", "1+ years · 25 events"]
    assert all(a.get_yscale() == "log" for a in axes)
    assert axes[0].get_ylim() == axes[1].get_ylim()


def test_information_interval_is_drawn_only_beside_its_own_point() -> None:
    """A bootstrap row whose info_kept is not the information table's (e.g. a complete-case
    share beside one combined over imputed sets) gives no whisker and no interval in the alt
    text; one that agrees to 1e-9 does (the pairing rule of present/summary.kept_interval)."""
    info = tiny_tables()["information"]
    jobs = [("sim", "a")]
    point = float(info.loc[info["adjustment"] == "legacy", "info_kept"].iloc[0])
    boot = _keyed(pd.DataFrame({"adjustment": ["legacy"], "info_kept": [point + 0.05],
                                "info_kept_lower": [0.51], "info_kept_upper": [0.7],
                                "level": 0.95, "replicates": 200, "replicates_used": [198],
                                "status": "ok", "message": ""}))
    other = inf.select_information(info, boot, jobs)
    assert other[["kept_lower", "kept_upper", "level", "replicates_used"]].isna().all().all()
    assert "bootstrap" not in inf.information_alt(other, ["a"], inf.lr_forms(other))
    assert "Whiskers" not in inf._footnote(other)
    same = inf.select_information(info, boot.assign(info_kept=point * (1 + 1e-12)), jobs)
    assert same[["kept_lower", "kept_upper"]].iloc[0].tolist() == [0.51, 0.7]
    assert "bootstrap interval 51% to 70%" in inf.information_alt(same, ["a"],
                                                                  inf.lr_forms(same))
    assert "_boot_kept" not in same


def test_rows_of_one_cohort_and_analysis_are_the_filtered_rows() -> None:
    # Reference: the two equality filters written out with pandas (brute force), on a table
    # whose keys interleave, repeat and include missing values, and on tables without the keys.
    t = pd.DataFrame({"cohort": ["sim", "b", "sim", None, "sim", "b"],
                      "analysis": ["a", "a", "z", "a", "a", None],
                      "v": [1.0, 2.0, 3.0, 4.0, np.nan, 6.0], "k": [1, 2, 3, 4, 5, 6]})
    tables = {"t": t, "no_keys": t.drop(columns=["cohort", "analysis"]),
              "cohort_only": t.drop(columns=["analysis"]), "empty": t.iloc[:0]}
    ctx = Context(tables, tiny_spec())
    for name, df in tables.items():
        for cohort, analysis in [("sim", "a"), ("b", "a"), ("sim", "z"), ("b", "z"),
                                 ("x", "a"), ("sim", None), (None, "a"), (None, None)]:
            want = df
            if len(want) and cohort is not None and "cohort" in want:
                want = want[want["cohort"] == cohort]
            if len(want) and analysis is not None and "analysis" in want:
                want = want[want["analysis"] == analysis]
            pd.testing.assert_frame_equal(ctx.rows(name, cohort, analysis),
                                          want.reset_index(drop=True), check_exact=True)
    assert ctx.rows("t", "sim", "a")["k"].tolist() == [1, 5]
