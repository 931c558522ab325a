"""The what-if page: one self-contained HTML file that runs the what-if in the browser.

``linkage predict --page FILE`` writes it. The page holds the lean model
(:mod:`linkage.models.lean`, the numbers of ``whatif.npz``) as JSON and a
script (``whatif_page.js`` beside this module) that repeats, operation for
operation, the arithmetic of :func:`linkage.decide.whatif.predict_whatif`:
the settings held as :func:`linkage.decide.propagate.fill_settings` holds
them, the Monte Carlo through the chain (:func:`~linkage.decide.propagate.simulate`),
the CV+ intervals (:mod:`linkage.models.conformal`), the projection onto the
physical ranges, the applicability domain (:func:`~linkage.models.lean.domain_verdicts`),
the USP <711> staged judgement of dissolution (:mod:`linkage.decide.compendial`)
and the lower bound on P(pass) from the bootstrap replicates
(:mod:`linkage.decide.bound`). It opens offline, with no server and no
network request.

Where Python draws random numbers, the page does not draw its own: the
numbers Python's generators give at the what-if's seed do not depend on the
settings, so they are computed here and embedded: the residual lot of every
Monte Carlo draw of every target, the uniforms with which the bound draws
lots, and, for the staged dissolution judgement, six order statistics and
means of each draw's 24 standard normal vessel deviates (the stage rules
need no more: a unit passes a threshold exactly when the deviate does, and
clipping to 0–150 % never binds in a lot that could pass).

Covered: every lean model kind (``mean``, ``rd``, ``linear`` (PLS),
``quadratic``, ``trees``, ``link``: log-linear and Weibull release), CV+
and locally weighted CV+ intervals, spread models, the bound and the
dissolution stages. Refused with a clear error: a spec with an
``[acceptance_value]`` (USP <905> units are not simulated in the page).
"""

from __future__ import annotations

import base64
import html
import json
import math
from importlib import resources
from pathlib import Path

import numpy as np

from linkage import CAUTION
from linkage.exceptions import UsageError
from linkage.report.figures import PRETTY_UNITS, shown_unit

__all__ = ["page_payload", "page_html", "trained_text", "PAGE_KINDS", "MAX_PAGE_BYTES"]

#: lean model kinds the page evaluates
PAGE_KINDS = ("mean", "rd", "linear", "quadratic", "trees", "link")
#: the page stays under this size for the demo model (issue 17)
MAX_PAGE_BYTES = 1_000_000


def _arr(a) -> dict:
    """A numpy array as exact little-endian float64 (or int32) bytes in base64, with its shape."""
    a = np.asarray(a)
    if a.dtype == bool or np.issubdtype(a.dtype, np.integer):
        data, kind = np.ascontiguousarray(a, dtype="<i4").tobytes(), "i32"
    else:
        data, kind = np.ascontiguousarray(a, dtype="<f8").tobytes(), "f64"
    return {kind: base64.b64encode(data).decode("ascii"), "shape": list(a.shape)}


def _plain(obj):
    """Nested dicts/lists with numpy arrays and numbers as JSON-safe values
    (arrays packed by :func:`_arr`, a non-finite float as null)."""
    if isinstance(obj, np.ndarray):
        return _arr(obj)
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return float(obj) if math.isfinite(obj) else None
    return obj


def _end(v: float) -> float | None:
    return None if not math.isfinite(v) else float(v)


def _check_supported(lean, spec) -> None:
    problems = []
    for name, t in lean.targets.items():
        basis = getattr(t, "interval_", None) or {}
        for m in [t.model_] + list(t.fold_models_) + list(basis.get("fold_models", [])):
            if m.kind not in PAGE_KINDS:
                problems.append(f"{name}: model kind {m.kind!r}")
                break
    if spec is not None and spec.acceptance_value_max is not None:
        problems.append("the spec's [acceptance_value] (USP <905> on simulated units)")
    if problems:
        raise UsageError("the what-if page cannot compute " + "; ".join(problems)
                         + f". It covers the model kinds {', '.join(PAGE_KINDS)} and USP <711> stages; "
                           "use 'linkage predict --set ... --html' for this model and spec")


def _mc_lots(lean, given: set[str], n_draws: int, seed: int) -> dict[str, np.ndarray]:
    """The residual lot (row of the stage's residuals) of every Monte Carlo
    draw of every simulated target: the picks of
    :func:`linkage.decide.propagate.simulate`, replayed with its generator
    and its calls in its order (they do not depend on the values)."""
    from linkage.decide.propagate import _residual_column

    rng = np.random.default_rng(seed)
    out = {}
    for stage in lean.stages:
        todo = [t for t in stage.targets if t not in given]
        if not todo:
            continue
        n = len(stage.residual_lots)
        pick = rng.integers(0, n, size=n_draws)
        for name in todo:
            col = stage.residual_column(name)
            index = np.where(np.isnan(col), np.nan, np.arange(n, dtype=float))  # lot numbers, gaps where missing
            out[name] = _residual_column(index, name, pick, rng).astype(np.int64)
    return out


def _vessel_stats(n_draws: int, seed: int) -> np.ndarray:
    """(6, draws): of each draw's 24 standard normal vessel deviates (the
    stream of :func:`linkage.decide.compendial.judge_draws`): the minimum of
    the first 6, the minimum and the mean of the first 12, the minimum, the
    third smallest and the mean of all 24."""
    from linkage.decide.compendial import N_VESSELS

    z = np.random.default_rng([int(seed), 711]).standard_normal((n_draws, N_VESSELS))
    s24 = np.sort(z, axis=1)
    return np.vstack([z[:, :6].min(axis=1), z[:, :12].min(axis=1), z[:, :12].mean(axis=1),
                      s24[:, 0], s24[:, 2], z.mean(axis=1)])


def _bound_uniforms(lean, given: set[str], limits_names: list[str], seed: int, cells: int, final_max: int):
    """Per simulated stage, the uniforms :func:`linkage.decide.bound._batch`
    draws (``default_rng([seed, stage])``), as many as it uses (one row)."""
    sim = [st for st in lean.stages if any(t not in given for t in st.targets)]
    out = []
    D = 1
    for si, st in enumerate(sim):
        todo = [t for t in st.targets if t not in given]
        cols = [list(st.targets).index(t) for t in todo]
        n_s = int(np.all(np.isfinite(st.residual_matrix[:, cols] / st.residual_scale[:, cols]), axis=1).sum())
        rng = np.random.default_rng([seed, si])
        if si < len(sim) - 1:
            if D * n_s <= cells:
                out.append(np.zeros(0))
                D = D * n_s
            else:
                k = max(1, cells // D)
                out.append(rng.random(D * k))
                D = D * k
        else:
            out.append(rng.random(final_max) if n_s > final_max else np.zeros(0))
    return out


def page_payload(lean, spec=None, *, seed: int = 0, n_draws: int = 4000, level: float | None = None,
                 assurance: float = 0.9, window: dict | None = None, initial: dict | None = None) -> dict:
    """The numbers the page computes from (JSON-safe)."""
    from linkage.decide.bound import check_assurance
    from linkage.decide.compendial import judge_text
    from linkage.models.lean import as_lean
    from linkage.schema import ASSEMBLED

    from linkage.decide.whatif import check_judgeable
    from linkage.timepoint import check_time_point

    lean = as_lean(lean)
    check_time_point(lean, spec, "predict --page")
    check_judgeable(lean, spec)
    _check_supported(lean, spec)
    assurance = check_assurance(assurance)
    level = float(level if level is not None else lean.nominal_coverage)
    roots = lean.root_inputs()
    given = set(roots)
    settings = _settings_payload(lean)
    lots = _mc_lots(lean, given, n_draws, seed)
    stages = [_stage_payload(st, lots) for st in lean.stages]
    limits = {} if spec is None else {a: {"min": lim.min, "max": lim.max} for a, lim in spec.limits.items()}
    dissolution = _dissolution_payload(lean, spec, n_draws, seed)
    bound = _bound_payload(lean, given, list(limits), seed)
    payload = {
        "format": 1, "model_id": lean.model_id or "unsaved", "created_at": lean.created_at,
        "trained": trained_text(lean.created_at), "caution": CAUTION,
        "seed": int(seed), "n_draws": int(n_draws), "level": level, "assurance": assurance,
        "roots": roots, "settings": settings, "medians": dict(lean.medians),
        "stages": stages, "limits": limits, "judges": judge_text(spec) if spec is not None else {},
        "spec": spec.describe() if spec is not None else None,
        "dissolution": dissolution, "bound": bound, "window": window, "initial": dict(initial or {}),
        "products": list(lean.products),
        "units": {name: ASSEMBLED.get(name, "-") for name in list(lean.medians) + list(lean.targets)},
    }
    payload["held_labels"] = _held_labels()
    payload["pretty_units"] = dict(PRETTY_UNITS)  # how a heading writes a unit: the report's table, not a copy
    # the unit a heading shows, by the rule of the report and the what-if sheet (figures.shown_unit: from the
    # contract, the template or the column name's ending: api_d50_um [µm]); "units" stays as lean.py's reasons write
    names = [s["name"] for s in settings] + list(lean.medians) + list(lean.targets)
    payload["shown_units"] = {name: shown_unit(name) for name in dict.fromkeys(names)}
    payload["trained_on"] = trained_on_line(lean)
    from linkage.report.sheet import NO_PROMISE

    # the headline of a what-if outside the applicability domain, as the sheet and predict's text write it (its first
    # sentence: the page lists the reasons under "Applicability domain", not after it)
    payload["no_promise"] = NO_PROMISE.split(". ")[0] + "."
    for key in ("settings_names", "settings_mean", "settings_cov", "settings_low", "settings_high",
                "settings_levels"):
        if key in lean.spec:  # the conditional-mean rule of fill_settings, when the model carries it
            payload[key] = lean.spec[key]
    return _plain(payload)


def trained_on_line(lean) -> str | None:
    """What a model of several products (or of one and lots without a product name) was trained on, as the page
    says it (:func:`linkage.products.trained_on_text`, as ``linkage predict`` says it); None for a model of one."""
    from linkage.products import chain_counts, is_mixed, trained_on_text

    counts = chain_counts(lean)
    if not is_mixed(counts):
        return None
    return f"Model {trained_on_text(counts)}; one model for all of them, not a model of one product."


def trained_text(created_at: str | None) -> str:
    """When a model was trained, as the page shows it: to the second, in UTC, and saying so
    (``2026-12-05 13:40:01 UTC``; the model records it to the microsecond; :func:`linkage.exceptions.shown_time`)."""
    from linkage.exceptions import shown_time

    return "at a time not recorded" if created_at is None else shown_time(created_at)


def _settings_payload(lean) -> list[dict]:
    """Every setting the chain needs: its training range (from the stages' domains), median and unit."""
    from linkage.decide.propagate import needed_settings
    from linkage.schema import ASSEMBLED

    ranges = {}
    for st in lean.stages:
        if st.domain is not None:
            for c, (lo, hi) in st.domain.ranges.items():
                ranges.setdefault(c, (float(lo), float(hi)))
    settings = []
    for name in needed_settings(lean, set()):
        lo, hi = ranges.get(name, (math.nan, math.nan))
        med = lean.medians.get(name)
        if not (math.isfinite(lo) and math.isfinite(hi)):
            raise UsageError(f"the what-if page needs the training range of {name}, which model "
                             f"{lean.model_id} does not record")
        settings.append({"name": name, "low": lo, "high": hi, "median": med, "unit": ASSEMBLED.get(name, "-")})
    return settings


def _stage_payload(st, lots: dict) -> dict:
    """One stage of the lean model as the page needs it: residuals, domain model, and per target its
    selected and fold models, residuals, physical range and Monte Carlo lots."""
    from linkage.models.lean import physical_range

    d = st.domain
    return {
        "name": st.name, "inputs": list(st.inputs), "residual_lots": list(st.residual_lots),
        "residual_matrix": st.residual_matrix, "residual_scale": st.residual_scale,
        "domain": None if d is None else {
            "inputs": list(d.inputs), "ranges": {k: list(v) for k, v in d.ranges.items()},
            "mean": d.mean, "scale": d.scale, "rotations": np.atleast_2d(d.rotations),
            "loadings": np.atleast_2d(d.loadings), "score_var": np.atleast_1d(d.score_var),
            "n_components": int(d.n_components), "t2_limit": d.t2_limit, "q_limit": d.q_limit,
            "alpha": float(d.alpha)},
        "targets": [{
            "target": t.target, "inputs": list(t.inputs), "selected": t.selected,
            "model": {"kind": t.model_.kind, **vars(t.model_.p)},
            "fold_models": [{"kind": m.kind, **vars(m.p)} for m in t.fold_models_],
            "fold_of": t.fold_of_, "residuals": t.residuals_, "spread": t.spread, "lot_scale": t.lot_scale_,
            "interval": None if t.interval_ is None else {
                "fold_models": [{"kind": m.kind, **vars(m.p)} for m in t.interval_["fold_models"]],
                "residuals": t.interval_["residuals"], "lot_scale": t.interval_["lot_scale"],
                "leverage": t.interval_["leverage"]},
            "physical_range": [_end(v) for v in physical_range(t.target)],
            "mc_lots": lots.get(t.target),
        } for t in st.targets.values()],
    }


def _dissolution_payload(lean, spec, n_draws: int, seed: int) -> dict | None:
    """The within-lot vessel SD and the vessels' random numbers for a spec judged by the compendial
    stages (None otherwise)."""
    from linkage.decide.compendial import DISSOLUTION, needs_units, within_lot_of

    if not (needs_units(spec) and DISSOLUTION in lean.targets):
        return None
    spread = within_lot_of(lean).get("dissolution")
    if spread is None:
        raise UsageError(f'judge = "stages" needs the within-lot vessel SD of dissolution, which '
                         f"{lean.model_id} does not record")
    return {"grid": np.asarray(spread["grid"], float), "log_var": np.asarray(spread["log_var"], float),
            "units_per_lot": float(spread["units_per_lot"]), "pass_by": spec.dissolution_pass_by,
            "vessels": _vessel_stats(n_draws, seed)}


def _bound_payload(lean, given: set, attributes: list[str], seed: int) -> dict:
    """What the page needs for the lower bound of P(all pass): the bootstrap replicates' counts and lots,
    and the uniforms Python's generator gives (the what-if's own number of cells)."""
    from linkage.decide.bound import FINAL_MAX, replicates_of
    from linkage.decide.whatif import WHATIF_CELLS

    reps = replicates_of(lean)
    bound = {"available": bool(reps.available), "reason": reps.reason}
    if reps.available:
        bs = lean.bootstrap
        bound.update({
            "counts": reps.counts,
            "stage_lots": [[reps.lot_index.get(str(lot), -1) for lot in st.residual_lots] for st in lean.stages],
            "targets": {name: {"n": int(p["n"]), "same": p["same"], "stacked": p["stacked"],
                               "ragged": p["ragged"]} for name, p in bs["targets"].items()},
        })
    bound["cells"] = WHATIF_CELLS
    bound["final_max"] = FINAL_MAX
    bound["uniforms"] = _bound_uniforms(lean, given, attributes, seed, WHATIF_CELLS, FINAL_MAX)
    return bound


def _held_labels() -> dict[str, str]:
    """The words fill_settings gives as the source of a held setting (linkage.decide.held)."""
    from linkage.decide import held

    return {"coherent": held.COHERENT, "mean": held.MEAN, "median": held.MEDIAN,
            "coherent_level": held.COHERENT_LEVEL, "mean_level": held.MEAN_LEVEL}


def page_html(lean, spec=None, **kwargs) -> str:
    """The page: HTML with the payload as JSON and the script inline."""
    payload = page_payload(lean, spec, **kwargs)
    script = resources.files("linkage.report").joinpath("whatif_page.js").read_text(encoding="utf-8")
    style = resources.files("linkage.report").joinpath("whatif_page.css").read_text(encoding="utf-8")
    data = json.dumps(payload, allow_nan=False, separators=(",", ":")).replace("</", "<\\/")
    title = html.escape(f"What-if, model {payload['model_id']}")
    return (f"<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">\n"
            f"<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; "
            f"script-src 'unsafe-inline'; style-src 'unsafe-inline'; img-src data:\">\n"
            f"<title>{title}</title>\n<style>{style}</style></head>\n<body>\n"
            f"<main id=\"app\"><h1>{title}</h1><p class=\"caution\">{html.escape(CAUTION)}</p>"
            f"<noscript>This page computes in the browser; enable JavaScript.</noscript></main>\n"
            f"<script type=\"application/json\" id=\"model\">{data}</script>\n"
            f"<script>{script}</script>\n</body></html>\n")


def write_page(path, values: dict, *, spec=None, window_path=None, models_dir=None, model="latest",
               level: float | None = None, seed: int = 0, assurance: float = 0.9) -> int:
    """Write the what-if page of a saved model to ``path`` (whole or not at
    all); ``values`` are the settings it starts at. Returns its size in bytes."""
    from linkage.api import _lean
    from linkage.decide.whatif import check_values
    from linkage.export import write_atomic

    lean = _lean(models_dir, model)
    check_values(lean, values)
    not_settings = [n for n in values if n not in lean.root_inputs()]
    if not_settings:
        raise UsageError(f"the what-if page starts from settings only; {', '.join(not_settings)} "
                         f"{'is' if len(not_settings) == 1 else 'are'} not a setting of model {lean.model_id}")
    window = None
    if window_path is not None:
        try:
            window = json.loads(open(window_path, encoding="utf-8").read())
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise UsageError(f"{window_path}: not the JSON of 'linkage window --json' ({exc})") from None
        if not isinstance(window, dict) or "ribbon_porosity" not in window:
            raise UsageError(f"{window_path}: not the JSON of 'linkage window --json' (no ribbon_porosity)")
        if window.get("model_id") != lean.model_id:
            raise UsageError(f"{window_path} is the window of model {window.get('model_id')}, not of "
                             f"{lean.model_id}; run 'linkage window --json' with this model")
        window = {k: window.get(k) for k in ("model_id", "confidence", "ribbon_porosity", "settings")}
    text = page_html(lean, spec, seed=seed, level=level, assurance=assurance, window=window, initial=values)
    data = text.encode("utf-8")
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    write_atomic(path, data)
    return len(data)
