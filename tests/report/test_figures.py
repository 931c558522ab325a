"""Figures on plain numbers: labels with units, specification limits drawn,
the colour-blind-safe palette, PNG output.

The palette is Okabe & Ito (2008), "Color Universal Design", J*Fly
(jfly.uni-koeln.de; web page, from memory): black #000000, orange #E69F00,
sky blue #56B4E9, bluish green #009E73, yellow #F0E442, blue #0072B2,
vermilion #D55E00, reddish purple #CC79A7.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from matplotlib.colors import to_hex

from linkage.report import figures as F

OKABE_ITO = {"#000000", "#e69f00", "#56b4e9", "#009e73", "#f0e442", "#0072b2", "#d55e00", "#cc79a7"}
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (W3C 2003), §5.2


def _dashed(ax, axis="y"):
    """Values of the dashed straight lines across the axes (spec limits)."""
    out = []
    for line in ax.get_lines():
        if line.get_linestyle() != "--":
            continue
        data = line.get_ydata() if axis == "y" else line.get_xdata()
        if len(set(np.asarray(data, float))) == 1:
            out.append(float(np.asarray(data, float)[0]))
    return sorted(out)


def _scatter_colours(ax) -> set[str]:
    colours = set()
    for coll in ax.collections:
        fc = coll.get_facecolors()
        if len(fc) and coll.get_array() is None:  # not colour-mapped
            colours |= {to_hex(c) for c in fc}
    return colours


def test_units_come_from_the_contract_the_template_or_the_name():
    assert F.axis_label("tensile_strength_mpa") == "tensile_strength_mpa [MPa]"  # schema.ASSEMBLED
    assert F.axis_label("breaking_force_n") == "breaking_force_n [N]"  # schema.TABLES (tablets)
    assert F.axis_label("granule_d50_um") == "granule_d50_um [µm]"
    assert F.axis_label("ribbon_porosity") == "ribbon_porosity [-]"
    assert F.axis_label("blend_moisture_pct") == "blend_moisture_pct [%]"  # an extra process column
    assert F.axis_label("lubricant_grade") == "lubricant_grade [-]"


def test_group_styles_differ_for_many_groups_and_use_the_palette():
    styles = F.group_styles([f"g{i}" for i in range(56)])
    assert len(set(styles.values())) == 56
    assert {to_hex(c) for c, _ in styles.values()} <= OKABE_ITO
    assert to_hex(F.VERMILION) not in {to_hex(c) for c, _ in styles.values()}  # kept for limits


def test_predicted_observed_draws_limits_on_both_axes_and_groups_in_palette():
    rng = np.random.default_rng(0)
    obs = rng.uniform(1, 4, 60)
    pred = obs + rng.normal(0, 0.2, 60)
    groups = rng.choice(["pilot", "production", "third"], 60)
    ax = F.plot_predicted_observed(obs, pred, name="tensile_strength_mpa", groups=groups,
                                   group_title="compactor", limit={"min": 1.7, "max": None})
    assert ax.get_xlabel() == "observed tensile_strength_mpa [MPa]"
    assert ax.get_ylabel() == "predicted (out-of-fold) tensile_strength_mpa [MPa]"
    assert _dashed(ax, "y") == [1.7] and _dashed(ax, "x") == [1.7]
    colours = _scatter_colours(ax)
    assert len(colours) == 3 and colours <= OKABE_ITO
    assert F.figure_png(ax).startswith(PNG_SIGNATURE)


def test_limits_accept_spec_objects_and_skip_open_sides():
    from linkage.spec import Limit

    ax = F.new_axes()
    assert F.draw_limits(ax, Limit(min=80.0), axis="y") == 1
    assert F.draw_limits(ax, Limit(min=0.2, max=0.35), axis="x") == 2
    assert F.draw_limits(ax, None) == 0
    assert _dashed(ax, "y") == [80.0] and _dashed(ax, "x") == [0.2, 0.35]


def test_residuals_in_time_keep_the_order_given_and_shade_the_noise_floor():
    lots = [f"L{i:02d}" for i in range(50)]
    r = np.sin(np.arange(50))
    r[7] = np.nan
    ax = F.plot_residuals_in_time(lots, r, name="dissolution_pct", noise_floor=0.8)
    assert ax.get_ylabel() == "residual, observed − predicted [%]"
    assert ax.get_xlabel() == "lot, in time order [-]"
    labels = [t.get_text() for t in ax.get_xticklabels()]
    assert labels[0] == "L00" and labels == sorted(labels) and len(labels) <= 20
    assert any("noise floor" in t.get_text() for t in ax.get_legend().get_texts())


def test_ribbon_fit_colours_each_gap_and_draws_its_curve():
    rng = np.random.default_rng(1)
    force = rng.uniform(4, 14, 40)
    gap = rng.choice([2.0, 2.5, 10.0], 40)
    por = 0.5 - 0.02 * force + 0.01 * gap
    grid = np.linspace(4, 14, 5)
    curves = {g: (grid, 0.5 - 0.02 * grid + 0.01 * g) for g in (2.0, 2.5, 10.0)}
    ax = F.plot_ribbon_fit(force, por, gap, curves)
    assert ax.get_xlabel() == "roll_force_kn_per_cm [kN/cm]" and ax.get_ylabel() == "ribbon_porosity [-]"
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert legend == ["2 mm", "2.5 mm", "10 mm"]  # numeric order, not text order
    point_colours = _scatter_colours(ax)
    line_colours = {to_hex(line.get_color()) for line in ax.get_lines()}
    assert line_colours == point_colours and len(line_colours) == 3


def test_rd_fit_curve_is_the_equation():
    """The drawn curve is s0·exp(−k·ε) (Ryshkewitch 1953; Duckworth 1953)."""
    eps = np.linspace(0.2, 0.4, 12)
    ts = 10 * np.exp(-8 * eps)
    ax = F.plot_rd_fit(eps, ts, 10.0, 8.0, limit={"min": 1.7})
    curve = next(line for line in ax.get_lines() if line.get_label().startswith("fit"))
    x, y = (np.asarray(a, float) for a in curve.get_data())
    np.testing.assert_allclose(y, 10 * np.exp(-8 * x))
    assert curve.get_label() == "fit 10·exp(−8·ε)"
    assert _dashed(ax, "y") == [1.7]
    rising = F.plot_rd_fit(eps, np.exp(3 * eps), 1.0, -3.0)
    assert any(line.get_label() == "fit 1·exp(+3·ε)" for line in rising.get_lines())


def test_contribution_summary_orders_inputs_by_mean_absolute_contribution():
    rng = np.random.default_rng(2)
    X = pd.DataFrame({"a": rng.normal(size=30), "b": rng.normal(size=30), "c": rng.normal(size=30)})
    C = pd.DataFrame({"a": 0.1 * X["a"], "b": 3 * X["b"], "c": X["c"]})
    ax = F.plot_contribution_summary(C, X, name="friability_pct")
    assert [t.get_text() for t in ax.get_yticklabels()] == ["a", "c", "b"]  # most important on top
    assert ax.get_xlabel() == "contribution to friability_pct [%]"
    assert F.figure_png(ax).startswith(PNG_SIGNATURE)


def test_vip_bars_and_threshold():
    ax = F.plot_vip({"x1": 1.3, "x2": 0.5, "x3": 0.9}, name="fines_pct")
    assert [t.get_text() for t in ax.get_yticklabels()] == ["x2", "x3", "x1"]
    assert [round(p.get_width(), 6) for p in ax.patches] == [0.5, 0.9, 1.3]
    assert ax.get_xlabel() == "VIP for fines_pct [-]"


def test_window_probability_marks_confidence_window_and_mean_window():
    g = np.linspace(0.2, 0.4, 21)
    p = np.clip(1 - np.abs(g - 0.3) * 6, 0, 1)
    ax = F.plot_window_probability(g, p, {"dissolution_pct": p, "weight_rsd_pct": np.ones_like(g)},
                                   confidence=0.9, low=0.285, high=0.315, mean_low=0.25, mean_high=0.35)
    assert _dashed(ax, "y") == [0.9]
    assert ax.get_ylabel() == "probability of meeting the specification [-]"
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "window 0.285 – 0.315" in labels and "P(pass all)" in labels and "mean-response window" in labels


def test_porosity_curve_and_roll_force_and_domain_draw_their_limits():
    g = np.linspace(0.2, 0.4, 11)
    ax = F.plot_porosity_curve(g, 3 - 4 * g, 2.5 - 4 * g, 3.5 - 4 * g, name="tensile_strength_mpa", level=0.9,
                               limit={"min": 1.7}, observed=(g, 3 - 4 * g), window=(0.25, 0.3))
    assert _dashed(ax, "y") == [1.7] and ax.get_ylabel() == "tensile_strength_mpa [MPa]"
    f = np.linspace(4, 14, 11)
    ax = F.plot_roll_force(f, 0.5 - 0.02 * f, np.linspace(0, 1, 11), low=0.25, high=0.3, force_low=10,
                           force_high=12.5, confidence=0.9)
    assert ax.get_xlabel() == "roll_force_kn_per_cm [kN/cm]"
    assert any("10.00 – 12.50 kN/cm" in t.get_text() for t in ax.get_legend().get_texts())
    rng = np.random.default_rng(3)
    t2, q = rng.chisquare(2, 30), rng.chisquare(2, 30)
    t2[4] = 50.0
    ax = F.plot_domain(t2, q, t2_limit=9.0, q_limit=7.0, lots=[f"L{i}" for i in range(30)], stage="ribbon")
    assert _dashed(ax, "x") == [9.0]
    assert "L4" in [t.get_text() for t in ax.texts]


def test_user_text_with_dollar_signs_renders_as_text():
    """A lot named like mathtext must neither fail nor be typeset."""
    lots = ["$x$", "a$b", r"$\frac$", "<script>alert(1)</script>"]
    ax = F.plot_residuals_in_time(lots, np.array([0.1, -0.2, 0.3, 0.0]), name="fines_pct",
                                  groups=["$g$", "h", "$g$", "h"])
    png = F.figure_png(ax)  # raises if matplotlib tried to parse the mathtext
    assert png.startswith(PNG_SIGNATURE)
    assert F.plain("$x$") == r"\$x\$"
    labels = [t.get_text() for t in ax.get_xticklabels()]
    assert labels[3] == "<script>alert…"  # long names are cut, not allowed to crowd the axis


def test_completeness_map_and_grid_margins():
    present = pd.DataFrame({"process": [True] * 5, "ribbon": [True, False, True, True, False]},
                           index=[f"L{i}" for i in range(5)])
    ax = F.plot_completeness(present)
    assert [t.get_text() for t in ax.get_yticklabels()] == ["process", "ribbon"]
    np.testing.assert_array_equal(ax.images[0].get_array(), present.to_numpy(float).T)
    fig, axes = F.grid_axes(5, ncols=3, panel=(2.0, 1.5))
    assert len(axes) == 5 and sum(a.get_visible() and a.axison for a in fig.axes) == 5
    with pytest.raises(TypeError, match="unknown margin"):
        F.grid_axes(1, gutter=1.0)


def test_png_holds_the_pixels_the_canvas_drew():
    """The PNG's compression level (figures.PNG_COMPRESS_LEVEL) changes the file's bytes, never its pixels: the
    decoded PNG is the Agg canvas's own buffer, and the same as Pillow's default level gives (the reference is
    the canvas and Pillow's encoder, not the project). The level is lower than Pillow's default."""
    import io

    from PIL import Image

    ax = F.plot_control_chart([f"L{i}" for i in range(30)], np.sin(np.arange(30.0)), centre=0.0, limits=(-1.0, 1.0),
                              name="fines_pct", ewma=np.zeros(30), ewma_low=np.full(30, -0.5),
                              ewma_high=np.full(30, 0.5))
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    png = F.figure_png(ax)
    agg = FigureCanvasAgg(ax.figure)
    agg.draw()
    canvas = np.asarray(agg.buffer_rgba())  # the figure drawn on the Agg canvas, at the figure's own dpi
    decoded = np.asarray(Image.open(io.BytesIO(png)))
    assert decoded.shape == canvas.shape and np.array_equal(decoded, canvas)
    default = io.BytesIO()
    Image.fromarray(canvas).save(default, format="png")  # Pillow's default level (6)
    assert np.array_equal(np.asarray(Image.open(io.BytesIO(default.getvalue()))), decoded)
    assert F.PNG_COMPRESS_LEVEL < 6
