"""Retraining with a champion and a challenger.

When new lots have arrived, a challenger is fitted on every lot with the
champion's chain file and seed. The two are compared two ways:

- **On the same grouped folds.** The challenger's outer CV covers every lot;
  the champion's *choice* of model for each attribute (its selected
  candidate) was cross-validated on those same folds as one of the
  challenger's candidates. Comparing the challenger's selection with that
  number compares like with like: same lots, same folds. (The champion's
  fitted models cannot be scored on those folds: they saw most of the lots.)
- **Prospectively.** The champion's predictions for the lots it never saw,
  from their measured stage inputs, against what those lots measured.

Promotion rule (:data:`RULE`, issue 19): **prospective**, per attribute, on
the lots the champion never saw: the champion's errors from its fitted
models against the challenger's out-of-fold errors on the same lots, paired,
by the non-inferiority test of :mod:`linkage.decide.prospective` with the
tolerance (10 % by default) as the margin on the RMSE. The challenger is
promoted only when every attribute passes (an attribute with fewer than
:data:`~linkage.decide.prospective.MIN_NEW_LOTS` new lots cannot pass: no
evidence, the champion stays), or when ``force`` is given with a reason.

The earlier same-folds comparison (``r_new`` the challenger's CV RMSE,
``r_old`` the CV RMSE of the champion's choice on the same folds, ``se``)
is still reported (``within_noise``: ``r_new <= r_old + se``;
``within_tolerance``: ``r_new <= (1 + tol) * r_old``) but no longer decides:
two selections from the same folds nearly always agree. Both models stay in
the registry, and the decision with its reasons is written to the registry
and to the store's audit trail.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from linkage import CAUTION
from linkage.decide.prospective import ALPHA, MIN_NEW_LOTS, TEST, paired_noninferiority, prospective_pairs
from linkage.exceptions import InsufficientDataError, LinkageError, UsageError
from linkage.store import given_reason

#: the refusal of a forced promotion without a reason
FORCE_NEEDS_REASON = "--force needs a reason (--reason TEXT); it is recorded in the audit trail"

RULE = ("promote when, for every attribute, the challenger is shown not worse than the champion beyond the "
        "tolerance on the lots the champion never saw (at least {min_lots} of them): " + TEST.format(alpha=ALPHA)
        + "; the margin is the tolerance on the RMSE; or when forced with a reason").format(min_lots=MIN_NEW_LOTS)
DEFAULT_TOLERANCE = 0.10


@dataclass
class Comparison:
    attribute: str
    challenger_selected: str
    champion_selected: str
    challenger_rmse: float
    champion_choice_rmse: float | None
    challenger_rmse_se: float | None
    champion_cv_rmse: float | None
    prospective_rmse: float | None
    prospective_bias: float | None
    n_new: int
    within_noise: bool
    within_tolerance: bool
    #: the paired non-inferiority test on the new lots (:func:`linkage.decide.prospective.paired_noninferiority`);
    #: None for an attribute the champion does not have
    prospective: dict | None = None

    def to_dict(self) -> dict:
        def clean(v):
            if isinstance(v, dict):
                return {k: clean(x) for k, x in v.items()}
            return None if isinstance(v, float) and not np.isfinite(v) else v

        return {k: clean(v) for k, v in self.__dict__.items()}


@dataclass
class RetrainDecision:
    champion_id: str
    challenger_id: str | None
    promoted: bool
    forced: bool
    reason: str
    reasons: list[str]
    rule: str
    tolerance: float
    new_lots: list[str]
    comparisons: list[Comparison]
    window_moved: dict | None = None
    notes: list[str] = field(default_factory=list)
    #: the product whose lots the challenger was fitted on (the champion's; None: every lot of the store)
    product: str | None = None
    #: the lots trained on that the watch's alarm flags against the champion, each ``{"lot", "signal"}`` in time
    #: order (:func:`linkage.decide.watch.alarmed_lots`)
    alarmed_lots: list[dict] = field(default_factory=list)
    #: the lots set aside that the challenger was not fitted on (``linkage set-aside``), and those of them in the
    #: champion's training set
    set_aside_lots: list[str] = field(default_factory=list)
    set_aside_in_training: list[str] = field(default_factory=list)
    #: new lots that were set aside when the champion was trained and restored since (not new lots)
    restored_since_training: list[str] = field(default_factory=list)
    #: the watch's alarm design simulated for the challenger and kept in its training record
    #: (``training["watch_design"]``, :func:`linkage.decide.watch.design_at_training`), as ``train --json`` gives it
    challenger_watch_design: dict | None = None

    def to_dict(self) -> dict:
        return {
            "champion_id": self.champion_id,
            "challenger_id": self.challenger_id,
            "product": self.product,
            "promoted": self.promoted,
            "forced": self.forced,
            "reason": self.reason,
            "reasons": self.reasons,
            "rule": self.rule,
            "tolerance": self.tolerance,
            "new_lots": self.new_lots,
            "targets": {c.attribute: c.to_dict() for c in self.comparisons},
            "window_moved": self.window_moved,
            "notes": self.notes,
            "alarmed_lots": self.alarmed_lots,
            "set_aside_lots": self.set_aside_lots,
            "set_aside_in_training": self.set_aside_in_training,
            "restored_since_training": self.restored_since_training,
            "challenger_watch_design": self.challenger_watch_design,
            "promotion_test": {"test": TEST.format(alpha=ALPHA), "alpha": ALPHA, "margin": self.tolerance,
                               "min_new_lots": MIN_NEW_LOTS},
            "caution": CAUTION,
        }


def prospective_errors(champion, table: pd.DataFrame, attribute: str) -> tuple[float | None, float | None, int]:
    """RMSE and bias of the champion on lots it never saw (measured inputs)."""
    target = champion.targets[attribute]
    seen = set(champion.training["lots"])
    rows = table[~table["lot"].astype(str).isin(seen)].dropna(subset=[attribute, *target.inputs])
    if rows.empty:
        return None, None, 0
    err = rows[attribute].to_numpy(float) - np.asarray(target.predict(rows[target.inputs]), float)
    return float(np.sqrt(np.mean(err ** 2))), float(np.mean(err)), len(rows)


def compare(champion, challenger, table: pd.DataFrame, *, tolerance: float = DEFAULT_TOLERANCE) -> list[Comparison]:
    out = []
    for name, new in challenger.targets.items():
        old = champion.targets.get(name)
        r_new = float(new.candidates[new.selected]["rmse"])
        se = new.candidates[new.selected].get("rmse_se")
        se = float(se) if se is not None and np.isfinite(se) else 0.0
        if old is None:
            out.append(Comparison(name, new.selected, "-", r_new, None, se, None, None, None, 0, True, True))
            continue
        choice = new.candidates.get(old.selected)
        r_old = float(choice["rmse"]) if choice is not None else None
        p_rmse, p_bias, n_new = prospective_errors(champion, table, name)
        old_cv = old.candidates[old.selected]["rmse"]
        if r_old is None:
            within_noise = within_tol = True  # the champion's choice is not among the candidates now
        else:
            within_noise = r_new <= r_old + se + 1e-12
            within_tol = r_new <= (1 + tolerance) * r_old + 1e-12
        lots, a, b = prospective_pairs(champion, challenger, table, name)
        test = paired_noninferiority(a, b, margin=tolerance)
        test["lots"] = lots
        out.append(Comparison(name, new.selected, old.selected, r_new, r_old, se, float(old_cv), p_rmse, p_bias,
                              n_new, within_noise, within_tol, test))
    return out


def decide(comparisons: list[Comparison], *, force: bool = False, reason: str | None = None,
           tolerance: float = DEFAULT_TOLERANCE) -> tuple[bool, list[str]]:
    """Apply :data:`RULE`; returns (promote, reasons)."""
    reasons = []
    ok = True
    for c in comparisons:
        if c.prospective is None:
            reasons.append(f"{c.attribute}: new attribute; the champion has no model of it to compare with")
            continue
        t = c.prospective
        if t["n"] < MIN_NEW_LOTS:
            line = (f"{c.attribute}: {t['n']} lot(s) since the champion with a measured value; at least "
                    f"{MIN_NEW_LOTS} are needed to judge the challenger on lots the champion never saw; NOT SHOWN")
            ok = False
        else:
            ratio = "n/a" if t["rmse_ratio"] is None else f"{t['rmse_ratio']:.3g}"
            line = (f"{c.attribute}: on {t['n']} new lots, challenger {c.challenger_selected} RMSE "
                    f"{t['challenger_rmse']:.4g} (out of fold) vs champion {c.champion_selected} "
                    f"{t['champion_rmse']:.4g} (ratio {ratio}); non-inferiority within {t['margin']:.0%}: "
                    f"t = {t['statistic']:.3g}, df {t['df']}, one-sided p = {t['p_value']:.3g}")
            if t["passed"]:
                line += " - passes"
            else:
                line += f"; NOT SHOWN not worse beyond {t['margin']:.0%} (p >= {t['alpha']:g})"
                ok = False
        if c.champion_choice_rmse is not None:
            line += (f" [same folds, not used: challenger CV RMSE {c.challenger_rmse:.4g} vs champion's choice "
                     f"{c.champion_choice_rmse:.4g}]")
        reasons.append(line)
    if force:
        if given_reason(reason) is None:
            raise UsageError(FORCE_NEEDS_REASON)
        reasons.insert(0, f"promotion forced: {given_reason(reason)}")
        return True, reasons
    reasons.insert(0, "the challenger meets the promotion rule" if ok else
                   "the challenger does not meet the promotion rule; the champion stays")
    return ok, reasons


def window_moved(champion, challenger, spec, *, settings=None, confidence: float = 0.9) -> dict:
    """Both windows at the same settings, and how far each edge moved."""
    from linkage.decide.window import find_window

    a = find_window(champion, spec, settings=settings, confidence=confidence)
    b = find_window(challenger, spec, settings=settings, confidence=confidence)

    def edge(w, side):
        e = getattr(w, side)
        return {"value": e.value, "limited_by": e.limited_by}

    moved = {}
    for side in ("low", "high"):
        x, y = getattr(a, side).value, getattr(b, side).value
        moved[side] = None if x is None or y is None else y - x
    return {"confidence": confidence, "champion": {"low": edge(a, "low"), "high": edge(a, "high")},
            "challenger": {"low": edge(b, "low"), "high": edge(b, "high")}, "moved": moved}


def _challenger_time_point(champion, spec) -> float:
    """The dissolution time point the challenger is trained at: the spec's
    when it sets a dissolution limit, else the champion's. A challenger is
    compared only with a champion of the same time point (RMSEs at 15 and at
    45 min are not comparable), so a spec at another time point is refused."""
    from linkage.timepoint import model_time_point, models_dissolution, spec_time_point, time_point_error

    have, recorded = model_time_point(champion)
    wanted = spec_time_point(spec)
    if wanted is None or not models_dissolution(champion) or abs(wanted - have) <= 1e-9:
        return have if wanted is None else wanted
    how = "" if recorded else " (not recorded in the model, taken as the default)"
    raise time_point_error(spec,
        f"retrain: the spec judges dissolution_pct at {wanted:g} min, but the champion {champion.model_id} was "
        f"trained on dissolution at {have:g} min{how}; a challenger at {wanted:g} min cannot be compared with it "
        f"(nothing was trained). Train a model at {wanted:g} min with 'linkage train --spec SPEC' (it enters "
        f"service as a new champion), or retrain with a spec at {have:g} min.")


def _group_by(champion) -> str | None:
    """The champion's grouping of lots in validation (issue 19): the challenger is validated the same way."""
    g = (champion.training or {}).get("group_by")
    return None if g in (None, "lot") else g


def challenger_product(champion, product: str | None) -> str | None:
    """The product whose lots the challenger is fitted on: the champion's one product
    (:attr:`linkage.models.fitted.FittedChain.trained_product`), or every lot of the store (None) for a champion
    trained on several products or on lots without any product name, as it was trained. A champion of one product
    and some lots without a name is that product's (:func:`linkage.products.one_product`): the unnamed lots are
    left out, and the retrain's note says so. A ``product`` other than
    that is refused: the challenger would not be comparable with the champion (the promotion test pairs their
    errors on the lots the champion never saw, and the champion is not a model of that product alone)."""
    from linkage.products import trained_on_text, training_counts

    own = champion.trained_product
    if product is None or product == own:
        return own
    counts = training_counts(champion.training)
    scope = repr(own) if own is not None else (trained_on_text(counts)[len("trained on "):] if counts
                                              else "lots with no product name recorded")
    without = (f"it retrains on the lots of {own!r}" if own is not None
               else "it retrains on every lot, as the champion was trained")
    raise UsageError(f"--product {product!r}: the champion {champion.model_id} was trained on {scope}; a challenger "
                     f"of another scope is not comparable with it. Run 'linkage retrain' without --product "
                     f"({without}), or train a model of that product with: linkage train --product \"{product}\"")


def _alarmed(champion, table: pd.DataFrame) -> list[dict]:
    """The lots of ``table`` the watch's alarm flags against the champion, each ``{"lot", "signal"}`` in time order
    (:func:`linkage.decide.watch.alarmed_lots`: recomputed, so named whether or not the watch was run)."""
    from linkage.decide.watch import alarmed_lots

    return [{"lot": lot, "signal": text} for lot, text in alarmed_lots(champion, table).items()]


def _alarm_note(alarmed: list[dict], force: bool) -> str:
    """What a promotion does to the watch's alarm on the lots the challenger is trained on (a user test: after a
    forced promotion the watch said "No alarm", and the alarm was only in the audit trail)."""
    return (f"the challenger is trained on {len(alarmed)} lot(s) the watch's alarm flags against the champion "
            f"(the first: {alarmed[0]['lot']}); promoted" + (" by force" if force else "")
            + ", it becomes the model 'linkage watch' charts against, and the watch no longer shows this alarm: "
            "it stays in this decision (registry and audit trail)")


def _settled_champion(store_path, models_dir, product: str | None):
    """The champion, after settling the decisions a killed retrain left half-made (:func:`settle_pending`, which
    writes to the registry): a ``product`` the champion was not trained on is refused first (exit code 2,
    nothing written). A challenger of a pending decision has its champion's scope, so the check holds for the
    champion after settling too; that one is loaded again only if a decision was settled."""
    from linkage.models import registry

    champion = registry.load(models_dir, "latest") if product is not None else None
    if champion is not None:
        challenger_product(champion, product)
    if settle_pending(store_path, models_dir) or champion is None:
        champion = registry.load(models_dir, "latest")
    return champion


def _no_new_lots_note(set_aside: dict, champion, force: bool = False) -> str:
    """What the retrain says when no lot is new since the champion: the challenger sees the same lots, or the
    champion's training lots less those set aside since (the challenger has fewer lots, not the same data).
    ``force``: the promotion is forced in this run, so the note says so rather than pointing to --force."""
    from linkage.store import lots_named, set_aside_trained_note

    gone = set_aside_trained_note(set_aside, champion.training.get("lots"), champion.model_id)[0]
    if not gone:
        return "no lots beyond the champion's training lots; the challenger sees the same data"
    return (f"no lots beyond the champion's training lots; the challenger is fitted on them less the "
            f"{len(gone)} set aside since ({lots_named(gone)}): {len(gone)} lot{'' if len(gone) == 1 else 's'} "
            "fewer, and no new lot to judge it by, so the rule does not promote it "
            + ("(promoted by --force in this run)" if force else "('--force --reason TEXT' does)"))


def retrain(store_path, models_dir, *, product: str | None = None, spec=None, force: bool = False,
            reason: str | None = None, tolerance: float = DEFAULT_TOLERANCE, seed: int | None = None,
            user: str | None = None, progress=None) -> RetrainDecision:
    """Fit a challenger on every lot, compare, promote by the rule, record."""
    from linkage.assemble import assemble, check_dissolution_time
    from linkage.decide.watch import design_at_training
    from linkage.models import registry
    from linkage.models.train import train_chain
    from linkage.store import current_tables_of, reading, refuse_unanchored, set_aside_notes

    if not 0 <= tolerance < 1:
        raise UsageError(f"tolerance must lie in [0, 1); got {tolerance}")
    if force and given_reason(reason) is None:
        raise UsageError(FORCE_NEEDS_REASON)
    refuse_unanchored(store_path)  # a store that would refuse the record (its anchor file missing): before the work
    champion = _settled_champion(store_path, models_dir, product)
    product = challenger_product(champion, product)  # the champion's product by default; another refused
    time_min = _challenger_time_point(champion, spec)
    with reading(store_path) as store:  # an older store read as it is: upgraded only by the entry below
        tables = current_tables_of(store, product)
        stored_lots = store.lots(product, in_use=True)  # a set-aside training lot is named apart (set_aside_notes)
        others = store.other_products(product)
    q = spec.limits["dissolution_pct"].min if spec is not None and "dissolution_pct" in spec.limits else None
    check_dissolution_time(tables, time_min)
    table = assemble(tables, dissolution_time_min=time_min, dissolution_q_pct=q)
    new_lots, notes, restored = _new_lots_and_notes(champion, table, tables, stored_lots, others, product, force)
    if len(table) < 3:
        raise InsufficientDataError(f"{len(table)} lots in the store; retraining needs at least 3")
    alarmed = _alarmed(champion, table)
    challenger = train_chain(table, champion.chain, seed=champion.seed if seed is None else seed,
                             nominal_coverage=champion.nominal_coverage, progress=progress,
                             dissolution_time_min=time_min, group_by=_group_by(champion))
    challenger.training["set_aside_lots"] = list(tables.set_aside)  # recorded with the model, as train records it
    challenger.training["watch_design"] = design_at_training(challenger)  # as train records it
    comparisons = compare(champion, challenger, table, tolerance=tolerance)
    promote, reasons = decide(comparisons, force=force, reason=reason, tolerance=tolerance)
    aside = set_aside_notes(tables.set_aside, champion, notes, "left out of the challenger's lots", replaced=promote)
    moved = None
    if spec is not None:
        try:
            moved = window_moved(champion, challenger, spec)
        except UsageError as exc:
            notes.append(f"window not compared: {exc}")
    if alarmed and promote:  # the watch charts against the champion: once this one is, the alarm is gone from it
        notes.append(_alarm_note(alarmed, force))
    challenger_id = registry.save(challenger, models_dir, in_service=False)  # enters service only in phase 3
    decision = RetrainDecision(
        champion_id=champion.model_id, challenger_id=challenger_id, promoted=promote, forced=force,
        reason=given_reason(reason) or "", reasons=reasons, rule=RULE, tolerance=tolerance, new_lots=new_lots,
        comparisons=comparisons, window_moved=moved, notes=notes, product=product, alarmed_lots=alarmed,
        set_aside_lots=aside[0], set_aside_in_training=aside[1], restored_since_training=restored,
        challenger_watch_design=challenger.training["watch_design"],
    )
    _record_decision(store_path, models_dir, decision, user)
    return decision


def _new_lots_and_notes(champion, table: pd.DataFrame, tables, stored_lots, others, product: str | None,
                        force: bool) -> tuple[list[str], list[str], list[str]]:
    """The lots of ``table`` new since the champion, the notes on the lots (another product's left out, no new
    lot, lots restored or revised since the champion was trained), and the new lots restored since then."""
    from linkage.decide.watch import revised_since_training
    from linkage.products import others_text
    from linkage.store import restored_since_training

    seen = set(champion.training["lots"])
    new_lots = [lot for lot in table["lot"].astype(str) if lot not in seen]
    notes = []
    if others:  # not new lots of the champion's product: not fitted on, not counted
        notes.append(f"the store's {others_text(others)} are left out: the champion is a model of {product!r} "
                     "and the challenger is fitted on its lots only")
    if not new_lots:
        notes.append(_no_new_lots_note(tables.set_aside, champion, force))
    restored = restored_since_training(champion, new_lots, notes, "new since the champion")
    revised = revised_since_training(stored_lots, champion.training["lots"], champion.created_at)
    if revised:  # the challenger is fitted on their values now stored, the champion was on the earlier ones
        notes.append(f"{len(revised)} of the champion's training lots were revised after it was trained ("
                     + ", ".join(f"{r['lot']} revision {r['revision']}" for r in revised[:12])
                     + (" …" if len(revised) > 12 else "") + "): the champion was fitted on their earlier values, "
                     "the challenger on the values now stored; they are not new lots, so the prospective "
                     "comparison does not judge them")
    return new_lots, notes, restored


def _record_decision(store_path, models_dir, decision: RetrainDecision, user: str | None) -> None:
    """Record the decision in two phases (:func:`linkage.models.registry.begin_decision`): pending in the
    registry, then the audit row (``promote`` or ``retrain``), whose commit is the decision; the registry's
    entry is settled either way, and a refused audit row is raised again."""
    from linkage.models import registry
    from linkage.store import LotStore

    decision_id = registry.begin_decision(models_dir, decision.to_dict())
    try:
        with LotStore(store_path, create=False, for_writing=True) as store:
            store.log("promote" if decision.promoted else "retrain", user=user, model_id=decision.challenger_id,
                      inputs={"champion": decision.champion_id, "product": decision.product,
                              "force": decision.forced, "reason": decision.reason,
                              "tolerance": decision.tolerance, "new_lots": decision.new_lots,
                              "decision_id": decision_id, "alarmed_lots": decision.alarmed_lots},
                      outputs={"promoted": decision.promoted, "reasons": decision.reasons,
                               "window_moved": decision.window_moved})
    except LinkageError:
        registry.settle_decision(models_dir, decision_id, recorded=False)
        raise
    registry.settle_decision(models_dir, decision_id, recorded=True)


def settle_pending(store_path, models_dir) -> list[tuple[str, str]]:
    """Settle the decisions a killed retrain left pending, by the lot store: in effect where the audit trail
    holds the decision's row, abandoned where not (see :func:`linkage.models.registry.begin_decision`).
    Returns (decision id, new state) for each."""
    from linkage.models import registry
    from linkage.store import reading

    pending = registry.pending_decisions(models_dir)
    if not pending:
        return []
    with reading(store_path) as store:  # settling writes the registry, not the store: an older one not upgraded
        logged = {a["inputs"].get("decision_id") for a in store.audit()
                  if a["action"] in ("promote", "retrain") and isinstance(a.get("inputs"), dict)}
    return [(d["decision_id"], registry.settle_decision(models_dir, d["decision_id"],
                                                        recorded=d["decision_id"] in logged)) for d in pending]
