"""Figures of the report: compute first, then draw.

Every ``plot_*`` function takes plain numbers (arrays, Series, dicts), draws
on the Axes it is given (a new figure when ``ax`` is None) and returns the
Axes; none calls ``show()``. Figures are built with :class:`matplotlib.figure.Figure`
directly, never through ``pyplot``, so there is no global state and no
window: rendering goes to PNG through the Agg canvas. Matplotlib is imported
inside the functions (it is heavy, and a what-if must not pay for it).

Conventions, the same in every figure:

- Colours are the Okabe & Ito (2008) colour-blind-safe set, each group also
  gets its own marker so that print in grey still tells them apart.
- Axis labels are the column name with its unit in brackets, the unit from
  :data:`linkage.schema.ASSEMBLED` (or the input template), ``[-]`` for a
  dimensionless quantity.
- A specification limit of an attribute on an axis is drawn as a dashed
  vermilion line, labelled "spec min" or "spec max".

Okabe M., Ito K. (2008). Color Universal Design (CUD): how to make figures
and presentations that are friendly to colorblind people. J*Fly, jfly.uni-koeln.de
(web page, citation from memory).
"""

from __future__ import annotations

import base64
import io
import re
from collections.abc import Mapping, Sequence

import numpy as np

from linkage.numbers import percent_text
from linkage.schema import ASSEMBLED, TABLES

#: Okabe-Ito colours; vermilion is kept for specification limits, so the
#: groups cycle through the other seven.
BLUE = "#0072B2"
ORANGE = "#E69F00"
SKY = "#56B4E9"
GREEN = "#009E73"
YELLOW = "#F0E442"
VERMILION = "#D55E00"
PURPLE = "#CC79A7"
BLACK = "#000000"
GREY = "#6b6b6b"
GROUP_COLOURS = (BLUE, ORANGE, GREEN, PURPLE, SKY, BLACK, YELLOW)
MARKERS = ("o", "s", "^", "D", "v", "P", "X", "*")
#: sequential, colour-blind-safe colour map for continuous values
CMAP = "cividis"

DPI = 100

LIMIT_STYLE = {"color": VERMILION, "linestyle": "--", "linewidth": 1.4}


# ---------------------------------------------------------------- helpers

#: unit of a column from the ending of its name, for columns the contract
#: does not list (extra process columns, reported values kept beside derived ones)
_SUFFIX_UNITS = (("_kn_per_cm", "kN/cm"), ("_g_cm3", "g/cm3"), ("_pct", "%"), ("_mpa", "MPa"), ("_kn", "kN"),
                 ("_n", "N"), ("_mm", "mm"), ("_um", "um"), ("_mg", "mg"), ("_g", "g"), ("_rpm", "rpm"),
                 ("_min", "min"))

#: how a unit is written for a reader (axes, the report's tables, the what-if sheet and the what-if page, which
#: gets this table embedded by :func:`linkage.report.page.page_payload`)
PRETTY_UNITS = {"um": "µm", "g/cm3": "g/cm³"}


def unit_of(name: str) -> str:
    """The unit of a column: from the assembled table's contract, else from
    the input template, else from the ending of its name, else ``-``."""
    if name in ASSEMBLED:
        return ASSEMBLED[name]
    for table in TABLES.values():
        if name in table.names:
            return table.column(name).unit
    for suffix, unit in _SUFFIX_UNITS:
        if str(name).endswith(suffix):
            return unit
    return "-"


def shown_unit(name: str) -> str:
    """The unit of a column as a reader sees it: ``µm`` for ``um``, ``-``
    for a dimensionless quantity (or one without a unit)."""
    unit = unit_of(name)
    if unit in ("", "ISO 8601", "sieve | laser", "bool"):
        unit = "-"
    return PRETTY_UNITS.get(unit, unit)


def shown_units_text(text: str) -> str:
    """A sentence with its units as a reader sees them (:data:`PRETTY_UNITS`), as the report's tables write them:
    "undersize 10.7% at 63 um" -> "undersize 10.7% at 63 µm". Only a unit right after a number is changed (a
    column name such as granule_d50_um stays as it is)."""
    for raw, pretty in PRETTY_UNITS.items():
        text = re.sub(r"(\d) " + re.escape(raw) + r"(?![\w/])", r"\1 " + pretty, text)
    return text


def axis_label(name: str) -> str:
    """``"tensile_strength_mpa [MPa]"``; dimensionless quantities get ``[-]``."""
    return f"{plain(name)} [{shown_unit(name)}]"


#: figure margins [inch] around the axes: room for tick labels, axis labels
#: and titles; ``wspace``/``hspace`` are the gaps between panels
MARGINS = {"left": 0.95, "right": 0.25, "bottom": 0.65, "top": 0.35, "wspace": 0.95, "hspace": 0.8}


def prepare() -> None:
    """Import matplotlib's figure, Agg canvas, colours and patches and load its font list in this process,
    before it forks children that draw (:mod:`linkage.report.background`): each child then starts with them
    instead of importing them again (a figure made in a child is drawn the same either way)."""
    from matplotlib import colors, font_manager, lines, patches  # noqa: F401 - imported for the children
    from matplotlib.backends import backend_agg  # noqa: F401
    from matplotlib.figure import Figure  # noqa: F401

    font_manager.findfont(font_manager.FontProperties())


def grid_axes(n: int, ncols: int = 3, panel: tuple[float, float] = (2.6, 2.0), **margins):
    """A new figure with ``n`` panels in rows of ``ncols``; returns (figure,
    list of the n Axes). ``panel`` is the size of each plotting area [inch];
    margins (keys of :data:`MARGINS`, in inches) are added around it. Unused
    cells are switched off.

    The layout is fixed arithmetic, not matplotlib's constrained layout,
    which costs an extra pass over every text of the figure."""
    from matplotlib.figure import Figure

    unknown = set(margins) - set(MARGINS)
    if unknown:
        raise TypeError(f"unknown margin(s): {', '.join(sorted(unknown))}")
    m = {**MARGINS, **margins}
    n = max(int(n), 1)
    ncols = max(1, min(int(ncols), n))
    nrows = -(-n // ncols)
    pw, ph = panel
    width = m["left"] + m["right"] + ncols * pw + (ncols - 1) * m["wspace"]
    height = m["bottom"] + m["top"] + nrows * ph + (nrows - 1) * m["hspace"]
    fig = Figure(figsize=(width, height), dpi=DPI)
    fig.subplots_adjust(left=m["left"] / width, right=1 - m["right"] / width, bottom=m["bottom"] / height,
                        top=1 - m["top"] / height, wspace=m["wspace"] / pw, hspace=m["hspace"] / ph)
    axes = fig.subplots(nrows, ncols, squeeze=False).ravel()
    for extra in axes[n:]:
        extra.set_axis_off()
    return fig, list(axes[:n])


def new_axes(ax=None, panel: tuple[float, float] = (4.0, 3.0), **margins):
    """``ax`` itself, or the Axes of a new one-panel figure (see :func:`grid_axes`)."""
    if ax is not None:
        return ax
    return grid_axes(1, 1, panel, **margins)[1][0]


def label_margin(names, fontsize: float = 8.0) -> float:
    """Inches a column of tick labels needs (about 0.6 em per character)."""
    longest = max((len(str(v)) for v in names), default=0)
    return 0.3 + longest * fontsize * 0.6 / 72


def group_styles(labels: Sequence) -> dict:
    """One (colour, marker) per distinct label, in order of first appearance.

    Colours cycle every 7 groups and markers every 8, so the first 56 groups
    all differ in one or both."""
    out = {}
    for label in labels:
        if label not in out:
            i = len(out)
            out[label] = (GROUP_COLOURS[i % len(GROUP_COLOURS)], MARKERS[i % len(MARKERS)])
    return out


#: zlib level of the PNG files (Pillow's default is 6): the same pixels; on the demo report's 28 figures 0.30 s of
#: CPU to encode instead of 0.44 s, for files 0.9 % larger (reports/benchmarks.md, 2026-12-05)
PNG_COMPRESS_LEVEL = 3


def figure_png(fig_or_ax) -> bytes:
    """The figure (or the figure an Axes belongs to) rendered as PNG bytes."""
    fig = getattr(fig_or_ax, "figure", fig_or_ax)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, metadata={"Software": None},
                pil_kwargs={"compress_level": PNG_COMPRESS_LEVEL})
    return buf.getvalue()


#: the caution's type at the foot of a figure written alone, and its characters a line (:func:`caution_footer`)
CAUTION_FONTSIZE = 5.5
CAUTION_WRAP = 150


def caution_footer(fig) -> None:
    """The caution in full, wrapped, in small grey type at the foot of ``fig``: a figure written to a file of
    its own (``running --chart``, ``space --png``) carries it as every text does; the figure leaves room for
    it at its foot."""
    import textwrap

    from linkage import CAUTION

    fig.text(0.01, 0.01, "\n".join(textwrap.wrap(CAUTION, CAUTION_WRAP)), fontsize=CAUTION_FONTSIZE,
             color="#555555", va="bottom")


def png_data_uri(fig_or_ax) -> str:
    """``data:image/png;base64,...`` of a figure, for an ``<img src>``."""
    return "data:image/png;base64," + base64.b64encode(figure_png(fig_or_ax)).decode("ascii")


def _limit_bounds(limit) -> tuple[float | None, float | None]:
    """(min, max) of a spec limit given as an object with ``min``/``max``, a
    mapping, a pair, or None."""
    if limit is None:
        return None, None
    if isinstance(limit, Mapping):
        return limit.get("min"), limit.get("max")
    if isinstance(limit, (tuple, list)):
        return limit[0], limit[1]
    return getattr(limit, "min", None), getattr(limit, "max", None)


def draw_limits(ax, limit, *, axis: str = "y", label: bool = True) -> int:
    """Draw a spec limit as dashed lines across ``ax`` (horizontal for
    ``axis="y"``, vertical for ``"x"``); returns how many lines were drawn."""
    lo, hi = _limit_bounds(limit)
    n = 0
    for value, text in ((lo, "spec min"), (hi, "spec max")):
        if value is None or not np.isfinite(value):
            continue
        line = ax.axhline if axis == "y" else ax.axvline
        line(value, label=text if label else None, **LIMIT_STYLE)
        n += 1
    return n


def _finite(*arrays) -> np.ndarray:
    keep = np.ones(len(arrays[0]), dtype=bool)
    for a in arrays:
        keep &= np.isfinite(np.asarray(a, float))
    return keep


def _sort_key(label) -> tuple:
    """Numbers (``"2.5 mm"``) in numeric order, then text in text order."""
    text = str(label)
    try:
        return (0, float(text.split()[0]), text)
    except (ValueError, IndexError):
        return (1, 0.0, text)


def plain(text, max_chars: int | None = None) -> str:
    """User text for a figure: ``$`` escaped so that matplotlib never reads
    a lot name as mathtext (an unbalanced or odd one would fail to render),
    and cut to ``max_chars`` with an ellipsis (tick labels stay short)."""
    text = str(text)
    if max_chars is not None and len(text) > max_chars:
        text = text[: max_chars - 1] + "…"
    return text.replace("$", r"\$")


#: longest lot name shown as a tick label or annotation
LOT_CHARS = 14

#: font size of the lot names along a time axis [pt]: about 12 px in the PNG, legible at the report's width
#: (6 pt, about 8 px and smaller still where a figure is scaled down, was barely legible); ticks are thinned
#: to fit instead of shrinking the font
LOT_TICK_SIZE = 8.5
#: room a lot name rotated upright takes along the axis, in multiples of its font size (one line and a gap)
LOT_TICK_ROOM = 1.8


def lot_axis_bottom(lots: Sequence, *, fontsize: float = LOT_TICK_SIZE) -> float:
    """Room below a time axis for the lots' names upright at ``fontsize`` (at most LOT_CHARS characters,
    about 0.6 em each) and the axis label under them [inch]."""
    longest = min(max((len(str(v)) for v in lots), default=0), LOT_CHARS)
    return 0.55 + longest * fontsize * 0.6 / 72


def lot_ticks(ax, lots: Sequence, *, fontsize: float = LOT_TICK_SIZE) -> list[int]:
    """Name the lots along the x axis (lot i at x = i, in time order) at ``fontsize``, rotated upright,
    every k-th lot with k the smallest step whose names fit the axis's width side by side; returns the
    positions named. Call once the figure has its size and layout."""
    n = len(lots)
    width_pt = ax.get_position().width * ax.figure.get_figwidth() * 72
    room = max(1, int(width_pt // (LOT_TICK_ROOM * fontsize)))
    step = max(1, -(-n // room))
    ticks = list(range(0, n, step))
    ax.set_xticks(ticks, [plain(lots[i], LOT_CHARS) for i in ticks], rotation=90, fontsize=fontsize)
    return ticks



#: the legend entry of the lots drawn hollow in the per-attribute figures
SET_ASIDE_LABEL = "set aside since training"
#: the drawing order of those hollow points: above the filled points (matplotlib draws collections at zorder 1),
#: so that a lot set aside is not hidden under the lots drawn after its group
HOLLOW_ZORDER = 3


def _scatter_groups(ax, x, y, groups, *, size=28, alpha=0.85, legend_title=None, max_legend=12, marked=None):
    """Points coloured and shaped by group (the same group, the same style in every figure); ``marked`` (bools):
    points drawn hollow in their group's colour, with one legend entry :data:`SET_ASIDE_LABEL`."""
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    hollow = np.zeros(len(x), bool) if marked is None else np.asarray(marked, bool)
    if groups is None:
        groups = np.full(len(x), None, dtype=object)
        styles = {None: (BLUE, "o")}
    else:
        groups = np.asarray([("(none)" if g is None or (isinstance(g, float) and np.isnan(g)) else g)
                             for g in groups], dtype=object)
        styles = group_styles(sorted(set(groups), key=_sort_key))  # same group, same style in every figure
    for g, (colour, marker) in styles.items():
        m = (groups == g) if g is not None else np.ones(len(x), bool)
        label = plain(g, 24) if g is not None and len(styles) <= max_legend else None
        ax.scatter(x[m & ~hollow], y[m & ~hollow], s=size, color=colour, marker=marker, alpha=alpha,
                   edgecolors="white", linewidths=0.4, label=label)
        if (m & hollow).any():
            ax.scatter(x[m & hollow], y[m & hollow], s=size * 1.4, facecolors="none", edgecolors=colour,
                       marker=marker, linewidths=1.3, zorder=HOLLOW_ZORDER)  # on top of every group's filled points
    if hollow.any():  # one legend entry for the hollow points of every group
        ax.scatter([], [], s=size * 1.4, facecolors="none", edgecolors=BLACK, marker="o", linewidths=1.3,
                   label=SET_ASIDE_LABEL)
    if 1 < len(styles) <= max_legend or hollow.any():
        ax.legend(title=legend_title, fontsize=7, title_fontsize=7, loc="best", framealpha=0.8)


# ---------------------------------------------------------------- data

def plot_completeness(present, *, ax=None):
    """Which lot has which table: ``present`` is a boolean DataFrame, lots
    (in time order) as rows, tables as columns."""
    from matplotlib.colors import ListedColormap

    n_lots, n_tables = present.shape
    ax = new_axes(ax, panel=(7.6, 0.28 * n_tables + 0.3), left=label_margin(present.columns) + 0.3,
                  bottom=lot_axis_bottom(present.index))
    data = np.asarray(present, dtype=float).T
    ax.imshow(data, aspect="auto", interpolation="nearest", cmap=ListedColormap(["#f2f2f2", BLUE]),
              vmin=0, vmax=1)
    ax.set_yticks(range(n_tables), [plain(c) for c in present.columns], fontsize=8)
    lot_ticks(ax, list(present.index))
    ax.set_xlabel("lot (time order) [-]")
    ax.set_ylabel("table [-]")
    ax.set_title("Results present per lot (blue) and missing (grey)", fontsize=9)
    return ax


# ---------------------------------------------------------------- ribbon stage

def plot_ribbon_fit(force, porosity, gap, curves: Mapping | None = None, *, limit=None, ax=None):
    """Ribbon porosity against roll force, coloured by roll gap, with the
    fitted stage model's curve for each gap (``curves``: gap -> (force grid,
    predicted porosity))."""
    ax = new_axes(ax, panel=(6.0, 3.4))
    force = np.asarray(force, float)
    porosity = np.asarray(porosity, float)
    gap = np.asarray(gap, float)
    keep = _finite(force, porosity, gap)
    labels = np.array([f"{g:g} mm" for g in gap], dtype=object)
    order = np.argsort(gap[keep], kind="stable")
    _scatter_groups(ax, force[keep][order], porosity[keep][order], labels[keep][order],
                    legend_title="roll gap")
    styles = group_styles(sorted(set(labels[keep]), key=_sort_key))
    for g, (fx, fy) in (curves or {}).items():
        colour = styles.get(f"{float(g):g} mm", (GREY, None))[0]
        ax.plot(fx, fy, color=colour, linewidth=1.6)
    draw_limits(ax, limit, axis="y")
    ax.set_xlabel(axis_label("roll_force_kn_per_cm"))
    ax.set_ylabel(axis_label("ribbon_porosity"))
    ax.grid(alpha=0.3)
    return ax


# ---------------------------------------------------------------- baseline

def plot_rd_fit(porosity, strength, s0: float | None, k: float | None, *, name: str = "tensile_strength_mpa",
                limit=None, groups=None, ax=None):
    """Measured strength against ribbon porosity with the Ryshkewitch-Duckworth
    curve sigma = s0 exp(-k eps) across the data range."""
    ax = new_axes(ax, panel=(4.2, 3.0))
    porosity = np.asarray(porosity, float)
    strength = np.asarray(strength, float)
    keep = _finite(porosity, strength)
    _scatter_groups(ax, porosity[keep], strength[keep],
                    None if groups is None else np.asarray(groups, dtype=object)[keep])
    if s0 is not None and k is not None and keep.any():
        e = np.linspace(porosity[keep].min(), porosity[keep].max(), 100)
        sign = "−" if k >= 0 else "+"
        ax.plot(e, s0 * np.exp(-k * e), color=BLACK, linewidth=1.6,
                label=f"fit {s0:.3g}·exp({sign}{abs(k):.3g}·ε)")
    draw_limits(ax, limit, axis="y")
    ax.set_xlabel(axis_label("ribbon_porosity"))
    ax.set_ylabel(axis_label(name))
    ax.legend(fontsize=7, loc="best", framealpha=0.8)
    ax.grid(alpha=0.3)
    return ax


# ---------------------------------------------------------------- per attribute

def plot_predicted_observed(observed, predicted, *, name: str, groups=None, group_title: str | None = None,
                            limit=None, ax=None, marked=None):
    """Cross-validated (out-of-fold) prediction against observation, with the
    line of identity; spec limits on both axes. ``marked``: lots drawn hollow (set aside since training)."""
    ax = new_axes(ax, panel=(3.4, 3.2))
    obs = np.asarray(observed, float)
    pred = np.asarray(predicted, float)
    keep = _finite(obs, pred)
    _scatter_groups(ax, obs[keep], pred[keep],
                    None if groups is None else np.asarray(groups, dtype=object)[keep],
                    legend_title=group_title, marked=None if marked is None else np.asarray(marked, bool)[keep])
    if keep.any():
        lo = float(min(obs[keep].min(), pred[keep].min()))
        hi = float(max(obs[keep].max(), pred[keep].max()))
        pad = 0.04 * (hi - lo or abs(hi) or 1.0)
        ax.plot([lo - pad, hi + pad], [lo - pad, hi + pad], color=GREY, linewidth=1, label="identity")
    draw_limits(ax, limit, axis="x", label=False)
    draw_limits(ax, limit, axis="y", label=True)
    ax.set_xlabel("observed " + axis_label(name))
    ax.set_ylabel("predicted (out-of-fold) " + axis_label(name))
    ax.grid(alpha=0.3)
    return ax


def plot_residuals_in_time(lots: Sequence, residuals, *, name: str, groups=None, noise_floor: float | None = None,
                           ax=None, marked=None):
    """Out-of-fold residuals (observed - predicted) lot by lot in time order,
    with the measurement noise floor shaded when it is known. ``marked``: lots drawn hollow (set aside since
    training)."""
    ax = new_axes(ax, panel=(4.6, 3.2), bottom=lot_axis_bottom(lots))
    r = np.asarray(residuals, float)
    x = np.arange(len(r))
    keep = np.isfinite(r)
    ax.axhline(0, color=GREY, linewidth=1)
    if noise_floor is not None and np.isfinite(noise_floor) and noise_floor > 0:
        ax.axhspan(-noise_floor, noise_floor, color=SKY, alpha=0.25, linewidth=0,
                   label=f"± noise floor ({noise_floor:.3g})")
    ax.vlines(x[keep], 0, r[keep], color="#b0b0b0", linewidth=0.8)
    _scatter_groups(ax, x[keep], r[keep], None if groups is None else np.asarray(groups, dtype=object)[keep],
                    size=20, marked=None if marked is None else np.asarray(marked, bool)[keep])
    lot_ticks(ax, lots)
    ax.set_xlabel("lot, in time order [-]")
    ax.set_ylabel("residual, observed − predicted [" + axis_label(name).rsplit("[", 1)[-1])
    if ax.get_legend_handles_labels()[0]:
        ax.legend(fontsize=7, loc="best", framealpha=0.8)
    ax.grid(alpha=0.3, axis="y")
    return ax


# ---------------------------------------------------------------- explanations

def plot_contribution_summary(contributions, values, *, name: str, max_inputs: int = 12, ax=None):
    """Summary of per-lot contributions (SHAP values, or exact linear terms
    for PLS): one row per input, most important on top, one dot per lot at
    its contribution, coloured by the input's value (low dark, high light)."""
    from matplotlib.colors import Normalize

    contributions = contributions.astype(float)
    order = contributions.abs().mean().sort_values(ascending=True)
    order = order.index[-max_inputs:]
    ax = new_axes(ax, panel=(4.2, 0.4 * len(order) + 0.4), left=label_margin(order) + 0.35, right=1.1)
    rng = np.random.default_rng(0)  # jitter only; seeded so the figure is stable
    cmap = None
    for row, col in enumerate(order):
        c = contributions[col].to_numpy(float)
        v = np.asarray(values[col], float) if col in values else np.full(len(c), np.nan)
        finite_v = v[np.isfinite(v)]
        norm = Normalize(*(np.nanpercentile(finite_v, [5, 95]) if finite_v.size else (0, 1)))
        y = row + rng.uniform(-0.28, 0.28, size=len(c))
        colour = np.where(np.isfinite(v), v, np.nanmedian(finite_v) if finite_v.size else 0.0)
        cmap = ax.scatter(c, y, c=norm(colour), cmap=CMAP, vmin=0, vmax=1, s=14, alpha=0.9, linewidths=0)
    ax.axvline(0, color=GREY, linewidth=1)
    ax.set_yticks(range(len(order)), [plain(o) for o in order], fontsize=8)
    ax.set_xlabel(f"contribution to {axis_label(name)}")
    ax.set_ylabel("input [-]")
    if cmap is not None:
        bar = ax.figure.colorbar(cmap, ax=ax, ticks=[0, 1], pad=0.01, fraction=0.04)
        bar.ax.set_yticklabels(["low", "high"], fontsize=7)
        bar.set_label("input value (5th-95th percentile) [-]", fontsize=7)
    ax.grid(alpha=0.3, axis="x")
    return ax


def plot_vip(vip: Mapping[str, float], *, name: str, ax=None):
    """Variable importance in projection of a PLS model, with the usual
    threshold of 1 (Wold et al. 1993; Chong & Jun 2005)."""
    items = sorted(vip.items(), key=lambda kv: kv[1])
    ax = new_axes(ax, panel=(3.6, 0.36 * len(items) + 0.4), left=label_margin([k for k, _ in items]) + 0.35)
    values = [float(v) for _, v in items]
    ax.barh(range(len(items)), values, color=[BLUE if v >= 1 else SKY for v in values])
    ax.axvline(1.0, color=BLACK, linestyle=":", linewidth=1.2, label="VIP = 1")
    ax.set_yticks(range(len(items)), [plain(k) for k, _ in items], fontsize=8)
    ax.set_xlabel(f"VIP for {name} [-]")
    ax.set_ylabel("input [-]")
    ax.legend(fontsize=7, loc="lower right")
    ax.grid(alpha=0.3, axis="x")
    return ax


def plot_porosity_curve(grid, mean, low, high, *, name: str, level: float, limit=None, observed=None,
                        window: tuple[float | None, float | None] | None = None, ax=None):
    """An attribute against ribbon porosity through the chain: the chain of
    mean predictions and the central ``level`` band of simulated lots; the
    training lots (``observed``: (porosity, value)) as dots, spec limits
    dashed, the porosity window shaded when given."""
    ax = new_axes(ax, panel=(3.0, 2.3))
    grid = np.asarray(grid, float)
    if window is not None and window[0] is not None and window[1] is not None:
        ax.axvspan(window[0], window[1], color=GREEN, alpha=0.15, linewidth=0, label="window")
    ax.fill_between(grid, np.asarray(low, float), np.asarray(high, float), color=BLUE, alpha=0.22, linewidth=0,
                    label=f"{level:.0%} of lots")
    ax.plot(grid, np.asarray(mean, float), color=BLUE, linewidth=1.6, label="mean")
    if observed is not None:
        ox, oy = (np.asarray(a, float) for a in observed)
        keep = _finite(ox, oy)
        ax.scatter(ox[keep], oy[keep], s=9, color=BLACK, alpha=0.5, linewidths=0, label="training lots")
    draw_limits(ax, limit, axis="y")
    ax.set_xlabel(axis_label("ribbon_porosity"), fontsize=8)
    ax.set_ylabel(axis_label(name), fontsize=8)
    ax.tick_params(labelsize=7)
    ax.legend(fontsize=6, loc="best", framealpha=0.8)
    ax.grid(alpha=0.3)
    return ax


# ---------------------------------------------------------------- window

def plot_window_probability(grid, p_all, p_each: Mapping[str, Sequence[float]], *, confidence: float,
                            low: float | None, high: float | None, mean_low: float | None = None,
                            mean_high: float | None = None, ax=None, p_all_low=None,
                            assurance: float | None = None, p_all_low_pointwise=None):
    """Probability that a lot meets every specification (thick) and each one
    (thin) against ribbon porosity, the confidence line, the window shaded
    and the mean-response window marked; ``p_all_low``, the lower bound at
    ``assurance`` of the first over the window at once, thick and dashed;
    ``p_all_low_pointwise``, the bound for one porosity alone, thin dash-dot."""
    ax = new_axes(ax, panel=(5.6, 3.2), right=2.5)
    grid = np.asarray(grid, float)
    if low is not None and high is not None:
        ax.axvspan(low, high, color=GREEN, alpha=0.18, linewidth=0,
                   label=f"window {low:.3f} – {high:.3f}")
    if mean_low is not None and mean_high is not None:
        for v in (mean_low, mean_high):
            ax.axvline(v, color=GREY, linestyle=":", linewidth=1.2)
        ax.plot([], [], color=GREY, linestyle=":", label="mean-response window")
    styles = group_styles(list(p_each))
    for name, p in p_each.items():
        colour, marker = styles[name]
        ax.plot(grid, np.asarray(p, float), color=colour, linewidth=1.1, marker=marker,
                markevery=max(1, len(grid) // 10), markersize=4, label=f"P(pass {name})")
    ax.plot(grid, np.asarray(p_all, float), color=BLACK, linewidth=2.4,
            label="P(pass all)" if p_all_low is None else "P(pass all), point estimate")
    if p_all_low is not None:
        ax.plot(grid, np.asarray(p_all_low, float), color=BLACK, linewidth=2.4, linestyle=(0, (4, 2)),
                label=f"P(pass all), lower bound ({percent_text(assurance)} assurance)" if assurance else
                "P(pass all), lower bound")
    if p_all_low_pointwise is not None:
        ax.plot(grid, np.asarray(p_all_low_pointwise, float), color=BLACK, linewidth=0.9, linestyle="-.",
                label="P(pass all), bound at one porosity alone")
    ax.axhline(confidence, color=VERMILION, linestyle="--", linewidth=1.4,
               label=f"confidence {percent_text(confidence)}")
    ax.set_ylim(-0.02, 1.02)
    ax.set_xlabel(axis_label("ribbon_porosity"))
    ax.set_ylabel("probability of meeting the specification [-]")
    ax.legend(fontsize=7, loc="center left", bbox_to_anchor=(1.01, 0.5), framealpha=0.9)
    ax.grid(alpha=0.3)
    return ax


def plot_roll_force(force, porosity_mean, p_in, *, low: float | None, high: float | None,
                    force_low: float | None, force_high: float | None, confidence: float, observed=None, ax=None):
    """Predicted lot-mean ribbon porosity against roll force (held settings
    as stated in the report), the porosity window as a band, and the roll
    force range that lands in it with the confidence; ``p_in`` on a second axis."""
    ax = new_axes(ax, panel=(5.0, 3.0), right=3.3)
    force = np.asarray(force, float)
    if low is not None and high is not None:
        ax.axhspan(low, high, color=GREEN, alpha=0.18, linewidth=0, label="porosity window")
    if force_low is not None and force_high is not None:
        ax.axvspan(force_low, force_high, color=ORANGE, alpha=0.2, linewidth=0,
                   label=f"roll force {force_low:.2f} – {force_high:.2f} kN/cm")
    if observed is not None:
        ox, oy = (np.asarray(a, float) for a in observed)
        keep = _finite(ox, oy)
        ax.scatter(ox[keep], oy[keep], s=10, color=GREY, alpha=0.6, linewidths=0, label="training lots")
    ax.plot(force, np.asarray(porosity_mean, float), color=BLUE, linewidth=1.8, label="predicted porosity (mean)")
    ax.set_xlabel(axis_label("roll_force_kn_per_cm"))
    ax.set_ylabel(axis_label("ribbon_porosity"))
    ax.grid(alpha=0.3)
    twin = ax.twinx()
    twin.plot(force, np.asarray(p_in, float), color=PURPLE, linewidth=1.2, linestyle="-.",
              label="P(lot mean in window)")
    twin.axhline(confidence, color=VERMILION, linestyle="--", linewidth=1.2,
                 label=f"confidence {percent_text(confidence)}")
    twin.set_ylim(-0.02, 1.02)
    twin.set_ylabel("P(lot-mean porosity in window) [-]")
    h1, l1 = ax.get_legend_handles_labels()
    h2, l2 = twin.get_legend_handles_labels()
    ax.legend(h1 + h2, l1 + l2, fontsize=7, loc="center left", bbox_to_anchor=(1.2, 0.5), framealpha=0.9)
    return ax


# ---------------------------------------------------------------- domain

def plot_domain(t2, q, *, t2_limit: float | None, q_limit: float | None, lots: Sequence | None = None,
                stage: str = "", ax=None):
    """Applicability domain of a stage: Hotelling's T² against the Q residual
    (squared prediction error) of each training lot, with both limits; lots
    beyond a limit are named."""
    ax = new_axes(ax, panel=(3.2, 2.6))
    t2 = np.asarray(t2, float)
    q = np.asarray(q, float)
    keep = _finite(t2, q)
    out = np.zeros(len(t2), dtype=bool)
    if t2_limit is not None and np.isfinite(t2_limit):
        out |= t2 > t2_limit
        ax.axvline(t2_limit, color=VERMILION, linestyle="--", linewidth=1.3, label=f"T² limit {t2_limit:.3g}")
    if q_limit is not None and np.isfinite(q_limit):
        out |= q > q_limit
        ax.axhline(q_limit, color=VERMILION, linestyle="-.", linewidth=1.3, label=f"Q limit {q_limit:.3g}")
    ax.scatter(t2[keep & ~out], q[keep & ~out], s=16, color=BLUE, marker="o", linewidths=0, alpha=0.8,
               label="inside both limits")
    if (keep & out).any():
        ax.scatter(t2[keep & out], q[keep & out], s=26, color=ORANGE, marker="^", linewidths=0,
                   label="beyond a limit")
        if lots is not None:
            for i in np.flatnonzero(keep & out)[:15]:
                ax.annotate(plain(lots[i], LOT_CHARS), (t2[i], q[i]), fontsize=6, xytext=(3, 3),
                            textcoords="offset points")
    ax.set_xlabel("Hotelling's T² [-]")
    ax.set_ylabel("Q residual (SPE) [-]")
    if stage:
        ax.set_title(f"{stage} stage", fontsize=9)
    ax.legend(fontsize=6, loc="best", framealpha=0.8)
    ax.grid(alpha=0.3)
    return ax


# ---------------------------------------------------------------- drift watch

def plot_alarm_statistic(lots: Sequence, t2, *, h: float, signalled=None, lam: float | None = None, ax=None):
    """The drift watch's alarm (:func:`linkage.decide.watch.mewma_look`): the multivariate EWMA's T² of each lot
    since training in time order against its limit ``h`` (a dashed horizontal line), the lots it signals on
    (``signalled``, bools) filled in vermilion. Drawn apart from the per-attribute charts, whose EWMA is another
    (λ 0.2, for diagnosis): this is the statistic that raises the alarm."""
    ax = new_axes(ax, panel=(4.6, 2.8), bottom=lot_axis_bottom(lots))
    v = np.asarray(t2, float)
    x = np.arange(len(v))
    hit = np.zeros(len(v), bool) if signalled is None else np.asarray(signalled, bool)
    ax.axhline(h, color=VERMILION, linestyle="--", linewidth=1.2, label=f"limit h = {h:.2f}")
    ax.plot(x, v, color=BLUE, linewidth=1.0, zorder=1)
    ax.scatter(x[~hit], v[~hit], s=18, color=BLUE, marker="s", label="below h", zorder=2)
    if hit.any():
        ax.scatter(x[hit], v[hit], s=30, color=VERMILION, marker="s", label="alarm (above h)", zorder=3)
    ax.set_ylim(bottom=0)  # T² is a squared distance
    lot_ticks(ax, lots)
    ax.set_xlabel("lot since training, in time order [-]")
    ax.set_ylabel("T² [-]")
    ax.set_title("multivariate EWMA" + (f" (λ {lam:g})" if lam is not None else "") + " of all attributes",
                 fontsize=8)
    ax.legend(fontsize=6, loc="best", framealpha=0.8)
    ax.grid(alpha=0.3, axis="y")
    return ax


def plot_control_chart(lots: Sequence, values, *, centre: float, limits: tuple[float, float], name: str,
                       ewma=None, ewma_low=None, ewma_high=None, new=None, flagged=None, ylabel: str | None = None,
                       ax=None):
    """An individuals chart in time order: centre line, ±3σ limits (dashed),
    the EWMA and its limits (thin), lots since training filled, flagged lots
    ringed in vermilion."""
    ax = new_axes(ax, panel=(4.6, 2.8), bottom=lot_axis_bottom(lots))
    v = np.asarray(values, float)
    x = np.arange(len(v))
    new = np.zeros(len(v), bool) if new is None else np.asarray(new, bool)
    flagged = np.zeros(len(v), bool) if flagged is None else np.asarray(flagged, bool)
    ax.axhline(centre, color=GREY, linewidth=1)
    for lim in limits:
        ax.axhline(lim, color=VERMILION, linestyle="--", linewidth=1.2)
    ax.plot(x, v, color="#b0b0b0", linewidth=0.8, zorder=1)
    ax.scatter(x[~new], v[~new], s=16, facecolor="white", edgecolor=BLUE, label="training lots", zorder=2)
    if new.any():
        ax.scatter(x[new], v[new], s=18, color=BLUE, marker="s", label="since training", zorder=2)
    if flagged.any():
        ax.scatter(x[flagged], v[flagged], s=70, facecolor="none", edgecolor=VERMILION, linewidth=1.5,
                   label="flagged", zorder=3)
    if ewma is not None:
        ax.plot(x, ewma, color=ORANGE, linewidth=1.2, label="EWMA (λ 0.2)")
        ax.plot(x, ewma_low, color=ORANGE, linewidth=0.7, linestyle=":")
        ax.plot(x, ewma_high, color=ORANGE, linewidth=0.7, linestyle=":")
    lot_ticks(ax, lots)
    ax.set_xlabel("lot, in time order [-]")
    ax.set_ylabel(ylabel or axis_label(name))
    ax.set_title(plain(name), fontsize=8)
    ax.legend(fontsize=6, loc="best", framealpha=0.8)
    ax.grid(alpha=0.3, axis="y")
    return ax
