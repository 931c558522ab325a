"""The design-space map: its figure and its section of the HTML report.

Compute first (:func:`linkage.decide.space.design_space`), then draw
(:func:`plot_space`); matplotlib is imported inside the drawing function.
"""

from __future__ import annotations

from functools import partial

import numpy as np

from linkage import CAUTION
from linkage.decide.defaults import MAP_GRID
from linkage.numbers import percent_text


#: inches added at the foot of a map drawn with the caution under it (:func:`plot_space`, ``caution=True``)
CAUTION_ROOM = 0.35


def plot_space(result, lots_x=None, lots_y=None, *, trained=None, ax=None, caution: bool = False):
    """Filled contours of the lower bound of P(all pass) (the point estimate
    without one) over the two mapped settings; the confidence contour of the
    bound (solid) and of the point estimate (dashed); the applicability-domain
    boundary (thick grey; outside it hatched); the lots (open dots: the
    training lots; filled squares: the others, where ``trained``, one bool a
    lot, says which is which; every lot is a training lot without it); the
    acceptable ranges' box and the suggested set point. Units on both axes.
    ``caution``: the caution in full at the figure's foot (``space --png``: a map with acceptable ranges and a
    set point, written alone, carries it as ``running --chart`` does; the report says it in its own words)."""
    from linkage.report.figures import BLACK, BLUE, CMAP, GREY, VERMILION, axis_label, caution_footer, new_axes

    ax = new_axes(ax, panel=(5.6, 4.2), right=1.3, bottom=1.45 + (CAUTION_ROOM if caution else 0.0))
    if caution:
        caution_footer(ax.figure)
    X, Y = np.meshgrid(result.xs, result.ys)
    surface = result.surface
    filled = ax.contourf(X, Y, surface, levels=np.linspace(0, 1, 11), cmap=CMAP, vmin=0, vmax=1)
    bar = ax.figure.colorbar(filled, ax=ax, fraction=0.05, pad=0.03)
    bar.set_label("lower bound of P(all pass) [-]" if result.p_all_low is not None else "P(all pass) [-]",
                  fontsize=8)
    handles, labels = [], []
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch, Rectangle

    if np.nanmin(surface) < result.confidence < np.nanmax(surface):
        ax.contour(X, Y, surface, levels=[result.confidence], colors=[VERMILION], linewidths=2.0)
        handles.append(Line2D([], [], color=VERMILION, linewidth=2.0))
        labels.append(f"conservative boundary (bound = {percent_text(result.confidence)})"
                      if result.p_all_low is not None else
                      f"estimated boundary (P = {percent_text(result.confidence)})")
    if result.p_all_low is not None and np.nanmin(result.p_all) < result.confidence < np.nanmax(result.p_all):
        ax.contour(X, Y, result.p_all, levels=[result.confidence], colors=[VERMILION], linewidths=1.2,
                   linestyles="--")
        handles.append(Line2D([], [], color=VERMILION, linewidth=1.2, linestyle="--"))
        labels.append(f"estimated boundary (point estimate = {percent_text(result.confidence)})")
    mask = result.in_domain.astype(float)
    if 0 < mask.sum() < mask.size:
        ax.contour(X, Y, mask, levels=[0.5], colors=[GREY], linewidths=2.6)
        ax.contourf(X, Y, mask, levels=[-0.5, 0.5], colors="none", hatches=["xx"])
        handles += [Line2D([], [], color=GREY, linewidth=2.6), Patch(facecolor="none", hatch="xx", edgecolor=GREY)]
        labels += ["applicability-domain boundary", "outside the domain"]
    if lots_x is not None and lots_y is not None:
        lx, ly = np.asarray(lots_x, float), np.asarray(lots_y, float)
        keep = np.isfinite(lx) & np.isfinite(ly)
        was = np.ones(len(lx), bool) if trained is None else np.asarray(trained, bool)
        ax.scatter(lx[keep & was], ly[keep & was], s=16, color="white", edgecolor=BLACK, linewidth=0.8, zorder=4,
                   clip_on=False)
        handles.append(Line2D([], [], marker="o", linestyle="", markerfacecolor="white", markeredgecolor=BLACK))
        labels.append(f"training lots ({int((keep & was).sum())})")
        if (keep & ~was).any():
            ax.scatter(lx[keep & ~was], ly[keep & ~was], s=18, marker="s", color=BLACK, zorder=4, clip_on=False)
            handles.append(Line2D([], [], marker="s", linestyle="", color=BLACK))
            labels.append(f"lots not trained on ({int((keep & ~was).sum())})")
    ar = result.ranges or {}
    if ar.get("found"):
        (x0, x1), (y0, y1) = ar["ranges"][result.x], ar["ranges"][result.y]
        ax.add_patch(Rectangle((x0, y0), x1 - x0, y1 - y0, fill=False, edgecolor=BLUE, linewidth=2.0, zorder=5))
        sp = ar["set_point"]
        ax.plot([sp[result.x]], [sp[result.y]], marker="*", markersize=13, color=BLUE, markeredgecolor="white",
                zorder=6, linestyle="")
        handles += [Patch(facecolor="none", edgecolor=BLUE, linewidth=2.0),
                    Line2D([], [], marker="*", linestyle="", color=BLUE, markersize=11)]
        labels += ["acceptable ranges", "suggested set point"]
    ax.set_xlabel(axis_label(result.x))
    ax.set_ylabel(axis_label(result.y))
    ax.set_xlim(result.xs[0], result.xs[-1])
    ax.set_ylim(result.ys[0], result.ys[-1])
    if handles:
        ax.legend(handles, labels, fontsize=7, loc="upper left", bbox_to_anchor=(-0.1, -0.13), ncol=3,
                  framealpha=0.9)
    return ax


def space_section(b, chain, table, spec, *, confidence: float = 0.9, assurance: float = 0.9, seed: int = 0,
                  n_grid: int = MAP_GRID, result=None, refused=None) -> None:
    """The report section: the map over roll force × gap, the acceptable
    ranges and the held settings; a note instead when it cannot be made.
    ``result``: the map already computed with these arguments (reused, or
    computed beside the report; issue 20), else it is computed here.
    ``refused``: the error computing it beside the report raised (the note
    says it; the map is not computed again)."""
    from linkage.decide.space import FORCE, GAP, design_space
    from linkage.exceptions import LinkageError
    from linkage.report.html import _part, table_html

    b.section("space", "Design space: probability of passing over roll force and gap")
    if spec is None:
        b.note("No map: give a specification (--spec) to map the probability of passing.")
        return
    if refused is not None:
        b.note(f"No map: {refused}")
        return
    try:
        r = result if result is not None else design_space(chain, spec, x=FORCE, y=GAP, n_grid=n_grid,
                                                           confidence=confidence, assurance=assurance, seed=seed)
    except LinkageError as exc:
        b.note(f"No map: {exc}")
        return
    lots_x = table[FORCE] if FORCE in table.columns else None
    lots_y = table[GAP] if GAP in table.columns else None
    trained = chain.trained_on(table["lot"])
    make = partial(plot_space, r, lots_x, lots_y, trained=trained)  # made where it is drawn, and not when kept
    what = "lower bound" if r.p_all_low is not None else "point estimate"
    b.figure(make, f"The {what} of the probability that a lot meets every specification at once "
                 f"({', '.join(r.attributes)}, lot means) over specific roll force and roll gap, through the whole "
                 f"chain; other settings held coherently at each point: {r.held_rule}. Solid line: the {what} "
                 f"reaches {percent_text(r.confidence)}"
                 + (f" ({percent_text(r.assurance)} assurance, {r.bound['n_replicates']} lot-level bootstrap "
                    "replicates; the conservative boundary); dashed: the point estimate does (the estimated "
                    "boundary, the best estimate of the true one)" if r.p_all_low is not None else "")
                 + ". Grey line and hatching: the applicability-domain boundary (Hotelling T², Q and training "
                   "ranges of every stage at the held point); no probability is promised outside it. Open dots: the "
                   "training lots" + ("" if trained.all() else f" ({int(trained.sum())}); filled squares: the lots the "
                                      f"model was not trained on ({int((~trained).sum())})")
                 + ". Blue box and star: the acceptable ranges and the suggested set point.")
    if getattr(r, "lot_values_note", None):  # a map kept by an earlier version has none
        b.add(_part("sections", "space_lot_means", text=r.lot_values_note))
    ar = r.ranges
    if ar.get("found"):
        rows = [[k, f"{lo:.4g}", f"{hi:.4g}", "mapped"] for k, (lo, hi) in ar["ranges"].items()]
        rows += [[k, f"{lo:.4g}", f"{hi:.4g}", "held (follows the mapped settings)"]
                 for k, (lo, hi) in ar["held_over_box"].items()]
        b.add(_part("sections", "space_ranges", what=what, confidence=r.confidence,
                    n_points=ar["grid_cells"]["n_points"]))
        b.add(table_html(["setting", "low", "high", "how"], rows, num_cols={1, 2}))
        b.add(_part("sections", "space_set_point", values=list({**ar["set_point"], **ar["held_at_set_point"]}.items())))
    else:
        b.add(_part("sections", "space_no_ranges", reason=ar.get("reason")))
    b.add(_part("sections", "space_domain", inside=int(r.in_domain.sum()), total=r.in_domain.size, caution=CAUTION))
