"""Drift watch: is the process moving away from the model?

Three looks, each in time order:

1. **Residual charts per attribute.** A lot's residual is measured − predicted
   from its measured stage inputs. For the model's training lots it is the
   out-of-fold residual (the lot was unseen when it was predicted); for lots
   that arrived after training it is the prospective residual of the full
   model. Limits come from the training lots' residuals: an individuals
   (Shewhart) chart with the run rules, an EWMA chart (λ = 0.2, L = 3) and a
   tabular CUSUM (k = σ/2, h = 5σ); see :mod:`linkage.charts`.
2. **Ribbon porosity within a lot** (samples in ``sampled_at`` order) against
   the porosity window and against ±3σ of the pooled within-lot SD of the
   training lots around the lot's running mean, so that an at-line sample that
   leaves the window is flagged while the run can still be corrected; and
   **between lots**, lot-mean porosity on its own individuals and EWMA charts.
3. **Applicability domain** of every new lot's stage inputs (Hotelling T²,
   Q residual, training ranges), naming the inputs that drive it.

The **alarms** come from one scheme designed to an in-control average run
length for all attributes together (issue 19): a multivariate EWMA of the
lots' standardised residual vectors since training (:mod:`linkage.decide.mewma`).
The per-attribute charts, the porosity looks and the domain stay as
``other_signals``, for diagnosis: each adds false alarms, and together they
are not designed to a rate.

The charts answer "has something changed", not "is this lot good": release
stays with the pharmacopeial tests.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from linkage import CAUTION
from linkage.charts import Reference, cusum, ewma, run_rules, shewhart_limits

EWMA_LAMBDA = 0.2
EWMA_L = 3.0
CUSUM_K = 0.5
CUSUM_H = 5.0


@dataclass
class AttributeChart:
    attribute: str
    lots: list[str]
    phase: list[str]  # "training" or "new"
    residual: np.ndarray
    reference: Reference
    limits: tuple[float, float]
    ewma: np.ndarray
    ewma_low: np.ndarray
    ewma_high: np.ndarray
    cusum_plus: np.ndarray
    cusum_minus: np.ndarray
    cusum_h: float
    flags: dict[str, list[str]]  # lot -> reasons

    def to_dict(self) -> dict:
        return {
            "attribute": self.attribute,
            "centre": self.reference.mu0, "sigma": self.reference.sigma, "n_reference": self.reference.n,
            "limits": list(self.limits),
            "points": [
                {"lot": lot, "phase": ph, "residual": _finite_or_none(r), "ewma": _finite_or_none(e),
                 "cusum_plus": _finite_or_none(cp), "cusum_minus": _finite_or_none(cm),
                 "flags": self.flags.get(lot, [])}
                for lot, ph, r, e, cp, cm in zip(self.lots, self.phase, self.residual, self.ewma,
                                                 self.cusum_plus, self.cusum_minus)
            ],
            "cusum_h": self.cusum_h,
            "flagged_lots": [lot for lot in self.lots if self.flags.get(lot)],
        }


@dataclass
class WatchResult:
    model_id: str
    new_lots: list[str]
    charts: dict[str, AttributeChart]
    porosity_between: dict
    porosity_within: list[dict]
    domain: list[dict]
    predictions: list[dict] = field(default_factory=list)
    #: the designed scheme (:func:`mewma_look`); None when no attribute can be charted
    mewma: dict | None = None

    @property
    def alarms(self) -> list[str]:
        """Signals of the designed scheme on the lots since training."""
        if self.mewma is None:
            return []
        return [f"MEWMA of the {self.mewma['design']['attributes']} residuals, lot {lot}: {text}"
                for lot, text in self.mewma["signals"].items()]

    @property
    def alarmed_lots(self) -> list[str]:
        """The lots since training on which the designed scheme signals (the lots :attr:`alarms` names), in the
        scheme's order; empty when there is no alarm."""
        return [] if self.mewma is None else [str(lot) for lot in self.mewma["signals"]]

    @property
    def other_signals(self) -> list[str]:
        """Flags of the per-attribute charts, the porosity looks and the
        domain on the lots since training: for diagnosis, not designed to a
        false-alarm rate."""
        out = []
        for name, c in self.charts.items():
            for lot in c.lots:
                if lot in self.new_lots and c.flags.get(lot):
                    out.append(f"{name}, lot {lot}: {'; '.join(c.flags[lot])}")
        for lot, reasons in self.porosity_between.get("flags", {}).items():
            if lot in self.new_lots:
                out.append(f"lot-mean ribbon_porosity, lot {lot}: {'; '.join(reasons)}")
        for s in self.porosity_within:
            if s["flags"] and s["lot"] in self.new_lots:
                out.append(f"ribbon sample {s['sample']} of lot {s['lot']}: {'; '.join(s['flags'])}")
        for d in self.domain:
            if not d["in_domain"]:
                out.append(f"lot {d['lot']} out of the {d['stage']} stage's domain: {'; '.join(d['reasons'])}")
        return out

    def to_dict(self) -> dict:
        return {
            "model_id": self.model_id,
            "new_lots": self.new_lots,
            "alarms": self.alarms,
            "alarmed_lots": self.alarmed_lots,
            "design": None if self.mewma is None else self.mewma["design"],
            "mewma": None if self.mewma is None else {k: v for k, v in self.mewma.items() if k != "design"},
            "other_signals": self.other_signals,
            "attributes": {k: v.to_dict() for k, v in self.charts.items()},
            "porosity_between_lots": self.porosity_between,
            "porosity_within_lots": self.porosity_within,
            "domain": self.domain,
            "predictions_vs_measured": self.predictions,
            "caution": CAUTION,
        }


def _finite_or_none(v) -> float | None:
    """A finite number as float, None for a missing or non-finite one (JSON has no NaN)."""
    return None if v is None or not np.isfinite(v) else float(v)


def residual_series(chain, table: pd.DataFrame, attribute: str) -> pd.DataFrame:
    """Lots in table (time) order with an observed value and every stage
    input: the residual, and whether the lot was one the model trained on."""
    target = chain.targets[attribute]
    trained = set(chain.training["lots"])
    rows = table.dropna(subset=[attribute, *target.inputs])
    if rows.empty:
        return pd.DataFrame(columns=["lot", "phase", "residual"])
    predicted = np.asarray(target.predict(rows[target.inputs]), float)
    residual = rows[attribute].to_numpy(float) - predicted
    lots = rows["lot"].astype(str).to_numpy()
    oof = target.residuals
    phase = []
    for i, lot in enumerate(lots):
        if lot in trained and lot in oof.index and np.isfinite(oof[lot]):
            residual[i] = float(oof[lot])  # the honest residual of a training lot
            phase.append("training")
        else:
            phase.append("new")
    return pd.DataFrame({"lot": lots, "phase": phase, "residual": residual})


def _reference_values(chain, attribute: str) -> np.ndarray | None:
    """The training lots' out-of-fold residuals that a chart of ``attribute`` is centred and scaled on, or None
    where they cannot serve (fewer than 3, or all equal): the attribute is then not charted."""
    ref_values = chain.targets[attribute].residuals.dropna().to_numpy(float)
    return ref_values if len(ref_values) >= 3 and np.std(ref_values) > 0 else None


def attribute_chart(chain, table: pd.DataFrame, attribute: str) -> AttributeChart | None:
    s = residual_series(chain, table, attribute)
    ref_values = _reference_values(chain, attribute)
    if len(s) == 0 or ref_values is None:
        return None
    ref = Reference.from_values(ref_values)
    x = s["residual"].to_numpy(float)
    z, zl, zh = ewma(x, ref, lam=EWMA_LAMBDA, L=EWMA_L)
    cp, cm, h = cusum(x, ref, k=CUSUM_K, h=CUSUM_H)
    rules = run_rules(x, ref)
    flags: dict[str, list[str]] = {}
    for i, lot in enumerate(s["lot"]):
        reasons = list(rules[i])
        if z[i] < zl[i] or z[i] > zh[i]:
            reasons.append("EWMA outside its limits")
        if cp[i] > h:
            reasons.append("CUSUM signals an upward shift")
        if cm[i] > h:
            reasons.append("CUSUM signals a downward shift")
        if reasons:
            flags[lot] = reasons
    return AttributeChart(attribute, list(s["lot"]), list(s["phase"]), x, ref, shewhart_limits(ref),
                          z, zl, zh, cp, cm, h, flags)


def standardised_residuals(charts: dict[str, AttributeChart], lots: list[str]) -> pd.DataFrame:
    """Residuals of ``lots`` (rows) for each charted attribute (columns),
    centred on the training lots' mean residual and divided by their SD; NaN
    where the lot lacks the attribute."""
    out = pd.DataFrame(index=pd.Index(lots, name="lot"))
    for name, c in charts.items():
        z = pd.Series((np.asarray(c.residual, float) - c.reference.mu0) / c.reference.sigma, index=c.lots)
        out[name] = z[~z.index.duplicated()].reindex(lots)
    return out


def residual_correlation(chain, attributes: list[str]) -> np.ndarray:
    """Correlation of the training lots' out-of-fold residuals between
    attributes (pairwise complete lots; 0 where fewer than 3 lots share two
    attributes), moved to the nearest positive definite correlation by
    clipping its eigenvalues at 1e-6."""
    frame = pd.DataFrame({a: chain.targets[a].residuals for a in attributes})
    r = frame.corr(min_periods=3).to_numpy(float)
    r = np.where(np.isfinite(r), r, 0.0)
    np.fill_diagonal(r, 1.0)
    w, v = np.linalg.eigh((r + r.T) / 2)
    r = (v * np.clip(w, 1e-6, None)) @ v.T
    d = np.sqrt(np.diag(r))
    return r / np.outer(d, d)


def mewma_look(chain, charts: dict[str, AttributeChart], new_lots: list[str]) -> dict | None:
    """The designed scheme on the lots since training, in time order: T²,
    the limit h, the signals (lot -> text naming the attributes whose EWMA
    lies furthest from 0, in SD), and the design (:func:`linkage.decide.mewma.design`)."""
    from linkage.decide.mewma import design, mewma_statistic

    if not charts:
        return None
    names = list(charts)
    corr = residual_correlation(chain, names)
    n_ref = min(c.reference.n for c in charts.values())
    remember_training_design(chain)
    d = stated_reference(design(len(names), n_ref=n_ref), n_ref)
    order = [lot for lot in dict.fromkeys(lot for c in charts.values() for lot in c.lots) if lot in set(new_lots)]
    x = standardised_residuals(charts, order)
    have = x.notna().any(axis=1).to_numpy()
    x = x[have]
    t2, scaled = mewma_statistic(x.to_numpy(float), corr) if len(x) else (np.empty(0), np.empty((0, len(names))))
    signals = {}
    for lot, stat, row in zip(x.index, t2, scaled):
        if stat > d["h"]:
            top = np.argsort(-np.abs(row))[:2]
            signals[lot] = (f"T² {stat:.1f} above h = {d['h']:.2f}; furthest: "
                            + ", ".join(f"{names[j]} EWMA {row[j]:+.1f} SD" for j in top))
    return {"design": dict(d), "attributes": names, "correlation": corr.tolist(), "lots": list(x.index),
            "t2": [float(v) for v in t2], "h": d["h"], "signals": signals}


def design_at_training(chain) -> dict | None:
    """The design of the watch's multivariate alarm (:func:`mewma_look`) for every attribute ``chain`` can chart,
    simulated when the model is made (``linkage train``, ``linkage retrain``) and kept in its training record
    (``training["watch_design"]``) with the simulation's settings. The design is a function of the model alone:
    how many attributes are charted and how many training lots their reference rests on. A later watch or
    report of the model reads it (:func:`mewma_look`) instead of simulating it again, about a second each
    (issue 20); where it charts fewer attributes (a table without one of them) it simulates that design as
    before. None where no attribute can be charted."""
    from linkage.decide.mewma import design, simulation_settings

    refs = [Reference.from_values(v) for v in (_reference_values(chain, name) for name in chain.targets)
            if v is not None]
    if not refs:
        return None
    n_ref = min(r.n for r in refs)
    return {"design": stated_reference(dict(design(len(refs), n_ref=n_ref)), n_ref),  # as the watch states it
            "simulation": simulation_settings()}


def remember_training_design(chain) -> None:
    """Take the design kept in ``chain``'s training record (:func:`design_at_training`) as simulated, when it was
    simulated under this linkage's settings (process-wide, as :func:`linkage.decide.mewma.remember` keeps it: the
    design is a function of its key alone, whichever model it came from). The report calls it before it forks
    the watch's process, so that it knows the design was not simulated and keeps no copy of it."""
    from linkage.decide.mewma import remember, simulation_settings

    kept = (getattr(chain, "training", None) or {}).get("watch_design")
    if isinstance(kept, dict) and kept.get("simulation") == simulation_settings():
        remember([kept.get("design")])


def stated_reference(d: dict, n_lots: int) -> dict:
    """The design with the training lots it rests on stated as they are (``n_reference_lots``). A design is
    simulated from at least p + 3 lots (:func:`linkage.decide.mewma.design`: fewer give no invertible
    correlation of p attributes); where the training lots are fewer, the words say so instead of naming the
    simulation's count as the lots' (a second user test read "estimated from 11 training lots" on 7)."""
    simulated = d.get("n_reference")
    out = {**d, "n_reference_lots": int(n_lots)}
    if simulated is not None and n_lots < simulated:
        out["parameters"] = (f"estimated from {n_lots} training lots; the limit is simulated as if from "
                             f"{simulated}, the fewest from which the correlation of {d['attributes']} attributes "
                             "can be estimated and inverted, so the false-alarm rate stated is optimistic for "
                             "these lots")
    return out


def design_lines(mewma: dict | None) -> list[str]:
    """The design of the watch, in words."""
    if mewma is None:
        return ["No attribute could be charted (fewer than 3 training residuals); no designed watch."]
    d = mewma["design"]
    a = d["arl"]
    return [f"Watch design: multivariate EWMA (λ = {d['lambda']:g}) of the {d['attributes']} attributes' "
            f"standardised residuals (mean, SD and correlation {d['parameters']}), limit h = {d['h']:.2f}, "
            f"in-control ARL {d['arl0_target']:g} lots for all "
            f"attributes together (simulated {a['in_control']['arl']:.0f} ± {a['in_control']['mc_se']:.0f}); "
            f"a 1 SD shift in any one attribute is detected in {a['shift_1sd']['arl']:.1f} lots on average at "
            f"most, a 2 SD shift in {a['shift_2sd']['arl']:.1f} (Lowry et al. 1992)."]


def porosity_between(chain, table: pd.DataFrame) -> dict:
    """Lot-mean porosity on an individuals chart with run rules and EWMA,
    limits from the training lots."""
    rows = table.dropna(subset=["ribbon_porosity"])
    trained = set(chain.training["lots"])
    ref_rows = rows[rows["lot"].astype(str).isin(trained)]
    if len(ref_rows) < 3 or not ref_rows["ribbon_porosity"].std() > 0:
        return {"reason": "fewer than 3 training lots with a porosity", "flags": {}}
    ref = Reference.from_values(ref_rows["ribbon_porosity"])
    x = rows["ribbon_porosity"].to_numpy(float)
    z, zl, zh = ewma(x, ref, lam=EWMA_LAMBDA, L=EWMA_L)
    rules = run_rules(x, ref)
    flags = {}
    for i, lot in enumerate(rows["lot"].astype(str)):
        reasons = list(rules[i]) + (["EWMA outside its limits"] if not zl[i] <= z[i] <= zh[i] else [])
        if reasons:
            flags[lot] = reasons
    return {
        "centre": ref.mu0, "sigma": ref.sigma, "limits": list(shewhart_limits(ref)),
        "lots": list(rows["lot"].astype(str)), "values": [float(v) for v in x],
        "ewma": [float(v) for v in z], "flags": flags,
    }


def pooled_within_sd(ribbon: pd.DataFrame | None, lots) -> tuple[float, int, int]:
    """Pooled within-lot SD of replicate ribbon porosity (1 − envelope/skeletal
    density) over ``lots``: sqrt(Σ (n_i − 1)·s_i² / Σ (n_i − 1)), with the
    number of lots that have two or more replicates and the degrees of
    freedom Σ (n_i − 1) (the pooled variance of the lots; the estimate
    :func:`porosity_within` has always used). NaN with 0 lots where none
    has two replicates."""
    if ribbon is None or ribbon.empty:
        return float("nan"), 0, 0
    df = ribbon[ribbon["lot"].astype(str).isin({str(lot) for lot in lots})]
    porosity = 1 - df["envelope_density_g_cm3"] / df["skeletal_density_g_cm3"]
    by_lot = porosity.groupby(df["lot"].astype(str))
    pooled = by_lot.var(ddof=1).dropna()
    counts = by_lot.count().reindex(pooled.index)
    dof = int((counts - 1).sum())
    if not len(pooled) or dof == 0:
        return float("nan"), 0, 0
    return float(np.sqrt(((counts - 1) * pooled).sum() / dof)), int(len(pooled)), dof


def porosity_within(ribbon: pd.DataFrame | None, trained_lots: set[str], window: tuple[float, float] | None,
                    lots: list[str] | None = None) -> list[dict]:
    """Each ribbon sample in time order within its lot, against the window
    and ±3σ (pooled within-lot SD of the training lots) around the lot's
    running mean of the samples before it."""
    if ribbon is None or ribbon.empty:
        return []
    df = ribbon.copy()
    df["lot"] = df["lot"].astype(str)
    df["porosity"] = 1 - df["envelope_density_g_cm3"] / df["skeletal_density_g_cm3"]
    sigma = pooled_within_sd(ribbon, trained_lots)[0]
    if lots is not None:
        df = df[df["lot"].isin(lots)]
    order = ["lot", "sampled_at"] if "sampled_at" in df and df["sampled_at"].notna().any() else ["lot"]
    df = df[df["lot"].notna()]  # a sample without a lot belongs to no lot (grouping by lot left it out too)
    df = df.sort_values(order, kind="stable")  # each lot's samples together, in time order within the lot
    # the columns as Python values (what iterating the frame row by row gave, without a row object a sample:
    # 0.8 s at 1,000 lots went on making them)
    sampled_at = df["sampled_at"].tolist() if "sampled_at" in df else [None] * len(df)
    out = []
    seen: list[float] = []
    current = None
    for lot, sample, porosity, sampled in zip(df["lot"].tolist(), df["sample"].tolist(), df["porosity"].tolist(),
                                              sampled_at):
        if lot != current:  # the next lot's samples begin: its running mean starts anew
            current, seen = lot, []
        eps = float(porosity)
        flags = []
        if window is not None and window[0] is not None and not window[0] <= eps <= window[1]:
            flags.append(f"porosity {eps:.3f} outside the window {window[0]:.3f}–{window[1]:.3f}")
        if len(seen) >= 2 and np.isfinite(sigma) and abs(eps - np.mean(seen)) > 3 * sigma:
            flags.append(f"porosity {eps:.3f} more than 3 within-lot SD ({sigma:.4f}) from the "
                         f"lot's earlier samples (mean {np.mean(seen):.3f})")
        seen.append(eps)
        out.append({"lot": lot, "sample": str(sample),
                    "sampled_at": None if sampled is None or pd.isna(sampled) else str(sampled),
                    "porosity": eps, "flags": flags})
    return out


def sample_looks(chain, ribbon: pd.DataFrame | None, window: tuple[float, float] | None) -> list[dict]:
    """The watch's looks at each ribbon sample (:func:`porosity_within`), the within-lot SD pooled over ``chain``'s
    training lots: what :func:`watch` makes, and the report once its window is known."""
    return porosity_within(ribbon, set(chain.training["lots"]), window)


def domain_of_new_lots(chain, table: pd.DataFrame, new_lots: list[str]) -> list[dict]:
    out = []
    rows = table[table["lot"].astype(str).isin(new_lots)]
    for stage in chain.stages:
        x = rows.dropna(subset=stage.inputs)
        if x.empty:
            continue
        for lot, verdict in zip(x["lot"].astype(str), stage.domain.check(x[stage.inputs])):
            out.append({"lot": lot, "stage": stage.name, "in_domain": bool(verdict.in_domain),
                        "reasons": list(verdict.reasons)})
    return out


def predictions_vs_measured(recorded: list[dict], table: pd.DataFrame, chain=None) -> list[dict]:
    """Each recorded what-if with a lot, against what the lot measured.

    A what-if is often made before the lot runs, at settings the lot then
    did not run at. Each entry notes the inputs whose what-if value differs
    from the lot's recorded value (``settings_differ``: input -> what-if
    value, value the lot ran at, and whether the what-if value was given or
    filled in), and where any differ and ``chain`` is given, the prediction
    made again by that model at the lot's own settings
    (``at_lot_settings``) against the same measured value. A what-if's lot
    is matched under the reader's lot identity (:func:`linkage.lotid.lot_key`),
    so one recorded as ``q26-005`` is lot ``Q26-005``'s (named as stored)."""
    from linkage.lotid import lot_key

    measured = table.set_index(table["lot"].astype(str))
    by_key: dict[str, list[str]] = {}
    for name in measured.index:
        by_key.setdefault(lot_key(name), []).append(name)

    def stored(name: str) -> str | None:  # the exact spelling first; by identity only where one lot has it
        if name in measured.index:
            return name
        same = by_key.get(lot_key(name), [])
        return same[0] if len(same) == 1 else None

    rerun: dict[str, dict | str] = {}
    out = []
    for rec in recorded:
        lot = stored(str(rec["lot"])) if rec.get("lot") else None
        if lot is None:
            continue
        differ, ran = _settings_differ(rec.get("inputs") or {}, measured.loc[lot])
        preds = (rec.get("outputs") or {}).get("predictions", {})
        for name, p in preds.items():
            if name not in measured.columns or pd.isna(measured.at[lot, name]):
                continue
            value = float(measured.at[lot, name])
            entry = {"lot": lot, "attribute": name, "model_id": rec.get("model_id"),
                     "predicted": p.get("value"), "low": p.get("low"), "high": p.get("high"),
                     "measured": value,
                     "inside_interval": bool(p.get("low") is not None and p["low"] <= value <= p["high"]),
                     "settings_differ": differ, "at_lot_settings": None}
            if differ and chain is not None:
                if lot not in rerun:
                    rerun[lot] = _predict_at(chain, ran)
                again = rerun[lot]
                if isinstance(again, str):
                    entry["at_lot_settings"] = {"reason": again}
                elif name in again:
                    q = again[name]
                    entry["at_lot_settings"] = {
                        "model_id": getattr(chain, "model_id", None), "predicted": q["value"], "low": q["low"],
                        "high": q["high"], "inside_interval": bool(q["low"] <= value <= q["high"])}
            out.append(entry)
    return out


def _settings_differ(inputs: dict, lot_row: pd.Series) -> tuple[dict, dict]:
    """The what-if inputs whose value differs from the lot's (relative
    difference above 1e-6), and every what-if input the lot has a value for."""
    differ, ran = {}, {}
    for col, v in inputs.items():
        if not isinstance(v, dict) or col not in lot_row.index or pd.isna(lot_row[col]):
            continue
        try:
            actual, asked = float(lot_row[col]), float(v.get("value"))
        except (TypeError, ValueError):
            continue
        ran[col] = actual
        if not np.isclose(asked, actual, rtol=1e-6, atol=1e-12):
            differ[col] = {"what_if": asked, "ran_at": actual, "source": v.get("source")}
    return differ, ran


def whatif_settings_lines(entry: dict) -> list[str]:
    """Text lines for a what-if made at settings the lot did not run at."""
    differ = entry.get("settings_differ") or {}
    if not differ:
        return []
    parts = ", ".join(f"{c} {d['what_if']:.4g} (lot ran at {d['ran_at']:.4g}"
                      + (", filled in" if d.get("source") not in (None, "given") else "") + ")"
                      for c, d in differ.items())
    lines = [f"    note: this what-if was made at settings the lot did not run at: {parts}"]
    again = entry.get("at_lot_settings")
    if again and "reason" in again:
        lines.append(f"    {again['reason']}")
    elif again:
        mark = "inside" if again["inside_interval"] else "OUTSIDE"
        lines.append(f"    at the lot's own settings model {again['model_id']} predicts {again['predicted']:.4g} "
                     f"[{again['low']:.4g}, {again['high']:.4g}]: measured {entry['measured']:.4g} is {mark}")
    return lines


def _predict_at(chain, values: dict) -> dict | str:
    """Predictions of ``chain`` at ``values`` (seed 0), or why there are none."""
    from linkage.decide.whatif import predict_whatif
    from linkage.exceptions import LinkageError

    try:
        return predict_whatif(chain, values, contributions=False).predictions
    except LinkageError as exc:
        return f"not predicted again at the lot's settings: {exc}"


def _new_lots_and_charts(chain, table: pd.DataFrame) -> tuple[list[str], dict[str, AttributeChart]]:
    """The lots of ``table`` since ``chain`` was trained, and the residual chart of each attribute it can chart."""
    trained = set(chain.training["lots"])
    new_lots = [lot for lot in table["lot"].astype(str) if lot not in trained]
    charts = {}
    for name in chain.targets:
        chart = attribute_chart(chain, table, name)
        if chart is not None:
            charts[name] = chart
    return new_lots, charts


def alarmed_lots(chain, table: pd.DataFrame) -> dict[str, str]:
    """The lots of ``table`` since ``chain`` was trained on which the watch's alarm (the designed multivariate
    EWMA, :func:`mewma_look`) signals, lot -> the signal in words: what ``linkage watch`` with ``chain`` says of
    these lots now, recomputed (the same charts and scheme; the audit trail holds only the watches that were
    run). ``linkage retrain`` names them, since a challenger trained on them makes the alarm vanish from the
    watch once it is promoted."""
    new_lots, charts = _new_lots_and_charts(chain, table)
    look = mewma_look(chain, charts, new_lots)
    return {} if look is None else dict(look["signals"])


def watch(chain, table: pd.DataFrame, *, ribbon: pd.DataFrame | None = None,
          window: tuple[float, float] | None = None, recorded: list[dict] | None = None) -> WatchResult:
    """Every drift look for the lots of ``table`` (assembled, time order)."""
    new_lots, charts = _new_lots_and_charts(chain, table)
    return WatchResult(
        mewma=mewma_look(chain, charts, new_lots),
        model_id=getattr(chain, "model_id", None) or "unsaved",
        new_lots=new_lots,
        charts=charts,
        porosity_between=porosity_between(chain, table),
        porosity_within=sample_looks(chain, ribbon, window),
        domain=domain_of_new_lots(chain, table, new_lots),
        predictions=predictions_vs_measured(recorded or [], table, chain),
    )


def revised_since_training(lots, training_lots, trained_at: str) -> list[dict]:
    """The model's training lots whose current revision was stored after the model was trained: the model
    was fitted on an earlier revision of them (since then an ingest with ``--reason`` changed their values, or
    one added results to them).

    ``lots``: the lot store's :meth:`linkage.store.LotStore.lots` (``lot``, ``revision``, ``updated_at``);
    ``training_lots``: the lots the model was trained on; ``trained_at``: the model's ``created_at`` (ISO 8601
    with a UTC offset). Returns one dict a lot (``lot``, ``revision``, ``revised_at``), in the store's order."""
    from datetime import datetime

    trained = datetime.fromisoformat(trained_at)
    used = set(map(str, training_lots))
    out = []
    for lot, revision, at in zip(lots["lot"], lots["revision"], lots["updated_at"]):
        if str(lot) in used and int(revision) > 1 and datetime.fromisoformat(str(at)) > trained:
            out.append({"lot": str(lot), "revision": int(revision), "revised_at": str(at)})
    return out


def revised_lines(revised: list[dict], model_id: str) -> list[str]:
    """The words for :func:`revised_since_training`'s lots (none when there are none)."""
    if not revised:
        return []
    return [f"!! {len(revised)} lot(s) model {model_id} was trained on were revised after it was trained: "
            f"{revised_text(revised)}. The model was fitted on their earlier values; its charts compare it with the "
            "values now stored (retrain to fit the revised values)."]


def revised_text(revised: list[dict]) -> str:
    """The revised lots named with their revision and time as the texts show it (the first 12, and how many
    more); ``--json`` keeps ``revised_at`` as recorded."""
    from linkage.exceptions import shown_time

    shown = ", ".join(f"{r['lot']} (revision {r['revision']}, {shown_time(r['revised_at'])})" for r in revised[:12])
    return shown + (f" and {len(revised) - 12} more" if len(revised) > 12 else "")
