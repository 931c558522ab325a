"""The report: one self-contained HTML file.

Figures are PNG images embedded as ``data:`` URIs; there is no script, no
style sheet or font from elsewhere and no link out of the file, so it opens
offline in any browser and can be mailed or archived as it is. Where a
section cannot be drawn, the report says why in its place.

The HTML is in jinja2 templates (``linkage/report/templates/``, loaded by
:mod:`linkage.report.templating`, autoescape on): this module computes each
section's numbers and sentences and hands them to a template's macro, so
every lot name, product, compactor, note and other piece of text that came
from a user's files is escaped (as :func:`html.escape` escapes) wherever it
is placed. The window and the design-space map may be reused from earlier
commands (:mod:`linkage.models.reuse`; the section says so); the map and the
drift watch are computed beside the other sections, and the figures drawn
in two processes (:mod:`linkage.report.background`).

Sections:

1. At a glance: the window, the roll force, the models chosen.
2. The lots: how many, which tables each has, the ranges, which lots a
   model left out and why, and the notes of the assembly.
3. Ribbon stage: porosity against roll force by roll gap, with the fit.
4. Strength-porosity baseline: fits of the Ryshkewitch-Duckworth form
   against ribbon porosity, with their standard errors.
5. Attribute by attribute: cross-validated predicted against observed,
   residuals in time order, the candidates against the baseline, the mean
   and the noise floor.
6. Why the models predict what they do: contributions (SHAP for boosting,
   exact terms for linear models), VIP, each attribute through the chain
   against ribbon porosity, and the most recent lot's contributions.
7. Porosity window: probability of meeting every specification, each
   attribute's band against its limits, the roll force that gives it.
8. Applicability domain of the training lots (T² against Q).
9. Model card.
10. Cautions.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field, replace
from functools import partial
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pandas as pd

from linkage import CAUTION, __version__
from linkage.decide.watch import revised_text
from linkage.numbers import percent_text
from linkage.report.page import trained_text
from linkage.report.templating import Markup, macro, render
from linkage.report.sheet import JUDGE_TEXT, STYLE as SHEET_STYLE

POROSITY = "ribbon_porosity"
FORCE = "roll_force_kn_per_cm"
GAP = "roll_gap_mm"

#: what the candidates are, in the report's words
CANDIDATE_ROLE = {
    "mean": "floor: the mean of the training lots",
    "rd_baseline": "baseline: Ryshkewitch–Duckworth form in ribbon porosity",
    "log_linear": "ln y on inputs selected per attribute (Ryshkewitch–Duckworth, power laws)",
    "weibull_release": "Weibull / first-order release and RRSB undersize form, inputs selected",
    "linear_select": "least squares on inputs selected per attribute",
    "pls": "partial least squares",
    "quadratic_ridge": "ridge with squares and products",
    "boosting": "gradient boosting",
    "johanson_baseline": "physical baseline of the ribbon stage (Johanson's rolling theory)",
}

EXTRA_STYLE = """
body{max-width:64rem}
h3{font-size:.98rem;margin:1.1rem 0 .3rem}
figure{margin:.6rem 0 1rem} figure img{max-width:100%;height:auto;border:1px solid #eee}
figcaption{font-size:.82rem;color:#444;margin-top:.2rem}
.note{border-left:4px solid #6b6b6b;background:#f4f4f4;padding:.45rem .7rem;margin:.6rem 0;font-size:.88rem}
.sel{font-weight:600;background:#e8f1f8}
nav ol{columns:2;font-size:.9rem}
.lots{font-size:.8rem;color:#333} td.num{white-space:nowrap}
.small{font-size:.82rem}
details{margin:.4rem 0} summary{cursor:pointer}
.reused{color:#555;font-size:.85rem;font-style:italic}
"""


@dataclass
class Report:
    """A rendered report: the HTML text, the figures it embeds (one caption
    each, in order) and the notes where something could not be drawn."""

    html: str
    figures: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    #: what the report computed itself that a later report can reuse ("window", "space": the results;
    #: "mewma": the drift watch's designs, simulated; "figures": the figures drawn, when some were)
    computed: dict = field(default_factory=dict)
    #: how many figures were taken from an earlier report's (:mod:`linkage.report.kept`) instead of drawn
    n_reused_figures: int = 0

    @property
    def n_figures(self) -> int:
        return len(self.figures)


# ----------------------------------------------------------------- text helpers

def number_text(value, digits: int = 4) -> str:
    """A number for a table cell; "n/a" for a missing one (never a bare NaN); text as it is."""
    if value is None:
        return "n/a"
    try:
        v = float(value)
    except (TypeError, ValueError):
        return str(value)
    if not math.isfinite(v):
        return "n/a" if math.isnan(v) else ("∞" if v > 0 else "−∞")
    return f"{v:.{digits}g}"


def plus_minus_text(value, se, digits: int = 4) -> str:
    """"value ± se", or the value alone without a standard error."""
    return number_text(value, digits) if se is None else f"{number_text(value, digits)} ± {number_text(se, 2)}"


def _tiny_to_zero(value, scale):
    """0 for a value that is rounding noise next to ``scale`` (a bias of
    1e-17 beside an RMSE of 0.05 is zero)."""
    if value is None or scale is None or not math.isfinite(float(value)):
        return value
    return 0.0 if abs(float(value)) <= 1e-9 * abs(float(scale)) else value


def _lots_text(lots, limit: int = 12) -> str:
    """The first ``limit`` lots, and how many more (plain text; :func:`linkage.store.lots_named`)."""
    from linkage.store import lots_named

    return lots_named(lots, limit)


def _limit_text(limit) -> str:
    if limit is None:
        return "no limit"
    lo, hi = getattr(limit, "min", None), getattr(limit, "max", None)
    if lo is not None and hi is not None:
        return f"{lo:g} to {hi:g}"
    return f"≥ {lo:g}" if lo is not None else f"≤ {hi:g}"


def _coverage_regions(target) -> str:
    """Coverage of the deployed intervals by region of the training range,
    with the Clopper–Pearson interval of each figure and the CV+ guarantee
    beside them; empty for a model trained before they were measured."""
    regions = getattr(target, "coverage_by_region", None)
    if not regions:
        return ""
    rows = []
    for r in regions:
        lo, hi = r["range"]
        cov = "no lots" if r["coverage"] is None else f"{100 * r['coverage']:.0f}%"
        rows.append([f"{lo:.4g}–{hi:.4g}", str(r["n"]), cov, f"{100 * r['ci_low']:.0f}–{100 * r['ci_high']:.0f}%"])
    return _part("models", "coverage_regions", nominal=f"{100 * target.nominal_coverage:.0f}",
                 variable=getattr(target, "coverage_region_variable", None) or "region", rows=rows,
                 choice=getattr(target, "interval_choice", None) or {},
                 guarantee=getattr(target, "coverage_guarantee", None) or {})


def _part(template: str, macro_name: str, /, **context) -> Markup:
    """The macro ``macro_name`` of ``templates/<template>.html.j2`` with ``context`` (escaped unless Markup)."""
    return macro(f"{template}.html.j2", macro_name)(**context)


def table_html(header: list | None, rows: list[list], *, num_cols: set[int] | None = None,
               row_class: list[str] | None = None) -> Markup:
    """An HTML table (``templates/blocks.html.j2``); cells are escaped unless they are Markup."""
    return _part("blocks", "table", header=header, rows=rows, num_cols=num_cols or set(), row_class=row_class)


# ----------------------------------------------------------------- the builder

#: where a figure's data URI goes until the figures are drawn (no text of a report holds a NUL)
_FIGURE_SLOT = "\x00figure-{}\x00"
_SLOT_RE = re.compile("\x00figure-[0-9]+\x00")


class _Builder:
    def __init__(self, parallel: bool = True, kept_figures: dict | None = None):
        self.parts: list[str] = []
        self.figures: list[str] = []
        #: each figure's PNG data URI once known (drawn, or kept from an earlier report)
        self.uris: list[str | None] = []
        #: figures an earlier report drew for the same key (:mod:`linkage.report.kept`): captions, data URIs
        kept = kept_figures or {}
        self._kept = list(zip(kept.get("captions") or [], kept.get("uris") or []))
        self.n_reused = 0
        self.notes: list[str] = []
        self.toc: list[tuple[str, str]] = []
        #: section anchor -> the sentence saying which of its results was reused rather than computed
        self.reused: dict[str, str] = {}
        #: the figures not yet drawn to PNG, in order (their <img> holds a slot until then), shared out
        #: between this process and children forked as the sections go on (:meth:`draw_early`)
        self._drawing = None
        #: draw figures in forked children too (where the machine allows it)
        self.parallel = parallel

    def section(self, anchor: str, title: str) -> None:
        self.toc.append((anchor, title))
        self.parts.append(_part("blocks", "heading", anchor=anchor, title=title))
        if anchor in self.reused:  # a result reused from an earlier command says so under its heading
            self.parts.append(_part("blocks", "reused", text=self.reused[anchor]))

    def add(self, html_text: str) -> None:
        """A fragment of HTML: Markup from a template (or, from a section module not yet on templates,
        text it escaped itself)."""
        self.parts.append(str(html_text))

    def note(self, text: str) -> None:
        """A visible note in place of something that could not be drawn (units as the tables write them)."""
        from linkage.report.figures import shown_units_text

        text = shown_units_text(text)
        self.notes.append(text)
        self.parts.append(_part("blocks", "note", text=text))

    def figure(self, fig_or_ax, caption: str, alt: str | None = None, panels: int = 1) -> None:
        """A figure with its caption; drawn to PNG by :meth:`draw_early` and :meth:`draw_figures`.
        ``fig_or_ax``: a figure (or one of its Axes), or a function without arguments that makes it,
        called where the figure is drawn (so that making it is shared out too); ``panels``: how many
        panels that figure has (about what it costs)."""
        from linkage.report.background import SharedMap

        n = len(self.figures) + 1
        self.figures.append(caption)
        if n <= len(self._kept) and self._kept[n - 1][0] == caption:  # kept for this key: not made or drawn
            self.uris.append(self._kept[n - 1][1])
            self.n_reused += 1
        else:
            if self._drawing is None:
                self._drawing = SharedMap(_drawn, fork=self.parallel)
            if not callable(fig_or_ax):
                fig_or_ax = getattr(fig_or_ax, "figure", fig_or_ax)
                panels = len(fig_or_ax.axes)
            self.uris.append(None)
            self._drawing.add((n, fig_or_ax), cost=panels)
        self.parts.append(_part("blocks", "figure", n=n, src=Markup(_FIGURE_SLOT.format(n)), alt=alt or caption,
                                caption=caption))

    def draw_early(self) -> None:
        """Start a child drawing the figures made so far that no process has taken yet, while the
        sections go on (when the machine allows it; else they are drawn with the rest at the end)."""
        if self._drawing is not None:
            if self._drawing.fork:
                from linkage.report.figures import prepare

                prepare()  # matplotlib imported once here, not again in each child (the figures are made there)
            self._drawing.start()

    def draw_figures(self) -> None:
        """Every figure to a PNG ``data:`` URI in its place: this process and the children of
        :meth:`draw_early` (and one more) each take the next figure nobody has taken, costliest
        first, until none is left (the same bytes wherever a figure is drawn)."""
        drawn = self._drawing.finish() if self._drawing is not None else []
        self._drawing = None
        for n, uri in drawn:
            self.uris[n - 1] = uri
        slots = {_FIGURE_SLOT.format(i + 1): uri for i, uri in enumerate(self.uris)}
        self.parts = [_SLOT_RE.sub(lambda m: slots[m.group(0)], part) if "\x00" in part else part
                      for part in self.parts]

    def close(self) -> None:
        """End any child still drawing (a report that failed half way)."""
        if self._drawing is not None:
            self._drawing.close()
        self._drawing = None


def _drawn(numbered) -> tuple[int, str]:
    """(n, a figure or what a figure-making function makes as a PNG ``data:`` URI) of figure n."""
    from linkage.report.figures import png_data_uri

    n, fig_or_maker = numbered
    return n, png_data_uri(fig_or_maker() if callable(fig_or_maker) else fig_or_maker)


# ----------------------------------------------------------------- entry points

def build_report(chain, table: pd.DataFrame, *, spec=None, window=None, lots: pd.DataFrame | None = None,
                 out_path, confidence: float = 0.9, seed: int = 0, assurance: float = 0.9, plan=None) -> Path:
    """Render the report and write it to ``out_path`` (folders made as
    needed; the file is written whole or not at all). Returns the path."""
    report = render_report(chain, table, spec=spec, window=window, lots=lots, confidence=confidence, seed=seed,
                           assurance=assurance, plan=plan)
    return write_report(report, out_path)


def write_report(report: Report, out_path) -> Path:
    """Write a rendered report to ``out_path`` (folders made as needed; whole or not at all)."""
    from linkage.export import write_atomic

    out = Path(out_path)
    out.parent.mkdir(parents=True, exist_ok=True)
    return write_atomic(out, report.html.encode("utf-8"))


def render_report(chain, table: pd.DataFrame, *, spec=None, window=None, lots: pd.DataFrame | None = None,
                  confidence: float = 0.9, seed: int = 0, curve_draws: int = 400,
                  assurance: float = 0.9, plan=None, space=None, reused: dict[str, str] | None = None,
                  parallel: bool = True, kept_figures=None, other_lots=None,
                  store_cautions: list[str] | None = None, set_aside: dict | None = None,
                  set_aside_rows: pd.DataFrame | None = None, origin: dict | None = None,
                  ribbon: pd.DataFrame | None = None) -> Report:
    """Build the report of a fitted chain.

    Parameters
    ----------
    chain : a fitted chain (:class:`linkage.models.train.FittedChain`).
    table : the assembled table (one row per lot, time order), as
        :func:`linkage.assemble.assemble` returns it.
    spec : a :class:`linkage.spec.Spec`, or None (no limits drawn, no window).
    window : a :class:`linkage.decide.window.WindowResult`; computed here at
        ``confidence`` when a spec is given without it.
    lots : the lot store's :meth:`linkage.store.LotStore.lots` (completeness
        per table); derived from the assembled table when None.
    seed, curve_draws : seed and Monte Carlo draws per grid point of the
        curves through the chain.
    assurance : assurance of the lower bound on the probability of passing
        that the window computed here rests on.
    plan : a plan (:mod:`linkage.decide.plan`; a ``plan.json`` path, its dict
        or the object): adds the plan section after the window's.
    space : the design-space map (:class:`linkage.decide.space.SpaceResult`)
        over roll force × gap as the map section computes it with these
        arguments; computed here when None (in a second process beside the
        other sections when ``parallel`` and the machine allow it,
        :mod:`linkage.report.background`).
    reused : section anchor -> a sentence saying that a result of that
        section was reused from an earlier command, shown under its heading.
    other_lots : the store's lots of other products than the model's, not shown (product, lot count;
        :func:`linkage.products.other_counts`): the lots section says how many there are.
    store_cautions : what the lot store read cannot show (:meth:`linkage.store.LotStore.cautions`: a
        sealed store without its anchor file); stated in "At a glance" and in the cautions section.
    set_aside : the store's lots set aside (``linkage set-aside``) that the table leaves out (lot -> the
        decision, :attr:`linkage.store.LotTables.set_aside`): the lots section names them, and those of them
        the model was trained on.
    set_aside_rows : the process rows (lot, product, compactor, manufactured_at) of the lots of ``set_aside``
        the model was trained on (:func:`set_aside_training_rows`): its out-of-fold results hold them, so the
        per-attribute figures draw them at their own place in time with their own compactor, marked.
    origin : how the model came to be, from the lot store's audit trail (:func:`model_origin`): promoted by
        ``linkage retrain`` (by the rule, or by force with its reason and the lots the watch had flagged) or left
        a challenger; "At a glance" and the model card say it. None (no such entry): nothing is said of it.
    ribbon : the ribbon table of the lots (one row a sample, as the lot store holds it): the drift section then
        lists the looks at each ribbon sample that ``linkage watch`` lists (against ±3 SD about its lot's running
        mean, and against the porosity window where one was found), as
        :func:`linkage.decide.watch.porosity_within` makes them. None: the section lists the looks at lot values
        only, and says so where it lists any.
    kept_figures : the figures an earlier report drew with the same inputs
        (a :class:`linkage.models.reuse.Reused` of kind "figures",
        :mod:`linkage.report.kept`): a figure whose caption is the one kept
        at its place is taken as kept instead of made and drawn, and the
        report says so under its title. The figures drawn here are returned
        in ``computed["figures"]`` to be kept for the next report.
    """
    from linkage.timepoint import check_time_point

    check_time_point(chain, spec, "report")  # a spec at another time point is refused, not reported around
    from linkage.report.background import frozen_heap

    with frozen_heap():  # the chain, the tables and the modules are not walked by every collection (its docstring)
        return _render(chain, table, spec, window, lots, confidence, seed, curve_draws, assurance, plan, space,
                       reused, parallel, kept_figures, other_lots, store_cautions, set_aside, set_aside_rows, origin,
                       ribbon)


def _render(chain, table, spec, window, lots, confidence, seed, curve_draws, assurance, plan, space, reused,
            parallel, kept_figures, other_lots, store_cautions, set_aside, set_aside_rows, origin=None,
            ribbon=None) -> Report:
    """:func:`render_report` (its arguments, in its order)."""
    from linkage.decide.watch import remember_training_design, watch
    from linkage.report.background import Background

    b = _Builder(parallel, kept_figures.result if kept_figures is not None else None)
    b.reused.update(reused or {})
    table = table.copy()
    table["lot"] = table["lot"].astype(str)
    computed = {}
    remember_training_design(chain)  # in this process: a design the model kept is not one to keep beside it
    # the two costly computations that need nothing the other sections compute start beside them
    pending = {"watch": Background(watch, chain, table, fork=parallel)}
    if spec is not None and space is None:
        from linkage.decide.defaults import MAP_GRID
        from linkage.decide.space import design_space

        args = dict(x=FORCE, y=GAP, n_grid=MAP_GRID, confidence=confidence, assurance=assurance, seed=seed)
        pending["space"] = Background(design_space, chain, spec, fork=parallel, **args)
    try:
        _sections(b, chain, table, spec, window, lots, confidence, seed, curve_draws, assurance, plan, space,
                  pending, computed, other_lots=other_lots, store_cautions=store_cautions or [],
                  set_aside=set_aside or {}, set_aside_rows=set_aside_rows, origin=origin, ribbon=ribbon)
        b.draw_figures()
    finally:
        b.close()
        for job in pending.values():
            job.close()
    if b.n_reused:
        from linkage.report.kept import sentence

        b.reused["figures"] = sentence(kept_figures.made_by, kept_figures.made_at, b.n_reused, len(b.figures))
    if b.n_reused < len(b.figures):  # some were drawn here: kept for the next report with these inputs
        computed["figures"] = {"captions": list(b.figures), "uris": list(b.uris)}
    return Report(html=_page(b, chain), figures=list(b.figures), notes=list(b.notes), computed=computed,
                  n_reused_figures=b.n_reused)


def _sections(b, chain, table, spec, window, lots, confidence, seed, curve_draws, assurance, plan, space,
              pending, computed, other_lots=None, store_cautions=(), set_aside=None, set_aside_rows=None,
              origin=None, ribbon=None) -> None:
    """Every section in order into ``b``. ``pending``: the watch and (unless given) the map, being computed;
    ``computed`` gets the window and the map when they were computed here; ``ribbon``: the ribbon samples the
    watch looks at (:func:`_with_sample_looks`), or None."""
    limits = dict(spec.limits) if spec is not None else {}
    window_failure = None
    if spec is not None and window is None:
        window, window_failure = _window_or_reason(chain, spec, confidence, seed, assurance)
        if window is not None:
            computed["window"] = window

    revised = revised_training_lots(chain, lots)
    _glance(b, chain, table, spec, window, revised, store_cautions, set_aside or {}, origin)
    _data_section(b, chain, table, lots, other_lots, revised)
    _set_aside_part(b, chain, set_aside or {})
    _ribbon_section(b, chain, table, limits)
    _baseline_section(b, chain, table, limits)
    _attribute_section(b, chain, table, limits, set_aside_rows)
    b.draw_early()  # the figures so far are drawn beside the sections that follow
    _explain_section(b, chain, table, limits, window, curve_draws, seed)
    b.draw_early()  # the explanations' too, beside the window and the sections after it
    _window_section(b, chain, table, spec, window, window_failure)
    from linkage.report.transfer_section import transfer_section  # scale-up between compactors (issue 16)

    transfer_section(b, table, window, seed=seed, trained_on=chain.trained_on)
    if plan is not None:
        from linkage.report.plan_section import plan_section, read_plan

        plan_section(b, chain, table, read_plan(plan))

    from linkage.report.space_section import space_section  # the design-space map (issue 16)

    refused = None
    if space is None and "space" in pending:
        from linkage.exceptions import LinkageError

        try:
            space = computed["space"] = pending["space"].result()
        except LinkageError as exc:
            refused = exc  # the section says why there is no map, without computing it again
    space_section(b, chain, table, spec, confidence=confidence, assurance=assurance, seed=seed, result=space,
                  refused=refused)
    watched = pending["watch"].result()
    design = (watched.mewma or {}).get("design")
    from linkage.decide.mewma import simulated

    if simulated(design):  # the watch's design, simulated here: worth keeping for the next report
        computed["mewma"] = [design]
    _watch_section(b, chain, table, window, _with_sample_looks(watched, chain, ribbon, window),
                   samples_looked=ribbon is not None)
    _domain_section(b, chain, table, set_aside or {})
    _model_card(b, chain, spec, window, revised, origin)
    _cautions(b, chain, store_cautions)


def _with_sample_looks(watched, chain, ribbon, window):
    """The watch's result with its looks at each ribbon sample as ``linkage watch`` makes them
    (:func:`linkage.decide.watch.porosity_within`: against ±3 SD about the lot's running mean, and against the
    window where one was found, its edges passed as :func:`linkage.api.watch` passes them). The watch itself runs
    in another process before the window is known; these looks are cheap, so they are made here once it is.
    ``watched`` as it is when no ribbon table was given."""
    from linkage.decide.watch import sample_looks

    if ribbon is None:
        return watched
    edges = window.edges if window is not None else None
    return replace(watched, porosity_within=sample_looks(chain, ribbon, edges))


def _window_or_reason(chain, spec, confidence, seed, assurance=0.9):
    """(window, None), or (None, why it could not be computed)."""
    from linkage.decide.window import find_window
    from linkage.exceptions import LinkageError

    try:
        return find_window(chain, spec, confidence=confidence, seed=seed, assurance=assurance), None
    except LinkageError as exc:
        return None, str(exc)


def _page(b: _Builder, chain) -> str:
    """The whole page (``templates/page.html.j2``)."""
    return str(render("page.html.j2", n_figures=len(b.figures), model_id=chain.model_id or "unsaved",
                      created_at=trained_text(chain.created_at),
                      made=datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC"),
                      version=__version__, caution=CAUTION, toc=b.toc, style=Markup(SHEET_STYLE + EXTRA_STYLE),
                      figures_reused=b.reused.get("figures"),
                      body=Markup("".join(b.parts)))) + "\n"


# ----------------------------------------------------------------- small accessors

def _by_lot(table: pd.DataFrame) -> pd.DataFrame:
    return table.drop_duplicates("lot", keep="last").set_index("lot", drop=False)


def _inputs_of(target, table: pd.DataFrame, lots=None) -> pd.DataFrame:
    """The target's inputs for ``lots`` (default: its training lots) that are
    in the table, complete rows only, in time order."""
    t = _by_lot(table)
    want = [str(v) for v in (target.lots if lots is None else lots)]
    have = [lot for lot in t.index if lot in set(want)]
    missing = [c for c in target.inputs if c not in t.columns]
    if missing:
        return pd.DataFrame(columns=target.inputs)
    return t.loc[have, target.inputs].astype(float).dropna()


def _group_column(table: pd.DataFrame, lots) -> tuple[str | None, list | None]:
    """The column that groups lots in the figures: the compactor, else the
    product, when it has at least two values among ``lots``."""
    t = _by_lot(table)
    for col in ("compactor", "product"):
        if col in t.columns:
            values = t.loc[[v for v in lots if v in t.index], col]
            if values.dropna().astype(str).nunique() >= 2:
                return col, [("(none)" if pd.isna(v) else str(v)) for v in t.reindex(lots)[col]]
    return None, None


def revised_training_lots(chain, lots) -> list[dict]:
    """The model's training lots revised after it was trained
    (:func:`linkage.decide.watch.revised_since_training`, as ``linkage watch`` names them), from the lot store's
    :meth:`linkage.store.LotStore.lots`; none when ``lots`` has no revisions (not from a store) or the model
    no time of training."""
    from linkage.decide.watch import revised_since_training

    if lots is None or not {"lot", "revision", "updated_at"} <= set(lots.columns) or not chain.created_at:
        return []
    return revised_since_training(lots, chain.training.get("lots") or [], chain.created_at)




def _stage_of(chain, name: str):
    return next((s for s in chain.stages if name in s.targets), None)


# ----------------------------------------------------------------- 1. at a glance

def _glance(b, chain, table, spec, window, revised=(), store_cautions=(), set_aside=None, origin=None):
    b.section("glance", "At a glance")
    time_point = None
    if "dissolution_pct" in chain.targets:
        from linkage.timepoint import time_point_text

        text = time_point_text(chain)
        time_point = text[0].upper() + text[1:]
    if spec is None:
        state = "no spec"
    elif window is None:
        state = "failed"
    else:
        state = "no promise" if window.found and not window.promise else "found" if window.found else "none"
    why = None
    if state == "no promise":
        why = ("the model has no bootstrap replicates, so the probability has no lower bound"
               if not (window.bound or {}).get("available", True) else
               "the held settings are outside the applicability domain (an extrapolation)")
    rf = (window.roll_force or {}) if window is not None else {}
    b.add(_part("glance", "glance", n_lots=len(table),
                n_train=int(chain.training.get("n_lots", len(chain.training.get("lots", [])))),
                chosen=[(name, t.selected) for name, t in chain.targets.items()], time_point=time_point,
                spec=spec, not_modelled=window.not_modelled if window is not None else [], every=_every(window),
                state=state, window=window, why=why, rf=rf,
                point_range=_range(window.point_low, window.point_high, 3) if state == "found" else None,
                rf_range=_range(rf.get("point_low"), rf.get("point_high"), 2),
                low_edge=_edge_text(window.low.limited_by) if window is not None else None,
                high_edge=_edge_text(window.high.limited_by) if window is not None else None,
                revised=len(revised), revised_text=revised_text(revised), store_cautions=list(store_cautions),
                aside_text=". ".join(t for t in (_glance_aside(chain, set_aside or {}),
                                                _glance_restored(chain, table["lot"])) if t),
                origin=_part("card", "origin", o=origin) if origin else ""))


def model_origin(audit: list[dict], model_id: str | None) -> dict | None:
    """How the model ``model_id`` came to be, read from the lot store's audit trail (``audit``: its entries of that
    model, :meth:`linkage.store.LotStore.decisions_of`, or the whole trail, :meth:`~linkage.store.LotStore.audit`):
    the last ``promote`` or ``retrain`` entry that ``linkage retrain`` recorded for it
    (:func:`linkage.decide.retrain.retrain` logs the challenger's id as the entry's model id).
    Returns ``{"promoted", "forced", "at", "user", "champion", "reason", "alarmed", "not_met"}`` (``alarmed``:
    the lots trained on that the watch's alarm flagged against the champion, each ``{"lot", "signal"}``;
    ``not_met``: the attributes the promotion rule did not show, from the entry's reasons), or None when no entry
    names it (a model of ``linkage train``, or a store that did not record the decision): then nothing is said."""
    if not model_id:
        return None
    from linkage.store import DECISION_ACTIONS

    found = [a for a in audit if a.get("action") in DECISION_ACTIONS and a.get("model_id") == model_id]
    if not found:
        return None
    a = found[-1]
    i = a.get("inputs") if isinstance(a.get("inputs"), dict) else {}
    o = a.get("outputs") if isinstance(a.get("outputs"), dict) else {}
    reasons = [str(r) for r in o.get("reasons") or [] if isinstance(r, str)]
    alarmed = [x for x in i.get("alarmed_lots") or [] if isinstance(x, dict) and x.get("lot") is not None]
    from linkage.exceptions import shown_time

    return {"promoted": a["action"] == "promote", "forced": bool(i.get("force")), "at": shown_time(a.get("at")),
            "user": a.get("user") or "", "champion": i.get("champion") or "", "reason": i.get("reason") or "",
            "alarmed": [{"lot": str(x["lot"]), "signal": str(x.get("signal") or "")} for x in alarmed],
            "not_met": [r.split(":")[0] for r in reasons if "NOT SHOWN" in r
                        and not r.startswith("promotion forced")]}  # the forced entry's own reason quotes the user


def _restored_lots(chain, lots) -> list[str]:
    """The ``lots`` the model was not trained on because they were set aside when it was trained (its
    ``training.set_aside_lots``), in use again: restored since (:func:`linkage.store.restored_since_training`)."""
    from linkage.store import restored_since_training

    lots = [str(lot) for lot in lots]
    new = [lot for lot, trained in zip(lots, chain.trained_on(lots)) if not trained]
    return restored_since_training(chain, new, [])


def _glance_restored(chain, lots) -> str:
    """Why the table holds more lots than the model was trained on, for the lots set aside when it was trained and
    restored since ('' when there are none); a sentence without its full stop, as :func:`_glance_aside` writes one."""
    restored = _restored_lots(chain, lots)
    if not restored:
        return ""
    one = len(restored) == 1
    return (f"{len(restored)} lot{'' if one else 's'} of the table ({_lots_text(restored)}) "
            f"{'was' if one else 'were'} set aside when the model was trained and {'has' if one else 'have'} been "
            f"restored since: the model was fitted without {'it' if one else 'them'}")


def _domain_aside_text(chain, set_aside: dict) -> str:
    """What the domain section says of the model's training lots set aside since training: they are not in the
    table, so its 'training lots' count and its charts leave them out ('' when there are none)."""
    from linkage.store import set_aside_trained_note

    lots = set_aside_trained_note(set_aside, chain.training.get("lots"), chain.model_id)[0]
    if not lots:
        return ""
    one = len(lots) == 1
    return (f"{len(lots)} of the model's training lots {'is' if one else 'are'} set aside since training "
            f"({_lots_text(lots)}): not in this report's table, so not counted among the training lots below nor "
            "drawn in the charts.")


def _glance_aside(chain, set_aside: dict) -> str:
    """Why the table holds fewer lots than the model was trained on, when lots are set aside in the store: how many,
    which, and how many of them were training lots ('' when none is set aside)."""
    if not set_aside:
        return ""
    from linkage.store import set_aside_trained_note

    n = len(set_aside)
    trained = set_aside_trained_note(set_aside, chain.training.get("lots"), chain.model_id)[0]
    text = (f"{n} lot{'' if n == 1 else 's'} set aside in the store ({_lots_text(set_aside)}) "
            f"{'is' if n == 1 else 'are'} left out of the table")
    if not trained:
        return text + "; none of them was among the model's training lots"
    k = len(trained)
    return text + ("; it was among the lots the model was trained on" if n == k == 1 else
                   f"; {'all' if k == n else k} of them {'was' if k == 1 else 'were'} among the lots the model "
                   "was trained on")


def _every(window) -> str:
    """"every specification", or "every specification except …" naming what the window does not judge."""
    from linkage.report.sheet import every_spec_text

    return every_spec_text(window.not_modelled if window is not None else [])


def _range(low, high, digits: int) -> str:
    return "no range" if low is None or high is None else f"{low:.{digits}f} – {high:.{digits}f}"


def _edge_text(limited_by) -> Markup:
    """What cut a window edge, in words (HTML)."""
    return _part("glance", "edge", limited_by=limited_by)


# ----------------------------------------------------------------- 2. data

#: a lot has a table when this assembled column has a value (used when the
#: store's completeness is not given)
_PRESENCE = {
    "process": "roll_force_kn_per_cm",
    "ribbon": "ribbon_porosity",
    "granules": "granule_d50_um",
    "tablets": "compression_force_kn",
    "tablet_weights": "weight_units",
    "dissolution": "dissolution_vessels",
}


def _presence(table: pd.DataFrame, lots: pd.DataFrame | None) -> tuple[pd.DataFrame, str]:
    """Lots (time order) × tables, True where the lot has rows of the table."""
    from linkage.schema import TABLES

    order = list(dict.fromkeys(table["lot"]))
    if lots is not None and not lots.empty and "lot" in lots:
        lt = lots.copy()
        lt["lot"] = lt["lot"].astype(str)
        lt = lt.drop_duplicates("lot", keep="last").set_index("lot")
        order += [v for v in lt.index if v not in set(order)]
        cols = [t for t in TABLES if f"{t}_rows" in lt.columns]
        present = pd.DataFrame({t: lt.reindex(order)[f"{t}_rows"].fillna(0).astype(float) > 0 for t in cols},
                               index=order)
        return present, "the lot store"
    t = _by_lot(table)
    cols = {name: col for name, col in _PRESENCE.items() if col in t.columns}
    if "granule_size_source" in t.columns:
        src = t.reindex(order)["granule_size_source"].astype(str)
        present = pd.DataFrame({name: t.reindex(order)[col].notna() for name, col in cols.items()}, index=order)
        present["granules"] = (src == "sieve").to_numpy()
        present["granules_laser"] = (src == "laser").to_numpy() | (
            t.reindex(order)["laser_d50_um"].notna().to_numpy() if "laser_d50_um" in t.columns else False)
        return present[[c for c in TABLES if c in present.columns]], "the assembled table"
    return pd.DataFrame({name: t.reindex(order)[col].notna() for name, col in cols.items()}, index=order), \
        "the assembled table"


def _set_aside_part(b, chain, set_aside: dict) -> None:
    """The lots set aside in the store, left out of this report's table, and those of them the model was
    trained on (it was trained before they were set aside)."""
    from linkage.exceptions import shown_time
    from linkage.store import set_aside_note, set_aside_trained_note

    note = set_aside_note(set_aside, "left out of this report")
    if not note:
        return
    b.add(_part("blocks", "para", text=note[0].upper() + note[1:] + ". Why: "
                + "; ".join(f"{lot}: {d.get('reason')} (by {d.get('user')}, {shown_time(d.get('at'))})"
                            for lot, d in set_aside.items()) + "."))
    trained = set_aside_trained_note(set_aside, chain.training.get("lots"), chain.model_id)[1]
    if trained:
        b.add(_part("blocks", "para", text=trained[0].upper() + trained[1:] + "."))


def _data_section(b, chain, table, lots, other_lots=None, revised=()):
    from linkage.report import figures as F
    from linkage.products import others_text

    b.section("lots", "The lots")
    made = None
    if "manufactured_at" in table.columns and table["manufactured_at"].notna().any():
        when = pd.to_datetime(table["manufactured_at"], errors="coerce", utc=True).dropna()
        if len(when):
            made = f"{when.min():%Y-%m-%d} to {when.max():%Y-%m-%d}"
    counts = [(word, list(table[col].dropna().astype(str).value_counts().items()))
              for col, word in (("product", "products"), ("compactor", "compactors"))
              if col in table.columns and table[col].notna().any()]
    n_trained = int(chain.trained_on(table["lot"]).sum())  # one row per lot
    b.add(_part("lots", "summary", n=len(table), made=made, counts=counts,
                others=others_text(other_lots) if other_lots else None, product=chain.trained_product,
                n_trained=n_trained))
    if revised:
        b.add(_part("lots", "revised", n=len(revised), lots=revised_text(revised), model_id=chain.model_id))

    present, source = _presence(table, lots)
    b.add(_part("blocks", "h3", text="Which tables each lot has"))
    if present.empty or present.shape[1] == 0:
        b.note("No completeness information: the table has no lots.")
    else:
        rows = []
        for t in present.columns:
            k = int(present[t].sum())
            filled = ""
            if lots is not None and f"{t}_filled_pct" in lots.columns:
                v = lots[f"{t}_filled_pct"].dropna()
                filled = number_text(v.mean(), 3) if len(v) else "n/a (no rows)"
            rows.append([t, str(k), f"{100 * k / len(present):.0f}%"] + ([filled] if lots is not None else []))
        header = ["table", "lots with rows", "share of lots"] + (
            ["mean filled cells of those lots [%]"] if lots is not None else [])
        b.add(table_html(header, rows, num_cols={1, 2, 3}))
        b.add(_part("blocks", "para", text=f"From {source}.", cls="small"))
        b.figure(partial(F.plot_completeness, present),
                 "Tables present per lot (blue) and missing (grey), lots in time order.")

    b.add(_part("blocks", "h3", text="Ranges"))
    b.add(table_html(["column", "unit", "lots with a value", "min", "median", "max"], _ranges(table),
                     num_cols={2, 3, 4, 5}))
    b.add(_part("blocks", "h3", text="Lots a model left out, and why"))
    b.add(_exclusions(chain, table))
    b.add(_part("blocks", "h3", text="Notes from assembling the table"))
    b.add(_part("lots", "assembly_notes", notes=[F.shown_units_text(n) for n in table.attrs.get("notes", []) or []]))


def _ranges(table) -> list[list[str]]:
    """Per numeric column: name, unit, lots with a value, min, median, max."""
    from linkage.report.figures import shown_unit

    rows = []
    for c in table.columns:
        if c == "lot" or not pd.api.types.is_numeric_dtype(table[c]) or pd.api.types.is_bool_dtype(table[c]):
            continue
        v = table[c].astype(float)
        v = v[np.isfinite(v)]
        rows.append([c, shown_unit(c), str(len(v)), number_text(v.min() if len(v) else None),
                     number_text(v.median() if len(v) else None), number_text(v.max() if len(v) else None)])
    return rows


#: the attribute cell of a row of lots that every attribute of the model leaves out for the same reason
ALL_ATTRIBUTES = "all attributes"


def _left_out(chain, t: pd.DataFrame) -> dict[str, dict[str, list[str]]]:
    """Per attribute of ``chain``, the lots of ``t`` (the table by lot) its fit did not use, grouped by why, in the
    table's order."""
    trained = dict(zip(t.index, chain.trained_on(t.index)))
    restored = set(_restored_lots(chain, t.index))  # not new: set aside when the model was trained
    left_out = {}
    for name, target in chain.targets.items():
        used = set(str(v) for v in target.lots)
        reasons: dict[str, list[str]] = {}
        for lot in t.index:
            if lot in used:
                continue
            if lot in restored:
                why = "set aside when the model was trained, restored since"
            elif not trained[lot]:
                why = "not in the data the model was trained on (added or changed later)"
            else:
                need = [name] + [c for c in target.inputs]
                gone = [c for c in need if c not in t.columns or pd.isna(t.at[lot, c])]
                why = ("no value of " + ", ".join(gone)) if gone else "left out by the training step"
            reasons.setdefault(why, []).append(lot)
        left_out[name] = reasons
    return left_out


def _exclusions(chain, table) -> str:
    """The table of lots a model left out: attribute, why, how many, which. Lots that every attribute leaves out
    for the same reason (the lots since training, say) are one row for all attributes, not one per attribute
    (a new-user test: the same lots repeated once for each of 8 attributes); the others one row per attribute."""
    left_out = _left_out(chain, _by_lot(table))
    groups = list(left_out.values())
    shared = {why: lots_ for why, lots_ in groups[0].items()
              if len(groups) > 1 and all(g.get(why) == lots_ for g in groups[1:])} if groups else {}
    rows = [[ALL_ATTRIBUTES, why, str(len(lots_)), _part("blocks", "lots", values=_lots_text(lots_))]
            for why, lots_ in shared.items()]
    for name, reasons in left_out.items():
        for why, lots_ in reasons.items():
            if why not in shared:
                rows.append([name, why, str(len(lots_)), _part("blocks", "lots", values=_lots_text(lots_))])
    if not rows:
        return str(_part("lots", "all_used"))
    return str(table_html(["attribute", "why", "lots", "which"], rows, num_cols={2}))


# ----------------------------------------------------------------- 3. ribbon

def _ribbon_section(b, chain, table, limits):
    from linkage.report import figures as F

    b.section("ribbon", "Ribbon stage: porosity against roll force")
    stage = _stage_of(chain, POROSITY)
    if stage is None:
        b.note("The chain has no stage that predicts ribbon_porosity, so the ribbon stage cannot be drawn.")
        return
    target = stage.targets[POROSITY]
    t = _by_lot(table)
    need = [c for c in (FORCE, GAP, POROSITY) if c not in t.columns]
    if need:
        b.note(f"The table has no {', '.join(need)}, so porosity against roll force cannot be drawn.")
        return
    force = t[FORCE].to_numpy(float)
    gap = t[GAP].to_numpy(float)
    levels = _gap_levels(gap[np.isfinite(gap)])
    shown_gap = np.array([levels[np.argmin(np.abs(levels - g))] if np.isfinite(g) else np.nan for g in gap])
    curves = {}
    held = {}
    held_coherent = False
    if FORCE in target.inputs:
        lo, hi = (float(v) for v in chain.training["ranges"][FORCE])
        grid = np.linspace(lo, hi, 60)
        medians = chain.training["medians"]
        held = {c: float(medians[c]) for c in target.inputs if c not in (FORCE, GAP)}
        from linkage.decide import held as coherent

        model = coherent.of_chain(chain)  # coherent held settings along each curve; medians for an older model
        for g in levels:
            given = {FORCE: grid, **({GAP: np.full(len(grid), g)} if GAP in target.inputs else {})}
            at = {c: np.full(len(grid), v) for c, v in held.items()}
            if model is not None:
                at.update(coherent.hold(model, given, list(held))[0])
            x = pd.DataFrame({**at, **given})[target.inputs]
            curves[g] = (grid, np.asarray(target.predict(x), float))
        if model is not None and held:
            held, held_coherent = {}, True
    make = partial(F.plot_ribbon_fit, force, t[POROSITY].to_numpy(float), shown_gap, curves,
                   limit=limits.get(POROSITY))  # made where it is drawn, and not at all when kept
    held_text = ", ".join(f"{c} = {v:.4g}" for c, v in held.items())
    binned = "" if len(levels) == len(np.unique(gap[np.isfinite(gap)])) else \
        " Gaps are binned to the nearest of the levels shown."
    b.figure(make, f"Ribbon porosity of each lot against specific roll force, by roll gap; lines: the selected "
                 f"{target.selected} model of the ribbon stage at each gap"
                 + (f", other settings at their training medians ({held_text})" if held_text else "")
                 + ("" if not held_coherent else
                    ", other settings held coherently (their conditional mean given force and gap over the "
                    "training lots, Anderson 2003, Thm 2.5.1)")
                 + "." + binned)
    b.add(_part("models", "ribbon_selected", selected=target.selected,
                rmse=number_text(target.candidates[target.selected]["rmse"]), n_lots=target.n_lots))


def _gap_levels(gap: np.ndarray, most: int = 6) -> np.ndarray:
    """The distinct gaps, or (when there are more than ``most``) five
    quantiles of them, rounded to 0.01 mm."""
    if gap.size == 0:
        return np.array([])
    unique = np.unique(np.round(gap, 3))
    if len(unique) <= most:
        return unique
    return np.unique(np.round(np.quantile(gap, [0.1, 0.3, 0.5, 0.7, 0.9]), 2))


# ----------------------------------------------------------------- 4. baseline

#: the attributes that are a tablet's strength (the baseline section says when they rise with ribbon porosity)
STRENGTH = ("tensile_strength_mpa", "breaking_force_n")


def _negative(value) -> bool:
    """A finite number below zero (a coefficient k that makes the baseline rise with porosity)."""
    try:
        return math.isfinite(float(value)) and float(value) < 0
    except (TypeError, ValueError):
        return False


def _baseline_section(b, chain, table, limits):
    from linkage.report import figures as F

    b.section("baseline", "Strength–porosity baseline (Ryshkewitch–Duckworth)")
    fitted = [(name, t) for name, t in chain.targets.items() if getattr(t, "rd_params", None)]
    rising = [name for name, t in fitted if name in STRENGTH and _negative(t.rd_params.get("k"))]
    b.add(_part("models", "baseline_intro", rising=rising))
    if not fitted:
        b.note("No attribute has a Ryshkewitch–Duckworth fit: none is predicted from ribbon_porosity with at "
               "least 3 distinct porosities.")
        return
    rows = []
    for name, t in fitted:
        p = t.rd_params
        rd = t.candidates.get("rd_baseline", {})
        sel = t.candidates.get(t.selected, {})
        rows.append([name, F.shown_unit(name), plus_minus_text(p.get("s0"), p.get("s0_se")),
                     plus_minus_text(p.get("k"), p.get("k_se")), number_text(rd.get("rmse")), t.selected,
                     number_text(sel.get("rmse"))])
    b.add(table_html(["attribute", "unit", "y₀ ± SE", "k ± SE [-]", "baseline CV RMSE", "selected model",
                      "selected CV RMSE"], rows, num_cols={2, 3, 4, 6}))
    def make():
        fig, axes = F.grid_axes(len(fitted), ncols=min(3, len(fitted)), panel=(2.5, 2.0))
        t_lot = _by_lot(table)
        for ax, (name, t) in zip(axes, fitted):
            lots = [v for v in t.lots if v in t_lot.index]
            sub = t_lot.loc[lots]
            F.plot_rd_fit(sub[POROSITY].to_numpy(float), sub[name].to_numpy(float), t.rd_params.get("s0"),
                          t.rd_params.get("k"), name=name, limit=limits.get(name), ax=ax)
        return fig

    b.figure(make, "Each attribute against ribbon porosity (training lots) with its fit of the Ryshkewitch–Duckworth "
                   "form; "
                   "dashed: specification limits.", panels=len(fitted))


# ----------------------------------------------------------------- 5. attributes

def _attribute_section(b, chain, table, limits, aside_rows=None):
    from linkage.report import figures as F

    b.section("attributes", "Attribute by attribute: cross-validated performance")
    b.add(_part("models", "attributes_intro"))
    lots_frame_ = lots_frame(table, aside_rows)
    hollow = list(lots_frame_.loc[lots_frame_["set_aside"], "lot"])
    if hollow:
        one = len(hollow) == 1
        b.add(_part("blocks", "para", text=(
            f"{_lots_text(hollow)}: set aside in the store since the model was trained, so not in this report's "
            f"table, but among the lots the model was fitted on and scored on: the figures below draw "
            f"{'it' if one else 'them'} hollow (legend: set aside since training), at {'its' if one else 'their'} "
            f"own place in time and with {'its' if one else 'their'} own compactor.")))
    for name, why in (getattr(chain, "skipped", None) or {}).items():
        b.note(f"{name} was not modelled: {why}")
    for name, target in chain.targets.items():
        unit = F.shown_unit(name)
        cv = target.cv or {}
        cov = target.coverage
        b.add(_part("models", "attribute_head", name=name, unit=unit, target=target,
                    scheme=cv.get("scheme", "cross-validation"),
                    folds=f" ({cv['n_splits']} folds)" if cv.get("n_splits") else "",
                    coverage="not measured" if cov is None else f"{100 * cov:.3g}%"))
        b.add(_candidate_table(target, unit))
        b.add(_coverage_regions(target))
        for note in getattr(target, "notes", None) or []:
            b.add(_part("blocks", "para", text=f"Note: {F.shown_units_text(note)}", cls="small"))
        oof = target.oof
        order, group_col, groups, marked = attribute_lots(lots_frame_, [str(v) for v in oof.index])
        oof = oof.reindex(order)
        if target.selected not in oof.columns or oof["observed"].notna().sum() == 0:
            b.note(f"{name}: no out-of-fold predictions of the selected model are stored, so the predicted "
                   "against observed figure cannot be drawn.")
            continue
        by = f", coloured by {group_col}" if group_col else ""
        floor = " with the noise floor shaded" if target.noise_floor else " (no noise floor estimated)"
        hollow = [lot for lot, m in zip(order, marked) if m]
        its = "its" if len(hollow) == 1 else "their"
        aside = (f" Hollow markers: {_lots_text(hollow)}, set aside since the model was trained, at {its} own "
                 f"place in time and with {its} own compactor." if hollow else "")
        b.figure(partial(_attribute_figure, name, target, oof, order, groups, group_col, limits.get(name),
                         marked if hollow else None),
                 f"{name}: out-of-fold prediction of the selected model ({target.selected}) against "
                 f"observation{by} (left; dashed: specification limits), and its residuals lot by lot in "
                 f"time order{floor} (right).{aside}", panels=2)


def _attribute_figure(name, target, oof, order, groups, group_col, limit, marked=None):
    """An attribute's predicted against observed and its residuals in time order (two panels); ``marked``: the
    lots drawn hollow (set aside since training)."""
    from linkage.report import figures as F

    fig, (a1, a2) = F.grid_axes(2, ncols=2, panel=(3.3, 2.9), bottom=F.lot_axis_bottom(order), wspace=1.0)
    F.plot_predicted_observed(oof["observed"], oof[target.selected], name=name, groups=groups,
                              group_title=group_col, limit=limit, ax=a1, marked=marked)
    resid = oof["observed"] - oof[target.selected]
    F.plot_residuals_in_time(order, resid, name=name, groups=groups, noise_floor=target.noise_floor, ax=a2,
                             marked=marked)
    return fig


#: the identity columns of a lot the per-attribute figures place and group it by
_LOT_COLUMNS = ("lot", "product", "compactor", "manufactured_at")


def set_aside_training_rows(lot_store, product, set_aside, training_lots) -> pd.DataFrame | None:
    """The process rows (lot, product, compactor, time made) of the lots now set aside in ``lot_store`` that were
    among ``training_lots`` (the model's out-of-fold results hold them, the table of lots in use does not); None
    when there are none."""
    lots = [lot for lot in set_aside if lot in {str(v) for v in training_lots or []}]
    if not lots:
        return None
    process = lot_store.current_tables(product, include_set_aside=True).get("process")
    if process is None:
        return None
    process = process.assign(lot=process["lot"].astype(str))
    rows = process[process["lot"].isin(lots)]
    return rows[[c for c in _LOT_COLUMNS if c in rows.columns]].drop_duplicates("lot", keep="last")


def lots_frame(table: pd.DataFrame, aside_rows: pd.DataFrame | None) -> pd.DataFrame:
    """The lots the per-attribute figures place: the table's, and the set-aside training lots of ``aside_rows``
    (column ``set_aside`` True), in time order as :func:`linkage.assemble.assemble` orders lots (by time made,
    then lot; by lot when no time is known). Without set-aside rows, the table's own order."""
    frame = table[[c for c in _LOT_COLUMNS if c in table.columns]].assign(set_aside=False)
    if aside_rows is None or aside_rows.empty:
        return frame.reset_index(drop=True)
    aside = aside_rows.assign(lot=aside_rows["lot"].astype(str), set_aside=True)
    frame = pd.concat([frame, aside[~aside["lot"].isin(set(frame["lot"]))]], ignore_index=True)
    if "manufactured_at" in frame and frame["manufactured_at"].notna().any():
        when = pd.to_datetime(frame["manufactured_at"], errors="coerce", utc=True)
        frame = frame.assign(_when=when).sort_values(["_when", "lot"], kind="stable", na_position="last")
        frame = frame.drop(columns="_when")
    else:
        frame = frame.sort_values("lot", kind="stable")
    return frame.reset_index(drop=True)


def attribute_lots(frame: pd.DataFrame, lots: list[str]) -> tuple[list[str], str | None, list | None, list[bool]]:
    """Of a target's out-of-fold ``lots``: their time order (lots of ``frame``, :func:`lots_frame`, first, others
    after), the column that groups them and each lot's group (:func:`_group_column`), and which are set aside."""
    wanted = set(lots)
    known = set(frame["lot"])
    order = [lot for lot in frame["lot"] if lot in wanted] + [lot for lot in lots if lot not in known]
    group_col, groups = _group_column(frame, order)
    aside = set(frame.loc[frame["set_aside"].astype(bool), "lot"])
    return order, group_col, groups, [lot in aside for lot in order]


def _candidate_table(target, unit: str) -> str:
    """Every candidate's cross-validated scores, the ones not used with why, and the noise floor."""
    rows, classes = [], []
    from linkage.models.cv import SIMPLICITY_ORDER as order

    names = sorted(target.candidates, key=lambda n: (order.index(n) if n in order else len(order), n))
    for name in names:
        c = target.candidates[name]
        rows.append([_part("models", "candidate_name", name=name, selected=name == target.selected),
                     CANDIDATE_ROLE.get(name, ""), plus_minus_text(c.get("rmse"), c.get("rmse_se")),
                     number_text(c.get("mae")), number_text(c.get("q2"), 3),
                     number_text(_tiny_to_zero(c.get("bias"), c.get("rmse"))),
                     number_text(c.get("rmse_over_noise"), 3)])
        classes.append("sel" if name == target.selected else "")
    for name, why in (getattr(target, "unavailable", None) or {}).items():
        rows.append([name, _part("models", "not_used", role=CANDIDATE_ROLE.get(name, ""), why=why),
                     "–", "–", "–", "–", "–"])
        classes.append("")
    # the noise floor's own row: its RMSE/noise is 1 by definition
    rows.append(["noise floor", "repeatability of the lot mean", number_text(target.noise_floor), "–", "–", "–",
                 "1" if target.noise_floor else "n/a"])
    classes.append("")
    table = table_html(["model", "what it is", f"CV RMSE ± SE [{unit}]", "MAE", "Q²", "bias", "RMSE/noise"],
                       rows, num_cols={2, 3, 4, 5, 6}, row_class=classes)
    method = getattr(target, "noise_floor_method", None) or "not estimated"
    return table + _part("models", "noise_note", method=method)


# ----------------------------------------------------------------- 6. explanations

def _explain_section(b, chain, table, limits, window, curve_draws, seed):
    from linkage import explain

    b.section("explanations", "Why the models predict what they do")
    b.add(_part("explain", "intro"))
    importance = {}
    for name, target in chain.targets.items():
        X = _inputs_of(target, table)
        b.add(_part("blocks", "h3", text=name))
        if X.empty:
            b.note(f"{name}: none of its training lots has every input in this table, so no contributions.")
            continue
        contrib = explain.contributions(target, X)
        importance[name] = explain.global_importance(target, X, contributions=contrib)
        vip = explain.vip(target)
        all_zero = not np.any(np.abs(contrib.to_numpy(float)) > 0)
        panels = (0 if all_zero else 1) + (1 if vip is not None else 0)
        if panels == 0:
            b.note(f"{name}: the selected model ({target.selected}) ignores every input, and there is no PLS "
                   "candidate for VIP.")
            continue
        make = partial(_explain_figure, name, target, contrib, X, vip, panels, all_zero)
        what = [] if all_zero else [f"contributions of each input to the {target.selected} prediction, one dot "
                                    f"per training lot, coloured by the input's value ({contrib.attrs['method']})"]
        if vip is not None:
            what.append("VIP of the PLS candidate" + (" (the selected model)" if target.selected == "pls" else ""))
        b.figure(make, f"{name}: " + "; ".join(what) + ".", panels=panels)
        if all_zero:
            b.add(_part("explain", "predicts_mean", selected=target.selected))
    if importance:
        b.add(_part("explain", "importance_head"))
        inputs = list(dict.fromkeys(i for s in importance.values() for i in s.index))
        rows = []
        for inp in inputs:
            row = [inp]
            for name, s in importance.items():
                total = float(s.sum())
                row.append(f"{100 * s[inp] / total:.0f}%" if inp in s.index and total > 0 else "–")
            rows.append(row)
        b.add(table_html(["input"] + [_part("explain", "breakable", name=n) for n in importance], rows,
                         num_cols=set(range(1, len(importance) + 1))))
        b.add(_part("explain", "importance_note"))

    _curves(b, chain, table, limits, window, curve_draws, seed)
    _latest_lot(b, chain, table)


def _explain_figure(name, target, contrib, X, vip, panels, all_zero):
    """An attribute's contributions (unless all zero) and the VIP of its PLS candidate (when there is one)."""
    from linkage.report import figures as F

    margin = F.label_margin(target.inputs) + 0.35
    fig, axes = F.grid_axes(panels, ncols=panels, panel=(3.3, 0.4 * len(target.inputs) + 0.4), left=margin,
                            wspace=margin + (1.1 if panels == 2 and not all_zero else 0.0))
    i = 0
    if not all_zero:
        F.plot_contribution_summary(contrib, X, name=name, ax=axes[i])
        i += 1
    if vip is not None:
        F.plot_vip(vip.to_dict(), name=name, ax=axes[i])
    return fig


def _curves(b, chain, table, limits, window, curve_draws, seed):
    from linkage import explain
    from linkage.exceptions import LinkageError
    from linkage.report import figures as F

    b.add(_part("blocks", "h3", text="Each attribute against ribbon porosity, through the chain"))
    try:
        curves = explain.porosity_curves(chain, n_grid=41, n_draws=curve_draws, level=chain.nominal_coverage,
                                         seed=seed)
    except LinkageError as exc:
        b.note(f"The curves through the chain cannot be drawn: {exc}")
        return
    if not curves.curves:
        b.note("No attribute is predicted downstream of ribbon_porosity, so there is nothing to draw against it.")
        return
    names = list(curves.curves)

    def make():
        fig, axes = F.grid_axes(len(names), ncols=3, panel=(2.4, 1.8), left=0.85, wspace=0.85)
        t = _by_lot(table)
        win = window.edges if window is not None else None
        for ax, name in zip(axes, names):
            c = curves.curves[name]
            obs = (t[POROSITY], t[name]) if name in t.columns and POROSITY in t.columns else None
            F.plot_porosity_curve(curves.grid, c["mean"], c["low"], c["high"], name=name, level=curves.level,
                                  limit=limits.get(name), observed=obs, window=win, ax=ax)
        return fig

    held = ", ".join(f"{k} = {v['value']:.4g} ({v['source']})" for k, v in curves.settings.items())
    b.figure(make, f"Each attribute against ribbon porosity through the chain (partial-dependence style): line, "
                   f"the chain of mean predictions; band, the central {curves.level:.0%} of simulated lots "
                   f"({curves.n_draws} draws per point, out-of-fold residuals of every stage); dots, training lots; "
                   f"dashed, specification limits. Held: {held or 'nothing'}.", panels=len(names))


def _latest_lot(b, chain, table):
    from linkage import explain

    b.add(_part("blocks", "h3", text="The most recent lot, input by input"))
    rows = []
    for name, target in chain.targets.items():
        X = _inputs_of(target, table, lots=list(table["lot"]))
        if X.empty:
            continue
        lot = X.index[-1]
        one = explain.lot_contributions(target, table, lots=[lot]).iloc[0]
        parts = one[target.inputs]
        top = parts.abs().sort_values(ascending=False).index[:3]
        text = ", ".join(f"{k} {parts[k]:+.3g}" for k in top if parts[k] != 0) or \
            "none (the model predicts the mean)"
        rows.append([name, lot, number_text(one["base_value"]), number_text(one["prediction"]), text])
    if not rows:
        b.note("No lot of the table has every input of any attribute, so no lot can be explained.")
        return
    b.add(table_html(["attribute", "lot", "base value", "prediction", "largest contributions"], rows,
                     num_cols={2, 3}))
    b.add(_part("explain", "latest_note"))


# ----------------------------------------------------------------- 7. window

def _window_section(b, chain, table, spec, window, failure: str | None = None):
    b.section("window", "Porosity window")
    if spec is None:
        b.note("No specification was given (--spec spec.toml), so there are no limits and no window to show.")
        return
    if window is None:
        b.note(f"The window could not be computed: {failure or 'no window was given'}.")
        return
    _window_text(b, chain, window)
    _window_spec(b, spec, window)
    _window_figures(b, spec, window)
    _roll_force(b, table, window)


def _window_text(b, chain, w):
    """How the window is found, whether it is promised, and where it is."""
    every = _every(w)
    bound = w.bound or {}
    b.add(_part("window", "scan", w=w, every=every, n_lots=chain.training.get("n_lots", "")))
    if w.not_modelled:
        b.add(_part("window", "not_judged", names=w.not_modelled))
    if bound.get("available"):
        simultaneous = bound.get("simultaneous")
        b.add(_part("window", "bound_method", w=w, bound=bound, pointwise_percentile=f"{100 * (1 - w.assurance):g}",
                    simultaneous=f"{100 * simultaneous['quantile']:.2f}" if simultaneous else None))
    if not w.promise:
        from linkage.report.sheet import WINDOW_NO_PROMISE

        domain_reasons = [r for r in w.promise_reasons if r != bound.get("reason")]
        if domain_reasons:
            b.add(_part("window", "no_promise", title=WINDOW_NO_PROMISE, reasons=domain_reasons))
        if not bound.get("available", True):
            b.add(_part("window", "no_bound", reason=bound.get("reason") or ""))
    point_range = _range(w.point_low, w.point_high, 3)
    if w.found:
        b.add(_part("window", "found", w=w, low_edge=_edge_text(w.low.limited_by),
                    high_edge=_edge_text(w.high.limited_by), bound_available=bound.get("available"),
                    point_range=point_range, segments=w.segments))
    else:
        b.add(_part("window", "not_found", w=w, every=every, bound_available=bound.get("available"),
                    point_range=point_range))
    if w.mean_low is not None:
        b.add(_part("window", "mean_response", w=w))


def _window_spec(b, spec, w):
    """The spec judged against: its file, its judges, each attribute's limit and whether the window judges it."""
    from linkage.report.figures import shown_unit

    def judge(a):  # "mean" or "stages" (the acceptance value is always judged on its compendial stages)
        t = spec.time_point_of(a)
        return ["stages" if a == "acceptance_value" else spec.judge_of(a), "–" if t is None else f"{t:g} min"]

    def limit(a):
        if a == "acceptance_value" and spec.acceptance_value_max is not None:
            return f"<= {spec.acceptance_value_max:g}"
        return _limit_text(spec.limits.get(a)) if a in spec.limits else ""

    rows = [[a, shown_unit(a), limit(a), *judge(a), "judged"] for a in w.attributes]
    rows += [[a, shown_unit(a), limit(a), *judge(a), _part("window", "not_judged_cell")] for a in w.not_modelled]
    if POROSITY in spec.limits:
        rows.append([POROSITY, shown_unit(POROSITY), _limit_text(spec.limits[POROSITY]), *judge(POROSITY),
                     "judged: cuts the scanned porosities directly"])
    judges = sorted({spec.judge_of(a) for a in spec.limits} | ({"stages"} if spec.acceptance_value_max is not None
                                                              else set()))
    b.add(_part("window", "spec_file", spec=spec,
                judges="; ".join(f"Judge \"{j}\": {JUDGE_TEXT.get(j, j)}" for j in judges)))
    b.add(table_html(["attribute", "unit", "specification", "judge", "time point", "in the window"], rows))
    b.add(_part("window", "settings_used", held=[(k, v["value"], v["source"]) for k, v in w.settings.items()]))


def _window_figures(b, spec, w):
    """P(all pass) and each P(pass) against porosity; each attribute's band against its limits."""
    from linkage.report import figures as F

    every = _every(w)
    b.figure(partial(F.plot_window_probability, w.grid, w.p_all, w.p_each, confidence=w.confidence,
                     low=w.low.value, high=w.high.value, mean_low=w.mean_low, mean_high=w.mean_high,
                     p_all_low=w.p_all_low, assurance=w.assurance,
                     p_all_low_pointwise=getattr(w, "p_all_low_pointwise", None)),
             f"Probability that a lot meets {every} together (thick: point estimate solid, lower bound "
             f"at {percent_text(w.assurance)} assurance over the whole window dashed; thin dash-dot: the same bound "
             f"for one porosity alone) and each one (thin, point estimates) against "
             f"ribbon porosity; dashed red: the {percent_text(w.confidence)} confidence line; shaded: the window; "
             f"dotted: the mean-response window.")
    names = list(w.bands)
    if names:
        def make():
            fig, axes = F.grid_axes(len(names), ncols=3, panel=(2.4, 1.8), left=0.85, wspace=0.85)
            win = w.edges
            for ax, name in zip(axes, names):
                band = w.bands[name]
                F.plot_porosity_curve(w.grid, band["mean"], band["low"], band["high"], name=name,
                                      level=w.confidence, limit=spec.limits.get(name), window=win, ax=ax)
            return fig

        b.figure(make, f"Each specified attribute against ribbon porosity: mean prediction through the chain and "
                       f"the central {percent_text(w.confidence)} of simulated lots, against its limits (dashed); "
                       f"the window shaded.", panels=len(names))


def _roll_force(b, table, w):
    """The roll force range that lands in the window, with its figure."""
    from linkage.report import figures as F

    bound = w.bound or {}
    rf = w.roll_force or {}
    b.add(_part("blocks", "h3", text="Roll force for the window"))
    curve = rf.get("curve")
    if rf.get("mean_low") is not None:
        mean_text = f"the mean prediction is inside the window for {rf['mean_low']:.2f} – {rf['mean_high']:.2f} kN/cm"
    else:
        mean_text = "the mean prediction is inside the window at no roll force of the training range"
    if rf.get("low") is not None:
        b.add(_part("window", "roll_force", rf=rf, w=w, assured=bound.get("available"),
                    point_range=_range(rf.get("point_low"), rf.get("point_high"), 2),
                    mean_response_range=_range(rf.get("mean_response_low"), rf.get("mean_response_high"), 2),
                    in_window_range=_range(rf.get("in_window_low"), rf.get("in_window_high"), 2),
                    mean_text=mean_text))
        if rf.get("compactors_note"):
            b.add(_part("blocks", "para", text=f"The roll force range is {rf['compactors_note']}."))
    elif rf.get("reason"):
        b.note(f"Roll force range: {rf['reason']}.")
        if "curve" in rf:
            b.add(_part("blocks", "para", text=f"For comparison, {mean_text}."))
    held_rf = rf.get("held_chain") or rf.get("held")
    if held_rf:
        b.add(_part("window", "held_for_roll_force", held=[(k, v["value"], v["source"]) for k, v in held_rf.items()]))
    if curve:
        t = _by_lot(table)
        obs = (t[FORCE], t[POROSITY]) if FORCE in t.columns and POROSITY in t.columns else None
        b.figure(partial(F.plot_roll_force, curve["roll_force_kn_per_cm"], curve["porosity_mean"],
                         curve["p_in_window"], low=w.low.value, high=w.high.value, force_low=rf.get("low"),
                         force_high=rf.get("high"), confidence=w.confidence, observed=obs),
                 "Predicted lot-mean ribbon porosity against roll force (other settings held as stated), the "
                 "porosity window (green band), the roll force range where a lot meets every specification with the "
                 "stated probability through the whole chain (orange band; lower bound where the model has one) and "
                 "the probability that a lot's mean porosity lies in the window (dash-dot, right axis).")


# ----------------------------------------------------------------- 8. domain

def _watch_section(b, chain, table, window, result, samples_looked: bool = False):
    """Drift watch: residual charts per attribute, lot-mean porosity; ``result``: the watch of the
    table's lots (:func:`linkage.decide.watch.watch`); ``samples_looked``: whether it looked at each ribbon
    sample (:func:`_with_sample_looks`; when not, the list of other looks says it leaves them out)."""
    from linkage.report import figures as F

    from linkage.decide.mewma import LAMBDA
    from linkage.decide.watch import EWMA_LAMBDA

    b.section("drift", "Drift watch")
    alarm_lambda = result.mewma["design"]["lambda"] if result.mewma else LAMBDA
    b.add(_part("watch", "drift_intro", chart_lambda=f"{EWMA_LAMBDA:g}", alarm_lambda=f"{alarm_lambda:g}"))
    _alarm_figure(b, result)
    charts = list(result.charts.values())
    if not charts:
        b.note("No attribute has enough training residuals (at least 3, not all equal) for control limits.")
    else:
        def make():
            bottom = F.lot_axis_bottom([lot for c in charts for lot in c.lots])
            fig, axes = F.grid_axes(len(charts), ncols=2, panel=(4.2, 2.4), bottom=bottom, hspace=bottom + 0.3,
                                    wspace=1.0)
            for ax, c in zip(axes, charts):
                new = [p == "new" for p in c.phase]
                F.plot_control_chart(c.lots, c.residual, centre=c.reference.mu0, limits=c.limits,
                                     name=c.attribute, ewma=c.ewma, ewma_low=c.ewma_low, ewma_high=c.ewma_high,
                                     new=new, flagged=[bool(c.flags.get(lot)) for lot in c.lots],
                                     ylabel="residual [" + F.axis_label(c.attribute).rsplit("[", 1)[-1], ax=ax)
            return fig

        b.figure(make, "Residual control charts, one panel per attribute, lots in time order; open circles: "
                       "training lots, filled squares: lots since training, rings: flagged lots.",
                 panels=len(charts))
    pb = result.porosity_between
    if "values" in pb:
        flagged = [lot in pb["flags"] for lot in pb["lots"]]
        new = [lot in set(result.new_lots) for lot in pb["lots"]]
        def make_between():
            ax = F.plot_control_chart(pb["lots"], pb["values"], centre=pb["centre"], limits=tuple(pb["limits"]),
                                      name="ribbon_porosity", ewma=pb["ewma"], new=new, flagged=flagged,
                                      ewma_low=np.full(len(pb["values"]), np.nan),
                                      ewma_high=np.full(len(pb["values"]), np.nan))
            if window is not None and window.found:
                ax.axhspan(window.low.value, window.high.value, color=F.GREEN, alpha=0.12, linewidth=0,
                           label="porosity window")
                ax.legend(fontsize=6, loc="best", framealpha=0.8)
            return ax

        b.figure(make_between, "Lot-mean ribbon porosity in time order against the training lots' mean ± 3 SD, with "
                     "the porosity window shaded where one was found.")
    else:
        b.note(f"Lot-mean porosity chart not drawn: {pb.get('reason', 'no porosity values')}.")
    from linkage.decide.watch import design_lines

    b.add(_part("watch", "design", lines=design_lines(result.mewma)))
    b.add(_part("watch", "alarms", alarms=list(result.alarms), shown=40, n_new=len(result.new_lots)))
    from linkage.results import other_looks

    looks = other_looks(result.other_signals)  # as ``linkage watch`` lists them
    if looks:
        found = window is not None and getattr(window, "found", False)  # the window the samples were judged against
        window_text = (f"{window.low.value:.3f}–{window.high.value:.3f} at {percent_text(window.confidence)} "
                       "confidence") if found else None
        b.add(_part("watch", "other_looks", looks=looks, samples_looked=samples_looked, window_text=window_text))


def _alarm_figure(b, result) -> None:
    """The statistic that raises the drift alarm: the multivariate EWMA's T² of each lot since training against
    its limit h (``result.mewma``, :func:`linkage.decide.watch.mewma_look`), the lots it signals on marked; a note
    where there is no such lot. Nothing where no attribute is charted (the section says so)."""
    from linkage.report import figures as F

    m = result.mewma
    if m is None:
        return
    if not m["lots"]:
        why = "no lot since training" if not result.new_lots else "no lot since training has a residual"
        b.note(f"The alarm's statistic (T² against its limit h) is not drawn: {why}.")
        return
    lots, t2, h = [str(lot) for lot in m["lots"]], list(m["t2"]), float(m["h"])
    signalled = [lot in m["signals"] for lot in m["lots"]]
    lam = m["design"]["lambda"]
    b.figure(partial(F.plot_alarm_statistic, lots, t2, h=h, signalled=signalled, lam=lam),
             f"The alarm's statistic: T² of the multivariate EWMA (λ = {lam:g}) of all attributes' residuals, "
             "each lot since training in time order, against its limit h (dashed); filled vermilion: lots above h, "
             "the alarms listed below.")


def _domain_section(b, chain, table, set_aside=None):
    from linkage.report import figures as F

    b.section("domain", "Applicability domain of the training lots")
    b.add(_part("watch", "domain_intro"))
    gone = _domain_aside_text(chain, set_aside or {})
    if gone:
        b.add(_part("blocks", "para", text=gone))
    panels = []
    rows = []
    t = _by_lot(table)
    trained = list(t.index[chain.trained_on(t.index)])  # the table's training lots, in its (time) order
    for stage in chain.stages:
        if stage.domain is None:
            b.note(f"{stage.name} stage: no attribute of it could be trained, so it has no domain model.")
            continue
        missing = [c for c in stage.inputs if c not in t.columns]
        if missing:
            b.note(f"{stage.name} stage: the table lacks {', '.join(missing)}, so the domain cannot be drawn.")
            continue
        X = t.loc[trained, list(stage.inputs)].astype(float).dropna()
        if X.empty:
            b.note(f"{stage.name} stage: no training lot in this table has every input, so the domain cannot "
                   "be drawn.")
            continue
        verdicts = stage.domain.check(X)
        t2 = np.array([v.t2 for v in verdicts], float)
        q = np.array([v.q for v in verdicts], float)
        t2_lim, q_lim = verdicts[0].t2_limit, verdicts[0].q_limit
        out = [lot for lot, v in zip(X.index, verdicts) if not v.in_domain]
        panels.append((stage.name, t2, q, t2_lim, q_lim, list(X.index)))
        rows.append([stage.name, str(len(X)), number_text(t2_lim), number_text(q_lim), str(len(out)),
                     _part("blocks", "lots", values=_lots_text(out)) if out else "none"])
    if not panels:
        return
    b.add(table_html(["stage", "training lots", "T² limit", "Q limit", "outside", "which"], rows,
                     num_cols={1, 2, 3, 4}))
    b.add(_part("watch", "domain_note"))
    def make():
        fig, axes = F.grid_axes(len(panels), ncols=min(3, len(panels)), panel=(2.4, 2.0), left=0.85,
                                wspace=0.85)
        for ax, (name, t2, q, t2_lim, q_lim, lots) in zip(axes, panels):
            F.plot_domain(t2, q, t2_limit=t2_lim, q_limit=q_lim, lots=lots, stage=name, ax=ax)
        return fig

    b.figure(make, "Hotelling's T² against the Q residual of each training lot, one panel per stage, with the "
                   "95% limits (dashed: T²; dash-dot: Q); lots beyond a limit are marked and named.",
             panels=len(panels))


# ----------------------------------------------------------------- 9. model card

def _model_card(b, chain, spec, window, revised=(), origin=None):
    from linkage.models.cv import SELECTION_RULE, SIMPLICITY_ORDER

    b.section("card", "Model card")
    tr = chain.training
    lots = [str(v) for v in tr.get("lots", [])]
    versions = ", ".join(f"{k} {v}" for k, v in sorted((chain.library_versions or {}).items()))
    rows = [
        ["model id", chain.model_id or "unsaved"],
        ["trained", trained_text(chain.created_at)],  # to the second, in UTC, as the report's heading
        *([["how it came into service" if origin["promoted"] else "how it came", _part("card", "origin", o=origin)]]
          if origin else []),  # the audit trail's retrain entry of this model (model_origin)
        ["chain", _part("card", "stages", stages=chain.stages)],
        ["training lots", _part("card", "training_lots", n=len(lots), lots=_lots_text(lots, limit=200))],
        *([["training lots revised since", _part("card", "revised", n=len(revised), lots=revised_text(revised))]]
          if revised else []),
        ["data hash (SHA-256 of the training table)", _part("card", "code", text=tr.get("table_sha256", "n/a"))],
        ["library versions", versions or "n/a"],
        ["seed", chain.seed],
        ["nominal interval coverage", f"{100 * chain.nominal_coverage:.0f}%"],
    ]
    rows += _card_rows(chain, spec, window)
    b.add(table_html(None, rows))
    b.add(_part("blocks", "h3", text="Selection and intervals, per attribute"))
    trows = []
    for name, t in chain.targets.items():
        cov = t.coverage
        trows.append([name, t.selected, str(t.n_lots), (t.cv or {}).get("scheme", "n/a"),
                      f"{100 * t.nominal_coverage:.0f}%", "n/a" if cov is None else f"{100 * cov:.0f}%"])
    b.add(table_html(["attribute", "selected", "lots", "cross-validation", "nominal coverage",
                      "coverage on unseen lots"], trows))
    b.add(_part("card", "selection", rule=SELECTION_RULE.format(order=" < ".join(SIMPLICITY_ORDER)), caution=CAUTION))


def _card_rows(chain, spec, window) -> list[list]:
    """The model card's rows on the time point, the spec and the window."""
    rows = []
    if "dissolution_pct" in chain.targets:
        from linkage.timepoint import model_time_point

        t, recorded = model_time_point(chain)
        rows.append(["dissolution time point modelled", f"{t:g} min" + ("" if recorded else
                                                                     " (not recorded in the model: the default)")])
    if spec is not None:
        rows.append(["specification", "; ".join(f"{a}: {_limit_text(lim)}" for a, lim in spec.limits.items())])
        rows.append(["specification file and SHA-256", _part("card", "spec_file", spec=spec)])
        rows.append(["judge and time point per attribute", "; ".join(
            f"{a}: {spec.judge_of(a)}" + ("" if spec.time_point_of(a) is None else f" at {spec.time_point_of(a):g} min")
            for a in spec.limits)])
    if window is not None:
        rows.append(["window confidence and draws", f"{percent_text(window.confidence)}, {window.n_draws} draws, seed "
                                                    f"{window.seed}"])
        bound = window.bound or {}
        rows.append(["lower bound on the probability",
                     f"{percent_text(window.assurance)} assurance, {bound.get('n_replicates')} lot-level bootstrap "
                     "replicates"
                     + (f", simultaneous over the window (percentile {100 * bound['simultaneous']['quantile']:.2f})"
                        if bound.get("simultaneous") else "")
                     if bound.get("available") else bound.get("reason") or "none"])
    return rows


# ----------------------------------------------------------------- 10. cautions

def _cautions(b, chain, store_cautions=()):
    b.section("cautions", "Cautions")
    n = int(chain.training.get("n_lots", 0))
    items = [
        CAUTION,
        "The models learn from historical lots: they describe association, not cause. A setting that never varied "
        "in the training lots has no estimated effect.",
        "Predictions hold inside the applicability domain of the training lots only. Outside it (see the domain "
        "section and the what-if verdict) they are extrapolations.",
        f"Intervals and probabilities come from out-of-fold errors of {n} lots; with few lots they are themselves "
        "uncertain, and coverage is promised for lots like the training lots, not for a changed raw material, "
        "site or scale.",
        "The porosity window holds the other settings where the window section says (given, or held coherently with "
        "the given ones: their conditional mean over the training lots); "
        "a different setting can move it. The mean-response window overstates what can be promised.",
        "Retrain when new lots arrive or a residual chart drifts; a model is only as current as its data hash.",
    ]
    # what the lot store read cannot show (its missing anchor file), as the command said it on stderr
    items += [f"The lot store this report was made from: {c}." for c in store_cautions]
    b.add(_part("blocks", "items", values=items))
