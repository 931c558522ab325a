"""What the Python API (:mod:`linkage.api`) hands back: each result keeps the
library's own object, says what it holds in its ``repr``, gives a table with
``summary()`` (a pandas DataFrame) and the text the command line prints with
``text()`` (also ``str(result)``). The commands print these texts, so the
command line and Python say the same thing.

Importing this module imports neither pandas nor scikit-learn (``summary()``
imports pandas when it is called): ``linkage predict`` renders its text from
here and must stay light (``tests/decide/test_whatif_lean.py``).
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

from linkage import CAUTION
from linkage.numbers import percent_text

if TYPE_CHECKING:
    import pandas as pd

    from linkage.decide.retrain import RetrainDecision
    from linkage.decide.watch import WatchResult
    from linkage.decide.whatif import WhatIf
    from linkage.decide.window import WindowResult
    from linkage.models.fitted import FittedChain
    from linkage.spec import Spec
    from linkage.store import IngestResult


class _Result(ABC):
    """``summary()``, ``text()`` and ``str()`` for every result; attributes
    not found on the result are looked up on the library object it keeps
    (``result``), so ``window.low`` or ``whatif.predictions`` work as on the
    library's own objects."""

    @abstractmethod
    def summary(self) -> pd.DataFrame:
        """The result's numbers as a DataFrame."""

    @abstractmethod
    def text(self) -> str:
        """What the command prints."""

    def __str__(self) -> str:
        return self.text()

    def __getattr__(self, name: str):  # called only for names the result itself lacks
        if name.startswith("__") or name == "result":
            raise AttributeError(name)
        return getattr(self.result, name)


def _frame(rows: list[dict], index: str | list[str] | None = None) -> pd.DataFrame:
    import pandas as pd

    df = pd.DataFrame(rows)
    return df.set_index(index) if index is not None and not df.empty else df


def units_shown(text: str) -> str:
    """linkage's own words with a unit after a number as a reader writes it, 'µm' for 'um' (the report's and the
    sheet's rule, :func:`linkage.report.figures.shown_units_text`): the terminal texts of ``window``, ``predict``,
    ``space`` and ``assemble``; their ``--json`` keeps the texts as recorded. Python 3 writes stdout as UTF-8 here,
    as it writes the other non-ASCII signs of these texts (–, ≥, ², ρ)."""
    from linkage.report.figures import shown_units_text

    return shown_units_text(text)


def _rows(n) -> str:
    return "" if n is None else f"{n} row{'s' if n != 1 else ''}"


def _fmt(v, spec: str = ".4g") -> str:
    return "—" if v is None else format(v, spec)


# --------------------------------------------------------------------------- ingest


@dataclass(repr=False)
class Ingested(_Result):
    """One ingest of a folder into a lot store (``linkage ingest``)."""

    store: Path
    folder: Path
    result: IngestResult
    #: table -> {"file", "sha256", "rows"} of every file read
    sources: dict[str, dict]
    #: the folder's spec.toml, when it has one
    spec: Spec | None = None
    #: a preview's cautions about the store, as the reading commands give them (a store without its anchor file
    #: no longer gets here: its preview is refused with exit code 6, as its ingest is)
    cautions: list[str] = field(default_factory=list)

    def to_dict(self) -> dict:
        """What ``linkage ingest --json`` prints (a preview's: also ``cautions``)."""
        out = {**self.result.to_dict(), "store": str(self.store), "sources": self.sources}
        return {**out, "cautions": self.cautions} if self.result.preview else out

    def summary(self) -> pd.DataFrame:
        """One row per lot of the folder: ``status`` new, revised or unchanged; ``revision`` of a revised lot
        "added to" (only added: no reason needed) or "changed" (stored values changed or removed)."""
        r = self.result
        kind = {**dict.fromkeys(r.lots_added_to, "added to"), **dict.fromkeys(r.lots_changed, "changed")}
        rows = [{"lot": lot, "status": status, "revision": kind.get(lot)}
                for status, lots in (("new", r.lots_new), ("revised", r.lots_revised),
                                     ("unchanged", r.lots_unchanged)) for lot in lots]
        import pandas as pd

        return pd.DataFrame(rows, columns=["lot", "status", "revision"]).set_index("lot")

    def text(self) -> str:
        r = self.result
        lines = [f"Preview of an ingest into {self.store} from {self.folder} (nothing was written):" if r.preview
                 else f"Ingest {r.ingest_id} into {self.store} from {self.folder}:"]
        lines += [f"  {src['file']:<28} {_rows(src['rows'])}" for src in self.sources.values()]
        for label, lots in (("New", r.lots_new), ("Revised", r.lots_revised), ("Unchanged", r.lots_unchanged)):
            lines.append(f"{label} lots ({len(lots)}): {', '.join(lots) if lots else '-'}")
            if label == "Revised" and lots:
                lines += [f"  {what} ({len(some)}): {', '.join(some) if some else '-'}" for what, some in (
                    ("added to, no stored value changed", r.lots_added_to),
                    ("stored values changed or removed", r.lots_changed))]
        if r.lots_set_aside:
            lines.append(f"Set aside, and they stay so ({len(r.lots_set_aside)}): {', '.join(r.lots_set_aside)}; "
                         "left out of fitting and judging until 'linkage restore LOT --reason TEXT' ('linkage lots' "
                         "shows why)")
        if not r.changed:
            lines.append("Nothing changed: every lot is as stored." if not r.preview
                         else "Nothing would change: every lot is as stored.")
        if r.warnings:
            lines.append("Warnings:")
            lines += [f"  - {w}" for w in r.warnings]
        lines += _unusual_lines(r.accepted_unusual)
        lines += [f"Note: {extra_columns_note(file, columns)}" for file, columns in r.extra_columns.items()]
        lines += [f"Note: {blank_required_note(file, columns)}" for file, columns in r.blank_required.items()]
        lines += [f"Note: {note}" for note in r.notes]
        return "\n".join(lines + (self._preview_lines() if r.preview else []))

    def _preview_lines(self) -> list[str]:
        """A preview's differences per revised lot, its cautions, and that nothing was written."""
        from linkage.store import change_text

        r = self.result
        lines = ["What would change (old -> new):"] if r.changes else []
        for lot, listed in r.changes.items():
            lines.append(f"  lot {lot} ({'stored values changed' if listed['revision'] == 'changed' else 'added to'}):")
            lines += [f"    {change_text(ch)}" for ch in listed["changes"]]
            lines += [f"    ... and {listed['more']} more change(s)"] if listed["more"] else []
        lines += [f"  ... and {r.more_lots} more revised lot(s), not listed"] if r.more_lots else []
        lines += [f"Caution: {c}" for c in self.cautions]
        if r.needs_reason:
            return lines + [f"The ingest would be refused: {r.needs_reason}",
                            "Nothing was written: the store, its anchor file and its audit trail are as they were. "
                            "The same command without --preview and with --reason TEXT ingests the folder."]
        return lines + ["Nothing was written: the store, its anchor file and its audit trail are as they were. "
                        "The same command without --preview ingests the folder."]

    def __repr__(self) -> str:
        r = self.result
        return (f"<Ingested {self.folder} into {self.store} (ingest {r.ingest_id}): {len(r.lots_new)} new, "
                f"{len(r.lots_revised)} revised ({len(r.lots_added_to)} only added to), {len(r.lots_unchanged)} "
                "unchanged lots"
                + (f"; {len(r.warnings)} warning(s)" if r.warnings else "") + ">")


def extra_columns_note(file: str, columns: list[dict]) -> str:
    """One line of the extra columns a file kept (``IngestResult.extra_columns``): each name, a declared one
    (mapped in columns.toml) said so, and one near a template column the file also has (``near``) warned of."""
    from linkage.read import MAPPING_FILE

    def one(col: dict) -> str:
        if col.get("near"):
            return (f"{col['column']} (a near-twin of the template column {col['near']}, which the file also has: "
                    "check it is not a misspelt copy)")
        return f"{col['column']} (declared in {MAPPING_FILE})" if col.get("declared") else col["column"]

    return f"{file}: kept as extra columns, not in the template: {', '.join(one(c) for c in columns)}"


def blank_required_note(file: str, columns: list[dict]) -> str:
    """One line of the blank cells of a file's required columns (``IngestResult.blank_required``): per column
    the header, its rows and lots (the first :data:`~linkage.read.folder.BLANK_SHOWN`), then what follows (the
    same for a table's columns, said once); read as missing values, not refused."""
    from linkage.lotid import row_span
    from linkage.read.folder import BLANK_SHOWN

    def one(col: dict) -> str:
        lots = col["lots"]
        named = ", ".join(map(str, lots[:BLANK_SHOWN]))
        if len(lots) > BLANK_SHOWN:  # the count of all said, the first named (a user test: "..." hid how many)
            named = f"{len(lots)} lots: {named} and {len(lots) - BLANK_SHOWN} more"
        else:
            named = f"lot{'s' if len(lots) > 1 else ''} {named}"
        return f"{col['header']} in {row_span(col['rows'])} ({named})"

    means = "; ".join(dict.fromkeys(col["means"] for col in columns))  # one table's file: said once
    return (f"{file}: blank cells in required columns, read as missing values: {', '.join(one(c) for c in columns)}"
            f"; {means}; filling them in later adds to the stored lots (no --reason needed)")


def _unusual_lines(records: list[dict], shown: int = 5) -> list[str]:
    """The unusual values an ingest takes deliberately (``--accept-unusual``), the first ``shown`` of them."""
    if not records:
        return []
    lines = [f"Unusual values taken deliberately ({len(records)}):"]
    lines += [f"  - {rec['file']}, row {rec['row']}, lot {rec['lot']}, {rec['column']} {rec['value']:g}"
              + (f" (recent lots around {rec['typical']:.4g})" if rec.get("typical") is not None else "")
              for rec in records[:shown]]
    return lines + ([f"  ... and {len(records) - shown} more"] if len(records) > shown else [])


# --------------------------------------------------------------------------- train

#: keys of one attribute in ``train --json`` (the issue's list, plus the
#: reasons and methods a reader needs to judge them, and the README's
#: ``hyperparameters``, ``spread`` and ``interval_basis``)
TARGET_KEYS = ("stage", "inputs", "n_lots", "cv", "candidates", "unavailable", "noise_floor", "noise_floor_method",
               "selected", "selection_rule", "selection", "hyperparameters", "nominal_coverage", "coverage",
               "coverage_method", "infinite_intervals", "interval_method", "coverage_by_region",
               "coverage_region_variable", "coverage_guarantee", "interval_choice", "spread", "interval_basis", "vip",
               "rd_params", "notes")


def train_json(fitted: FittedChain) -> dict:
    """What ``train --json`` prints: the model id and one object per attribute."""
    meta = fitted.metadata()
    return {
        "model_id": fitted.model_id,
        "created_at": meta["created_at"],
        "n_lots": meta["training"]["n_lots"],
        "table_sha256": meta["training"]["table_sha256"],
        "seed": meta["seed"],
        "dissolution_time_min": meta["training"].get("dissolution_time_min"),
        "group_by": meta["training"].get("group_by", "lot"),
        "materials": meta["training"].get("materials"),
        **products_json(meta["training"]),
        "set_aside_lots": list(meta["training"].get("set_aside_lots") or []),
        "watch_design": meta["training"].get("watch_design"),  # the drift alarm's design, simulated at training
        "targets": {name: {**{k: t.get(k) for k in TARGET_KEYS}, "forward": t.get("forward")}
                    for name, t in meta["targets"].items()},
        "skipped": meta["skipped"],
        "caution": CAUTION,
    }


def products_json(training: dict) -> dict:
    """``products`` (each product of the training lots with ``n_lots``; ``product`` null for lots without a
    product name) and ``products_note`` (what ``train`` says on stderr of a model of several products, else
    null): the keys ``train --json`` gains for a store of several products."""
    from linkage.products import train_note, training_counts

    counts = training_counts(training)
    return {"products": [{"product": p, "n_lots": n} for p, n in counts], "products_note": train_note(counts)}


def _num(v, width=9, fmt=".4g", sign="") -> str:
    return f"{'—':>{width}}" if v is None else f"{v:>{sign}{width}{fmt}}"


def materials_lines(m: dict | None) -> list[str]:
    """The paired comparison with and without each extra material column (issue 19; ``train``'s default)."""
    if not m:
        return []
    if not m.get("columns"):
        return ["", f"Material columns: none used ({m.get('reason', 'none found')})."]
    kept = m.get("kept") or {t: [] for t in m["kept_for"]}
    said = "; ".join(f"{t}: {', '.join(c)}" for t, c in kept.items()) if kept else "none"
    lines = ["", f"Material columns {', '.join(m['columns'])}: each tried alone as an input of every attribute "
                 "(the selected candidate and linear_select refitted in the same grouped folds); kept where the "
                 f"paired one-sided t-test on the lots' squared errors gives p < {m.get('alpha', 0.05):g} / refits "
                 f"tried. Kept: {said}."]
    lines += _missing_lines(m)
    for t, r in m["targets"].items():
        w = r["without"]
        lines.append(f"  {t}: CV RMSE {w['rmse']:.4g} (SE {w['rmse_se']:.2g}, {w['selected']}) without")
        for c, v in (r.get("columns") or {}).items():
            if "rmse_with" not in v:
                lines.append(f"    {c}: not tried ({v.get('reason', '')})")
                continue
            on = (f"{v['n_lots']} lots" if "n_lots_attribute" not in v else
                  f"the {v['n_lots']} of {v['n_lots_attribute']} lots that have it, against refits without it on "
                  f"the same lots and folds")
            # both tests that decide, each with its p, and the level they must pass (a review: only the first was
            # shown, so a column refused by the second read as better with p tiny and 'not kept')
            same = ("" if "p_same_candidate" not in v else
                    f"; against {v['candidate']} without it {v['rmse_same_candidate_without']:.4g}, "
                    f"p = {v['p_same_candidate']:.2g}")
            level = f"; level {v['level']:.2g}" if "level" in v else ""
            lines.append(f"    {c}: {v['rmse_with']:.4g} with ({v['candidate']}) against {v['rmse_without']:.4g} "
                         f"without, paired p = {v['p']:.2g} on {on}{same}{level}: "
                         + ("kept" if v["kept"] else "not kept"))
        if r.get("final"):
            f = r["final"]
            lines.append(f"    refitted with {', '.join(r['kept_columns'])} in stage {f['stage']}: "
                         f"CV RMSE {f['rmse']:.4g} ({f['selected']})")
            if f.get("note"):
                lines.append(f"    note: {f['note']}")
    return lines


def _missing_lines(m: dict) -> list[str]:
    """The material columns missing on some training lots, and how the comparison treats them."""
    gaps = m.get("missing_on") or {}
    if not gaps:
        return []
    lines = [f"  {c} is missing on {len(lots)} lots ({', '.join(lots)})." for c, lots in gaps.items()]
    return lines + [f"  So: {m.get('partial', '')}."]


def forward_lines(t: dict) -> list[str]:
    """The forward-in-time check of one attribute's summary, beside its CV (issue 19)."""
    f = t.get("forward")
    if not f:
        return []
    if "reason" in f:
        return [f"    forward in time: not made ({f['reason']})"]
    ratio = "" if f["rmse_over_cv"] is None else f", {f['rmse_over_cv']:.2f} × the CV RMSE"
    return [f"    forward in time (fit on {f['n_train']} lots until {f['train_until'][:10]}, scored on the "
            f"{f['n_test']} later): RMSE {f['rmse']:.4g}{ratio}, bias {f['bias']:+.3g}, "
            f"{f['nominal_coverage']:.0%} interval coverage {f['coverage']:.1%}"]


def train_text(fitted: FittedChain) -> str:
    """Compact text: per attribute, each candidate against the mean, the
    Ryshkewitch–Duckworth baseline and the noise floor."""
    from linkage.timepoint import time_point_text

    meta = fitted.metadata()
    tr = meta["training"]
    lines = [f"Model {fitted.model_id}: {tr['n_lots']} lots, seed {meta['seed']}, "
             f"table SHA-256 {tr['table_sha256'][:12]}…; {time_point_text(fitted)}"]
    for name, t in meta["targets"].items():
        cv = t["cv"]
        lines += ["", f"{name}  [{t['stage']} stage; {t['n_lots']} lots; {cv['scheme']}, seed {cv['seed']}]",
                  f"    {'candidate':<16}{'RMSE':>9}{'MAE':>9}{'Q²':>7}{'bias':>10}{'/mean':>7}{'/RD':>7}"
                  f"{'/noise':>8}"]
        cands = t["candidates"]
        mean_rmse = cands["mean"]["rmse"] if "mean" in cands else None
        rd_rmse = cands["rd_baseline"]["rmse"] if "rd_baseline" in cands else None
        for cname, m in cands.items():
            mark = "*" if cname == t["selected"] else " "
            bias = 0.0 if abs(m["bias"]) <= 1e-12 * max(1.0, m["rmse"]) else m["bias"]  # round-off shown as 0
            rel_mean = m["rmse"] / mean_rmse if mean_rmse else None
            rel_rd = m["rmse"] / rd_rmse if rd_rmse else None
            lines.append(
                f"  {mark} {cname:<16}{_num(m['rmse'])}{_num(m['mae'])}{_num(m['q2'], 7, '.3f')}"
                f"{_num(bias, 10, '.3g', '+')}{_num(rel_mean, 7, '.2f')}{_num(rel_rd, 7, '.2f')}"
                f"{_num(m['rmse_over_noise'], 8, '.2f')}")
        for cname, why in t["unavailable"].items():
            lines.append(f"    {cname:<15} not used: {why}")  # a space even after a name of 15 characters or more
        floor = t["noise_floor"]
        lines.append("    noise floor: " + (f"{floor:.4g}, {t['noise_floor_method']}" if floor is not None
                                            else t["noise_floor_method"]))
        sel = t["selection"]
        why = "lowest CV RMSE" if sel["best"] == t["selected"] else (
            f"simplest within one SE of the lowest, {sel['best']} with RMSE {sel['best_rmse']:.4g}")
        lines.append(f"    selected: {t['selected']} ({why})")
        choice = t.get("interval_choice") or {"method": "CV+"}
        lines.append(f"    {t['nominal_coverage']:.0%} {choice['method']} intervals: empirical coverage "
                     f"{t['coverage']:.1%} (nested outer CV, lots held out)")
        if t.get("coverage_guarantee"):
            lines.append(f"    guarantee: {t['coverage_guarantee']['text']}")
        for r in t.get("coverage_by_region") or []:
            lo, hi = r["range"]
            cov = "no lots" if r["coverage"] is None else (
                f"{r['coverage']:.1%} of {r['n']} lots (95% Clopper–Pearson {r['ci_low']:.1%}–{r['ci_high']:.1%})")
            lines.append(f"      {t.get('coverage_region_variable') or 'region'} {lo:.4g}–{hi:.4g}: {cov}")
        lines += forward_lines(t)
        for note in t["notes"]:
            lines.append(f"    note: {note}")
    lines += materials_lines(tr.get("materials"))
    if meta["skipped"]:
        lines += ["", "Not trained:"]
        lines += [f"  {name}: {why}" for name, why in meta["skipped"].items()]
    lines += ["", CAUTION]
    return "\n".join(lines)


@dataclass(repr=False)
class Trained(_Result):
    """A chain trained under grouped CV and registered (``linkage train``).
    ``chain`` is the fitted chain; the model is in ``models_dir`` under
    ``model_id``."""

    model_id: str
    models_dir: Path
    chain: FittedChain
    store: Path | None = None

    @property
    def result(self) -> FittedChain:
        return self.chain

    def to_dict(self) -> dict:
        """What ``linkage train --json`` prints."""
        return train_json(self.chain)

    def text(self) -> str:
        return train_text(self.chain)

    @property
    def notes(self) -> list[str]:
        """What ``linkage train`` says on stderr: that the model was trained on several products (or on lots
        without a product name beside them), naming them and their lots; and the lots set aside that it left
        out (recorded with the model, ``training["set_aside_lots"]``)."""
        from linkage.store import set_aside_note

        note = products_json(self.chain.training)["products_note"]
        aside = set_aside_note(self.chain.training.get("set_aside_lots") or [], "left out of its training set")
        return [n for n in (note, aside) if n]

    def summary(self) -> pd.DataFrame:
        """One row per attribute and candidate (index ``attribute``,
        ``candidate``): grouped-CV ``rmse``, ``mae``, ``q2``, ``bias``,
        ``rmse_over_noise``, whether it was ``selected``, and the attribute's
        ``stage``, ``n_lots``, ``noise_floor``, ``nominal_coverage`` and
        empirical ``coverage``."""
        meta = self.chain.metadata()
        rows = []
        for name, t in meta["targets"].items():
            for cname, m in t["candidates"].items():
                rows.append({"attribute": name, "candidate": cname, "stage": t["stage"], "n_lots": t["n_lots"],
                             "rmse": m["rmse"], "mae": m["mae"], "q2": m["q2"], "bias": m["bias"],
                             "rmse_over_noise": m["rmse_over_noise"], "selected": cname == t["selected"],
                             "noise_floor": t["noise_floor"], "nominal_coverage": t["nominal_coverage"],
                             "coverage": t["coverage"]})
        return _frame(rows, ["attribute", "candidate"])

    def __repr__(self) -> str:
        sel = ", ".join(f"{name}: {t.selected}" for name, t in self.chain.targets.items())
        return (f"<Trained model {self.model_id} on {self.chain.training['n_lots']} lots, seed {self.chain.seed}, "
                f"in {self.models_dir}; selected {sel}>")


# --------------------------------------------------------------------------- window


def window_text(result: WindowResult) -> str:
    """What ``linkage window`` prints."""
    d = result.to_dict(curve=False)
    bound = d.get("bound") or {}
    has_bound = bool(bound.get("available"))
    lines = _window_head_lines(d, bound, has_bound)
    lines += _porosity_window_lines(d, has_bound)
    lines += _roll_force_lines(d, has_bound)
    lines += _window_settings_lines(d)
    if d["not_modelled"]:
        lines.append("Not part of the window: " + "; ".join(f"{a} ({why})" for a, why in _not_judged(d).items()))
    lines += window_judges_lines(d)
    if d.get("spec") and d["spec"].get("file"):
        lines.append(f"Spec {d['spec']['file']}, SHA-256 {d['spec']['sha256']}")
    lines.append(CAUTION)
    return "\n".join(lines)


def _dissolution_time_text(d: dict, lead: str) -> str:
    """'; dissolution at 30 min' (``lead`` first) where the window judges dissolution at a time point, with the
    note on a time point the model did not record; '' otherwise."""
    if not (d.get("dissolution_time_min") and "dissolution_pct" in d["attributes"]):
        return ""
    note = f", {d['time_point_note']}" if d.get("time_point_note") else ""
    return f"{lead}dissolution at {d['dissolution_time_min']:g} min{note}"


def window_judges_lines(d: dict) -> list[str]:
    """The window's one "Judged:" block: how each attribute is judged, the dissolution line with its time point
    (a user test read "Judged:" twice in the window's text, the attributes in its head and how each is judged at
    its end). A window saved without ``judges`` says the attributes in its head instead (``_window_head_lines``)."""
    lines = judges_lines(d.get("judges") or {})
    at = _dissolution_time_text(d, "").removeprefix("dissolution ")
    return [f"{line}; {at}" if at and line.startswith("  dissolution_pct: ") else line for line in lines]


def _not_judged(d: dict) -> dict[str, str]:
    """Each attribute the window does not judge, with why (a window saved without the reasons: not
    predicted from porosity)."""
    reasons = d.get("not_modelled_reasons") or {}
    return {a: reasons.get(a, "not predicted from porosity by this model") for a in d["not_modelled"]}


def _window_head_lines(d: dict, bound: dict, has_bound: bool) -> list[str]:
    """What the window is (bound or point estimate), what was judged, the training range, and why nothing
    is promised where nothing is."""
    from linkage.report.sheet import every_spec_text

    por = d["ribbon_porosity"]
    every = every_spec_text(d["not_modelled"])
    what = (f"the chance that {every} passes together for a lot is at least {percent_text(d['confidence'])} with "
            f"{percent_text(d['assurance'])} assurance over the whole window at once (lower bound over "
            f"{bound.get('n_replicates')} lot-level bootstrap replicates of the chain)") if has_bound else \
        f"the point estimate of the chance that {every} passes together for a lot reaches " \
        f"{percent_text(d['confidence'])}"
    lines = [f"Model {d['model_id']}; window where {what}"
             + (" (" + "; ".join(f"{a}: {why}, not judged" if "not judged" not in why else f"{a}: {why}"
                                 for a, why in _not_judged(d).items()) + ")" if d["not_modelled"] else "") + ".",
             *([] if d.get("judges") else [f"Judged: {', '.join(d['attributes'])}{_dissolution_time_text(d, '; ')}."]),
             f"Training lots cover ribbon porosity {por['data_range'][0]:.3f}–{por['data_range'][1]:.3f}."]
    if not d.get("promise", True):
        from linkage.report.sheet import WINDOW_NO_PROMISE

        in_domain_reasons = [r for r in d["promise_reasons"] if r != bound.get("reason")]
        if in_domain_reasons:
            lines.append(f"!! {WINDOW_NO_PROMISE}")
            lines += [f"   - {units_shown(r)}" for r in in_domain_reasons]
        if not has_bound:
            lines.append(f"!! {bound.get('reason')}")
    return lines


def _porosity_window_lines(d: dict, has_bound: bool) -> list[str]:
    """The porosity window (or its absence), its edges, the point-estimate and mean-response windows."""
    por = d["ribbon_porosity"]
    lines = []
    if not d["found"]:
        lines.append("NO WINDOW: at no porosity in the training range does the "
                     + (f"lower bound ({percent_text(d['assurance'])} assurance)" if has_bound else "point estimate")
                     + f" of the chance of meeting every specification reach {percent_text(d['confidence'])}.")
    else:
        lines.append(f"Porosity window: {por['low']:.3f} – {por['high']:.3f}"
                     + ("" if d.get("promise", True) else " (not promised)"))
        for side in ("low", "high"):
            by = por[f"{side}_limited_by"]
            why = "cut by the range of the training data, not by a specification" if by == "data range" \
                else f"limited by {by}"
            lines.append(f"  {side} edge: {why}")
        if len(por["segments"]) > 1:
            lines.append("  other passing ranges: " + ", ".join(f"{a:.3f}–{b:.3f}" for a, b in por["segments"]))
    if has_bound:
        lines.append("Point-estimate window (the probability's point estimate reaches the confidence; beside the "
                     "bound, not promised): " + (f"{por['point_low']:.3f} – {por['point_high']:.3f}"
                                                 if por.get("point_low") is not None else "none"))
    mw = d["mean_response_window"]
    if mw["low"] is not None:
        lines.append(f"Mean-response window (overstates what can be promised): {mw['low']:.3f} – {mw['high']:.3f}")
    return lines


def _roll_force_lines(d: dict, has_bound: bool) -> list[str]:
    """The roll force range for the window and the ranges beside it."""
    rf = d["roll_force_kn_per_cm"]
    lines = []
    if rf.get("low") is not None:
        on_lots = ", judged on lot values," if rf.get("lot_values_note") else ""
        lines.append(f"Roll force (through the whole chain, ribbon scatter included; every specification{on_lots} "
                     f"at least {percent_text(d['confidence'])}"
                     + (f" with {percent_text(d['assurance'])} assurance" if has_bound else " by the point estimate") +
                     f"): {rf['low']:.2f} – {rf['high']:.2f} kN/cm")
        if rf.get("lot_values_note"):
            lines.append(f"  {rf['lot_values_note']}")
    elif rf.get("reason"):
        lines.append(f"Roll force: {rf['reason']}")
    if rf.get("compactors_note") and rf.get("low") is not None:
        lines.append(f"  {rf['compactors_note']}")
    beside = []
    if has_bound and rf.get("point_low") is not None:
        beside.append(f"point estimate {rf['point_low']:.2f} – {rf['point_high']:.2f}")
    if rf.get("mean_response_low") is not None:
        beside.append(f"chain of mean predictions passes {rf['mean_response_low']:.2f} – "
                      f"{rf['mean_response_high']:.2f}")
    if rf.get("mean_low") is not None:
        beside.append(f"mean porosity in the window {rf['mean_low']:.2f} – {rf['mean_high']:.2f}")
    if beside:
        lines.append("  beside it (kN/cm): " + "; ".join(beside))
    return lines


def _window_settings_lines(d: dict) -> list[str]:
    """The settings used and held, and the held points' domain verdicts."""
    from linkage.decide.held import held_text

    rf = d["roll_force_kn_per_cm"]
    lines = ["Settings used:"]
    for k, v in d["settings"].items():
        lines.append(f"  {k} = {v['value']:.4g} ({v['source']})")
    held_rf = rf.get("held_chain") or rf.get("held")
    if held_rf:
        lines.append("Held for the roll force range: " +
                     ", ".join(f"{k} = {v['value']:.4g} ({v['source']})" for k, v in held_rf.items()))
    if d.get("held_point"):
        lines.append(f"Held: {d['held_point']['rule']}.")
        lines.append(units_shown(held_text(d["held_point"], "held point of the window (at its middle porosity)")))
    if rf.get("held_point"):
        lines.append(units_shown(held_text(rf["held_point"],
                                           "held point of the roll force range (at its middle force)")))
    return lines


@dataclass(repr=False)
class Window(_Result):
    """The ribbon porosity window of a model under a spec (``linkage
    window``). ``result`` is the library's :class:`~linkage.decide.window.WindowResult`;
    ``recorded`` says whether the window went into the store's audit trail."""

    result: WindowResult
    recorded: bool = False
    store: Path | None = None
    #: the model's training lots that the store now holds set aside, and what ``watch`` says of them
    set_aside_in_training: tuple[str, ...] = ()
    set_aside_note: str | None = None
    #: why the store was not read for them (it does not exist, or could not be read); None when it was, or when no
    #: store was given (:func:`linkage.api.window`; the command line says it on stderr)
    set_aside_unread: str | None = None

    def to_dict(self, curve: bool = True) -> dict:
        """What ``linkage window --json`` prints (with ``set_aside_in_training``: the model's training lots set
        aside since)."""
        return {**self.result.to_dict(curve=curve), "set_aside_in_training": list(self.set_aside_in_training)}

    def text(self) -> str:
        text = window_text(self.result)
        if self.set_aside_note is None:
            return text
        note = f"Note: {self.set_aside_note}."
        if not text.endswith(CAUTION):
            return f"{text}\n{note}"
        return f"{text.removesuffix(CAUTION).rstrip()}\n{note}\n{CAUTION}"  # the caution ends every text

    def summary(self) -> pd.DataFrame:
        """Two rows, ``low`` and ``high`` (index ``edge``): the window's
        ``ribbon_porosity`` edge and what ``limited_by`` it, the
        ``mean_response`` window's edge (which overstates what can be
        promised), and the roll force range (``roll_force_kn_per_cm``: where
        the lower bound of P(all pass), simulated through the whole chain,
        reaches the confidence; ``roll_force_mean_kn_per_cm``: where the mean
        porosity prediction lands in the window). The porosity edges are the
        lower bound's (``ribbon_porosity``); the point estimate's are in
        ``to_dict()['ribbon_porosity']['point_low'/'point_high']``. Empty
        edges (no window) are missing values."""
        r = self.result
        rf = r.roll_force or {}
        mean = {"low": r.mean_low, "high": r.mean_high}
        rows = [{"edge": side, "ribbon_porosity": getattr(r, side).value, "limited_by": getattr(r, side).limited_by,
                 "mean_response": mean[side], "roll_force_kn_per_cm": rf.get(side),
                 "roll_force_mean_kn_per_cm": rf.get(f"mean_{side}"), "confidence": r.confidence,
                 "promise": r.promise} for side in ("low", "high")]
        return _frame(rows, "edge").astype({"ribbon_porosity": float, "mean_response": float,
                                            "roll_force_kn_per_cm": float, "roll_force_mean_kn_per_cm": float})

    def curve(self) -> pd.DataFrame:
        """The scan behind the window, one row per ribbon porosity of the
        grid: ``p_all`` (every specification together), ``p_<attribute>``,
        ``mean_pass`` and, where checked, ``in_domain``."""
        c = self.result.to_dict(curve=True)["curve"]
        columns = {"ribbon_porosity": c["ribbon_porosity"], "p_all": c["p_all"],
                   **{f"p_{k}": v for k, v in c["p_each"].items()}, "mean_pass": c["mean_pass"]}
        if c.get("p_all_low") is not None:  # the lower bound at the window's assurance (issue 12)
            columns["p_all_low"] = c["p_all_low"]
        if "in_domain" in c:
            columns["in_domain"] = c["in_domain"]
        import pandas as pd

        return pd.DataFrame(columns)

    def headline(self, roll_force: bool = False) -> str:
        """The window in words on one line: its porosity edges at its confidence and what limits each (and, with
        ``roll_force``, the roll force range where it was found); what ``repr`` and the demo's last lines say."""
        r = self.result
        if not r.found:
            return f"no window at {percent_text(r.confidence)} confidence"
        what = (f"ribbon porosity {r.low.value:.3f}–{r.high.value:.3f} at {percent_text(r.confidence)} "
                f"confidence (low edge: {r.low.limited_by}, high edge: {r.high.limited_by})")
        rf = r.roll_force or {}
        if roll_force and rf.get("low") is not None and rf.get("high") is not None:
            what += f"; roll force {rf['low']:.2f}–{rf['high']:.2f} kN/cm"
        return what

    def __repr__(self) -> str:
        r = self.result
        return (f"<Window {self.headline()}; model {r.model_id}"
                + ("" if r.promise else "; not promised (outside the domain)") + ">")


# --------------------------------------------------------------------------- what-if


def stage_text(p_stage: dict) -> str:
    """``at S1 40.0%, by S2 90.0%, by S3 99.0%`` (cumulative stage probabilities of a compendial judgement)."""
    from linkage.report.sheet import probability_text

    return ", ".join(f"{'at' if i == 0 else 'by'} {k if k.startswith('S') else 'stage ' + k} "
                     f"{probability_text(v)}" for i, (k, v) in enumerate(p_stage.items()))


def judges_lines(judges: dict) -> list[str]:
    """How each attribute was judged (linkage.decide.compendial.judge_text), one line each."""
    return (["Judged:"] + [f"  {a}: {how}" for a, how in judges.items()]) if judges else []


def _end(v) -> str:
    return "unbounded" if v is None or abs(v) == float("inf") else f"{v:.4g}"


def trained_products_lines(d: dict, reader: bool = False) -> list[str]:
    """A what-if's line on a model trained on several products (or on lots without a product name beside
    them): what it was trained on, since the what-if's product is then not the model's alone. ``reader``: for a
    reader of the sheet, who cannot give an option (the product not stated is said, not asked for)."""
    from linkage.products import is_mixed, trained_on_text

    counts = [(p["product"], p["n_lots"]) for p in d.get("trained_products") or []]
    if not is_mixed(counts):
        return []
    return [f"Model {trained_on_text(counts)}"
            + ("." if d.get("product") is not None else "; the product was not stated when the what-if was made."
               if reader else "; give --product to say which this what-if is for.")]


def whatif_text(result: WhatIf) -> str:
    """What ``linkage predict`` prints for one what-if."""
    from linkage.report.sheet import (NO_PROMISE, PROJECTED_NOTE, at_least, bound_text, every_spec_text,
                                      not_judged_text, probability_text, projected_text)

    d = result.to_dict()
    lvl = f"{d['interval_level']:.0%}"
    bound = d["p_pass_all_bound"]
    lines = []
    if d.get("lot") is not None or d.get("product") is not None:
        lines.append("For " + ", ".join(s for s in (f"lot {d['lot']}" if d.get("lot") else "",
                                                    f"product {d['product']}" if d.get("product") else "") if s)
                     + ":")
    head = f"Model {d['model_id']}, {lvl} intervals"
    if d.get("dissolution_time_min") is not None:
        head += f"; dissolution modelled at {d['dissolution_time_min']:g} min"
        if not d.get("time_point_recorded", True):
            from linkage.timepoint import UNRECORDED_NOTE

            head += f" ({UNRECORDED_NOTE})"
    lines.append(head + ".")
    lines += trained_products_lines(d)
    if d.get("spec"):
        lines.append(f"Spec {d['spec'].get('file') or '(not from a file)'}"
                     + (f", SHA-256 {d['spec']['sha256'][:12]}…" if d['spec'].get('sha256') else "")
                     + f"; judged against {every_spec_text(d['not_modelled_reasons'])}.")
        if d["not_modelled_reasons"]:
            lines.append(f"!! {not_judged_text(d['not_modelled_reasons'])}")
    if not d["in_domain"]:
        lines.append(f"!! {NO_PROMISE}")
        lines += [f"   - {units_shown(r)}" for r in d["domain_reasons"]]
    if bound.get("reason"):
        lines.append(f"!! {bound['reason']}")
    lines.append("Inputs: " + ", ".join(f"{k}={v['value']:.4g}"
                                        + (" (median)" if v["source"] == "training median" else
                                           " (held)" if v["source"] != "given" else "")
                                        for k, v in d["inputs"].items()))
    hp = d.get("held_point") or {}
    if hp.get("held"):
        from linkage.decide.held import held_text

        lines.append(f"Held: {hp['rule']}. {units_shown(held_text(hp))}")
    projected = []
    for name, p in d["predictions"].items():
        line = f"  {name:<24} {p['value']:>9.4g}   [{_end(p['low'])}, {_end(p['high'])}]"
        if p.get("projected"):
            line += " *"
            projected.append(f"   * {name}: {projected_text(p)}")
        if "p_pass" in p:
            line += f"   P(pass) {bound_text(p.get('p_pass_low'), p['p_pass'], bound['assurance'])}"
            if "p_stage" in p:
                line += f" ({stage_text(p['p_stage'])}, point estimates)"
            if not d["promise"]:
                line += " (not promised)"
        lines.append(line)
    if projected:
        lines.append(f"   * {PROJECTED_NOTE}")
        lines += projected
    lines += judges_lines(d.get("judges") or {})
    if d["p_pass_all"] is not None:
        every = every_spec_text(d["not_modelled_reasons"])
        if d["promise"]:
            lines.append(f"P({every} passes together): {at_least(bound['low'])} "
                         f"with {percent_text(bound['assurance'])} assurance "
                         f"(point estimate {probability_text(d['p_pass_all'])})")
        elif d["in_domain"]:
            lines.append(f"No probability of meeting {every} is promised here (no lower bound); the "
                         f"point estimate is {probability_text(d['p_pass_all'])}.")
        else:
            lines.append(f"No probability of meeting {every} is promised here; the share of simulated "
                         f"lots that pass every limit, {probability_text(d['p_pass_all'])}, is an extrapolation.")
    lines.append(CAUTION)
    return "\n".join(lines)


@dataclass(repr=False)
class WhatIfResult(_Result):
    """One what-if through the chain (``linkage predict``). ``result`` is the
    library's :class:`~linkage.decide.whatif.WhatIf`; ``lot`` the lot it was
    made for, if any; ``recorded`` whether it went into the store's
    predictions and audit trail."""

    result: WhatIf
    lot: str | None = None
    recorded: bool = False
    store: Path | None = None
    #: for a lot set aside in the store: that it is, and that the watch will not compare this what-if with it
    set_aside_note: str | None = None

    def to_dict(self) -> dict:
        """What ``linkage predict --json`` prints; for a lot set aside, also ``lot_set_aside`` (true) and
        ``lot_set_aside_note``."""
        d = self.result.to_dict()
        return {**d, "lot_set_aside": True, "lot_set_aside_note": self.set_aside_note} if self.set_aside_note else d

    def text(self) -> str:
        return whatif_text(self.result) + (f"\nNote: {self.set_aside_note}" if self.set_aside_note else "")

    def summary(self) -> pd.DataFrame:
        """One row per predicted attribute (index ``attribute``): ``value``
        and the interval ``low``–``high`` (after the physical projection),
        ``p_pass`` where a spec was given, and ``projected`` (the model's
        number was moved into the physical range)."""
        import pandas as pd

        preds = self.result.predictions
        columns = ["attribute", "value", "low", "high"]
        columns += ["p_pass"] * any("p_pass" in p for p in preds.values()) + ["projected"]
        rows = [{"attribute": name, "value": p["value"], "low": p["low"], "high": p["high"],
                 "p_pass": p.get("p_pass"), "projected": bool(p.get("projected"))} for name, p in preds.items()]
        return pd.DataFrame(rows, columns=columns).set_index("attribute")

    def __repr__(self) -> str:
        r = self.result
        given = ", ".join(f"{k}={v['value']:.4g}" for k, v in r.inputs.items() if v["source"] == "given")
        p = "" if r.p_pass_all is None else f"; P(every specification passes) {r.p_pass_all:.3f}"
        where = "in the domain" if r.promise else "outside the domain, not promised"
        return (f"<WhatIf {given or '(medians)'} -> {len(r.predictions)} attributes at {r.level:.0%}{p}; {where}; "
                f"model {r.model_id}" + (f"; lot {self.lot}" if self.lot else "") + ">")


# --------------------------------------------------------------------------- watch

#: what ``linkage watch`` says to do when it alarms (README's order of use says the same): a model retrained on
#: the alarmed lots takes their shift as normal, so the cause is looked for first
ALARM_NEXT_STEP = ("Next: look for an assignable cause in these lots (raw material, equipment, method) before "
                   "retraining: a model retrained on them takes the shift as normal. Set a lot aside ('linkage "
                   "set-aside') if it should not count; retrain when the change is understood and intended.")


#: how many of the watch's other looks its texts list (``linkage watch`` and the report's drift section); the rest
#: are counted
OTHER_LOOKS_SHOWN = 40


def other_looks(others: list[str], shown: int = OTHER_LOOKS_SHOWN) -> dict | None:
    """The watch's other looks (:attr:`linkage.decide.watch.WatchResult.other_signals`) in the words of ``linkage
    watch``, for its text and the report's drift section alike: ``head`` (how many, and that they are for diagnosis,
    not designed to a false-alarm rate), ``items`` (the first ``shown``, units as a reader writes them) and ``more``
    (how many are left out, or None). None when there is none."""
    if not others:
        return None
    return {"head": f"Other looks ({len(others)} signal(s); for diagnosis, not designed to a false-alarm rate):",
            "items": [units_shown(a) for a in others[:shown]],
            "more": f"... and {len(others) - shown} more" if len(others) > shown else None}


@dataclass(repr=False)
class Watched(_Result):
    """The drift watch (``linkage watch``): ``result`` is the library's
    :class:`~linkage.decide.watch.WatchResult`."""

    result: WatchResult
    n_lots: int
    window: tuple[float, float] | None = None
    store: Path | None = None
    notes: list[str] = field(default_factory=list)
    #: the model's dissolution time point, in words (the lots were assembled at it)
    time_point: str | None = None
    #: training lots revised after the model was trained (:func:`linkage.decide.watch.revised_since_training`)
    revised: list[dict] = field(default_factory=list)
    #: the model's training lots by product (``product``, ``n_lots``; :func:`linkage.products.chain_counts`)
    trained_products: list[dict] = field(default_factory=list)
    #: the lots set aside that the watch left out, and those of them in the model's training set
    set_aside: list[str] = field(default_factory=list)
    set_aside_trained: list[str] = field(default_factory=list)
    #: lots since training that were set aside when the model was trained and restored since
    restored: list[str] = field(default_factory=list)

    @property
    def mixed_products(self) -> bool:
        """The model was trained on lots of several products (:func:`linkage.products.is_mixed`)."""
        from linkage.products import is_mixed

        return is_mixed([(p["product"], p["n_lots"]) for p in self.trained_products])

    def to_dict(self) -> dict:
        """What ``linkage watch --json`` prints."""
        return {**self.result.to_dict(), "revised_since_training": list(self.revised), "notes": list(self.notes),
                "trained_products": [dict(p) for p in self.trained_products], "mixed_products": self.mixed_products,
                "set_aside_lots": list(self.set_aside), "set_aside_in_training": list(self.set_aside_trained),
                "restored_since_training": list(self.restored)}

    def text(self) -> str:
        from linkage.decide.watch import design_lines, revised_lines, whatif_settings_lines

        r = self.result
        lines = [f"Model {r.model_id}; {self.n_lots} lots, {len(r.new_lots)} since training"
                 + (f"; {self.time_point}" if self.time_point else "") + "."]
        if self.mixed_products:
            from linkage.products import mixed_text

            lines.append(f"Model {r.model_id} is {mixed_text(self.trained_products)}; the lots are charted "
                         "against one model of them all.")
        lines += revised_lines(self.revised, r.model_id)
        lines += [f"Note: {note}" for note in self.notes]
        if self.window:
            lines.append(f"Porosity window used for ribbon samples: {self.window[0]:.3f}–{self.window[1]:.3f}")
        lines += design_lines(r.mewma)
        alarms = r.alarms
        if not alarms:
            lines.append("No alarm on the lots since training.")
        else:
            lines.append(f"{len(alarms)} alarm(s) on lots since training:")
            lines += [f"  ! {units_shown(a)}" for a in alarms]
            lines.append(ALARM_NEXT_STEP)
        looks = other_looks(r.other_signals)
        if looks:
            lines.append(looks["head"])
            lines += [f"  - {a}" for a in looks["items"]] + ([f"  {looks['more']}"] if looks["more"] else [])
        for p in r.predictions:
            mark = "inside" if p["inside_interval"] else "OUTSIDE"
            lines.append(f"  what-if for {p['lot']}: {p['attribute']} predicted {p['predicted']:.4g} "
                         f"[{p['low']:.4g}, {p['high']:.4g}], measured {p['measured']:.4g} ({mark} the interval)")
            lines += whatif_settings_lines(p)
        lines.append(CAUTION)
        return "\n".join(lines)

    def summary(self) -> pd.DataFrame:
        """One row per alarm on the lots since training (column ``alarm``)."""
        import pandas as pd

        return pd.DataFrame({"alarm": self.result.alarms}, dtype=object)

    def __repr__(self) -> str:
        r = self.result
        return (f"<Watched model {r.model_id}: {self.n_lots} lots, {len(r.new_lots)} since training, "
                f"{len(r.alarms)} alarm(s)>")


# --------------------------------------------------------------------------- retrain


@dataclass(repr=False)
class Retrained(_Result):
    """A challenger fitted on every lot and the promotion decision
    (``linkage retrain``): ``result`` is the library's
    :class:`~linkage.decide.retrain.RetrainDecision`."""

    result: RetrainDecision

    def to_dict(self) -> dict:
        """What ``linkage retrain --json`` prints."""
        return self.result.to_dict()

    def text(self) -> str:
        d = self.result.to_dict()
        verdict = "PROMOTED" if d["promoted"] else "NOT PROMOTED"
        lines = [f"Challenger {d['challenger_id']} {verdict}; champion was {d['champion_id']}.",
                 f"New lots since the champion: {len(d['new_lots'])}"
                 + (f" (product {d['product']})" if d.get("product") else "")]
        alarmed = d.get("alarmed_lots") or []
        if alarmed:
            lines.append(f"Trained on {len(alarmed)} lot(s) the watch's alarm flags against the champion: "
                         + ", ".join(a["lot"] for a in alarmed))
            lines += [f"  ! lot {a['lot']}: {a['signal']}" for a in alarmed]
        else:
            lines.append("The watch's alarm flags none of the lots since the champion.")
        lines += [f"  - {line}" for line in d["reasons"]]
        if d["window_moved"]:
            w = d["window_moved"]
            for side in ("low", "high"):
                a, b = w["champion"][side]["value"], w["challenger"][side]["value"]
                if a is None or b is None:
                    lines.append(f"  window {side} edge: champion {a}, challenger {b}")
                else:
                    lines.append(f"  window {side} edge: {a:.3f} -> {b:.3f} ({b - a:+.3f})")
        lines += [f"Note: {note}" for note in d["notes"]]
        lines += [f"Rule: {d['rule']}", CAUTION]
        return "\n".join(lines)

    def summary(self) -> pd.DataFrame:
        """One row per attribute (index ``attribute``): the challenger's and
        the champion's selected models and CV RMSE on the same folds
        (``within_noise``, ``within_tolerance``: reported, no longer the
        rule), the champion's error on the lots it never saw, and
        ``prospective``: the paired test on those lots that decides (issue 19)."""
        return _frame([c.to_dict() for c in self.result.comparisons], "attribute")

    def __repr__(self) -> str:
        r = self.result
        verdict = "promoted" + (" (forced)" if r.forced else "") if r.promoted else "not promoted"
        return (f"<Retrained challenger {r.challenger_id} {verdict} over {r.champion_id}; "
                f"{len(r.new_lots)} new lot(s)>")


# --------------------------------------------------------------------------- set aside, restore


@dataclass(repr=False)
class SetAside(_Result):
    """Lots set aside or put back in use (``linkage set-aside``, ``linkage restore``): the decisions written
    (one audit entry each) and the lots set aside after them."""

    action: str
    decisions: list[dict]
    store: Path
    set_aside_now: list[str] = field(default_factory=list)

    @property
    def result(self) -> list[dict]:
        return self.decisions

    def to_dict(self) -> dict:
        """What ``--json`` prints."""
        return {"action": self.action, "store": str(self.store), "lots": [d["lot"] for d in self.decisions],
                "decisions": list(self.decisions), "set_aside_lots": list(self.set_aside_now)}

    def text(self) -> str:
        from linkage.exceptions import shown_time
        from linkage.store import SET_ASIDE, id_runs, lots_named, one_line

        d = self.decisions
        lots = lots_named([x["lot"] for x in d])
        first = d[0] if d else {"at": "", "user": "", "reason": ""}
        if self.action == SET_ASIDE:
            lines = [f"Set aside {len(d)} lot(s) in {self.store}: {lots}.",
                     "Their rows stay in the store, unchanged; every command that fits or judges lots (assemble, "
                     "train, retrain, watch, report, plan, transfer, running) leaves them out and says so, until "
                     "'linkage restore LOT --reason TEXT'."]
        else:
            lines = [f"Restored {len(d)} lot(s) in {self.store}: {lots}; they are in use again."]
        lines.append(f"Recorded in the audit trail (entr{'y' if len(d) == 1 else 'ies'} "
                     f"{id_runs([x['audit_id'] for x in d])}), {shown_time(first['at']) if d else ''}, "
                     f"by {first['user']}; "
                     f"reason: {one_line(first['reason'])}")
        lines.append(f"Lots set aside now: {len(self.set_aside_now)}"
                     + (f" ({lots_named(self.set_aside_now)})" if self.set_aside_now else ""))
        return "\n".join(lines)

    def summary(self) -> pd.DataFrame:
        """One row per decision (index ``lot``): ``action``, ``audit_id``, ``at``, ``user``, ``reason``."""
        return _frame([dict(x) for x in self.decisions], "lot")

    def __repr__(self) -> str:
        return f"<SetAside {self.action} of {len(self.decisions)} lot(s) in {self.store}>"


# --------------------------------------------------------------------------- the audit trail as text

def _lots_count(value) -> int:
    """How many lots an audit entry's value names: a list's length, or a count written as a plain number (the store
    writes an ingest's ``unchanged`` lots as their count)."""
    if isinstance(value, bool):
        return 0
    if isinstance(value, int):
        return max(value, 0)
    return len(value) if isinstance(value, (list, tuple, dict)) else 0


def _mixed_entry_text(inputs: dict) -> str:
    """', mixed ('A': 48, 'B': 8)' for a train entry whose lots are of several products (``inputs.product_lots``
    and ``lots_without_product``, :func:`linkage.products.is_mixed`); '' for one product, or an entry written
    before they were recorded."""
    from linkage.products import counts_text, is_mixed, training_counts

    if not isinstance(inputs.get("product_lots"), dict):
        return ""
    try:
        counts = training_counts({"product_lots": inputs["product_lots"],
                                  "lots_without_product": inputs.get("lots_without_product")})
    except (TypeError, ValueError):  # not counts: say nothing of products
        return ""
    return f", mixed ({counts_text(counts)})" if is_mixed(counts) else ""


def predict_outcome_text(outputs: dict) -> str:
    """The audit's outcome of a ``predict`` entry: P(all pass) as ``predict`` writes it, the lower bound with its
    assurance where the entry records one and the point estimate said as such (a user test read "predicted;
    P(all pass) 1.000": a certainty, and neither bound nor point estimate)."""
    from linkage.report.sheet import at_least, probability_text

    p = outputs.get("p_pass_all")
    if not isinstance(p, (int, float)):
        return "predicted"
    bound = outputs.get("p_pass_all_bound") if isinstance(outputs.get("p_pass_all_bound"), dict) else {}
    low, assurance = bound.get("low"), bound.get("assurance")
    point = f"point estimate {probability_text(p)}"
    has_bound = isinstance(low, (int, float)) and isinstance(assurance, (int, float))
    if outputs.get("promise") is False:  # as predict says it: nothing promised, and why
        why = "outside the applicability domain" if outputs.get("in_domain") is False or has_bound else \
            "no lower bound"
        return f"predicted; P(all pass) not promised, {why}; {point}"
    if has_bound:
        return f"predicted; P(all pass) {at_least(low)} with {percent_text(assurance)} assurance, {point}"
    return f"predicted; P(all pass) {point}, no lower bound"


def _audit_outcome(entry: dict) -> tuple[str, str | None]:
    """What one audit entry came to, in a few words, and the model it concerns for the text table: for a
    retrain that did not promote, the champion that stays (the challenger, the entry's ``model_id``, is named in
    the outcome instead)."""
    action, model = entry.get("action"), entry.get("model_id")
    i, o = entry.get("inputs") or {}, entry.get("outputs") or {}
    if not isinstance(i, dict):
        i = {}
    if not isinstance(o, dict):
        o = {}
    if action == "ingest":
        parts = [f"{_lots_count(o.get(k))} {k}" for k in ("new", "revised", "unchanged") if _lots_count(o.get(k))]
        unusual = _lots_count(i.get("accepted_unusual"))
        text = ", ".join(parts) + " lot(s)" if parts else "no lots"
        added = _lots_count(o.get("added_to"))  # revisions that only added (results in stages): no reason needed
        text += f" ({added} of them only added to)" if added else ""
        return text + (f"; {unusual} unusual value(s) accepted" if unusual else ""), model
    if action == "train":  # an entry without ``lots`` (an older store) says just that it trained
        return ("trained" if i.get("lots") is None else f"trained on {_lots_count(i.get('lots'))} lots"
                ) + _mixed_entry_text(i), model
    if action == "reanchor":
        seal = o.get("checked_seal") if isinstance(o.get("checked_seal"), dict) else {}
        return ("re-anchored" + (f" at seal {seal['id']}" if seal.get("id") is not None else "")), model
    if action in ("promote", "retrain"):
        champion = i.get("champion")
        flagged = _lots_count(i.get("alarmed_lots"))
        alarm = f"; trained on {flagged} lot(s) the watch flagged" if flagged else ""
        if action == "promote":
            return (f"promoted{' by force' if i.get('force') else ''} over {champion}{alarm}"), model
        return f"not promoted, champion stays; challenger {model} kept{alarm}", champion or model
    if action == "watch":
        alarms, new = _lots_count(o.get("alarms")), _lots_count(o.get("new_lots"))
        if not new:
            return "no lots since training", model
        named = o.get("alarmed_lots") if isinstance(o.get("alarmed_lots"), list) else []
        lots = (f": lot(s) {', '.join(map(str, named[:5]))}" + (f" and {len(named) - 5} more" if len(named) > 5 else "")
                if named else "")
        return (f"{alarms} alarm(s)" if alarms else "no alarm") + f" on {new} lot(s) since training{lots}", model
    if action == "window":
        por = o.get("ribbon_porosity") or {}
        if o.get("found") and isinstance(por, dict) and por.get("low") is not None and por.get("high") is not None:
            return f"porosity window {por['low']:.3f}–{por['high']:.3f}", model
        return "no window found", model
    if action == "predict":
        return predict_outcome_text(o), model
    if action == "plan":
        return f"{_lots_count(o.get('lots'))} lot(s) planned", model
    if action == "running":
        drift = (o.get("drift") or {}) if isinstance(o.get("drift"), dict) else {}
        return ("drift at sample " + str(drift.get("first_signal_sample")) if drift.get("drifting")
                else "no drift"), model
    if action == "transfer":
        return f"{_lots_count(o.get('targets'))} roll force(s) transferred", model
    if action in ("set-aside", "restore"):
        return ("set aside: left out of fitting and judging" if action == "set-aside" else "back in use"), model
    return "", model


def audit_text(rows: list[dict], lot: str | None = None) -> str:
    """``linkage audit``'s table: a header, one line per entry with what it came to (``outcome``) and, where the
    entry has one, the reason given (an ingest's ``--reason``, a forced promotion's), its line breaks shown as
    '⏎' (:func:`linkage.store.one_line`; the stored reason is unchanged)."""
    from linkage.exceptions import shown_time
    from linkage.store import given_reason, one_line

    if not rows:
        return "No audit entries" + (f" for lot {lot}." if lot else ".")
    made = []
    for r in rows:
        outcome, model = _audit_outcome(r)
        reason = ((r.get("inputs") or {}) if isinstance(r.get("inputs"), dict) else {}).get("reason")
        made.append((r, outcome, model, one_line(given_reason(reason) or "")))  # a multi-line reason: one line
    width = min(max(len("outcome"), *(len(m[1]) for m in made)), 90)
    lines = [f"{'id':>5}  {'at':<23}  {'user':<12} {'action':<9} {'lot':<12} {'model':<29} "
             f"{'outcome':<{width}}  reason".rstrip()]
    for r, outcome, model, reason in made:
        lines.append(f"{r['id']:>5}  {shown_time(r['at']):<23}  {r['user']:<12} {r['action']:<9} "
                     f"{r['lot'] or '':<12} {model or '':<29} {outcome:<{width}}  {reason}".rstrip())
    lines.append("model: the model the entry used or made; for a retrain that did not promote, the champion that "
                 "stays (the challenger is named in the outcome). 'linkage audit --json' has every input and output.")
    return "\n".join(lines)
