"""What-if: predict every downstream attribute of a planned or running batch.

Given settings and/or measured values (a measured ``ribbon_porosity`` from the
at-line test, say), every attribute the chain predicts downstream is given
with an interval at the stated level, the probability of meeting its
specification, the applicability-domain verdict and the three largest
contributions.

Intervals: where every input of an attribute's stage is known (given or
held), the interval is the stage model's CV+ conformal interval with lots as
the exchangeable unit. Where an input is itself predicted (tablet attributes
from settings alone), the interval is the central quantile range of the
Monte Carlo draws through the chain, which carries the upstream uncertainty
too; ``interval_method`` says which was used. Probabilities of passing always
come from the draws.
"""

from __future__ import annotations

import io
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from linkage import CAUTION
from linkage.decide import compendial
from linkage.decide.held import rule_of
from linkage.decide.propagate import fill_settings, simulate, within
from linkage.exceptions import UsageError
from linkage.numbers import parse_plain_number
from linkage.products import chain_counts
from linkage.schema import MISSING_TOKENS, TABLES

#: cells of the bound's sums through the chain for one what-if (see linkage.decide.bound)
WHATIF_CELLS = 200

#: fractions that must lie strictly between 0 and 1
_FRACTIONS = {"ribbon_porosity", "ribbon_solid_fraction"}


def valid_names(chain) -> list[str]:
    """Names a what-if accepts: the chain's settings and its stage targets."""
    from linkage.models.lean import as_lean

    lean = as_lean(chain)
    roots = lean.root_inputs()
    return roots + [t for t in lean.all_targets() if t not in roots]


def parse_assignments(pairs: list[str], *, keep_text: bool = False) -> dict[str, float | str]:
    """``["roll_gap_mm=2.5", ...]`` → dict, with a clear error for each bad pair.

    ``keep_text``: a value that is not a number is kept as its text instead of
    refused here, so that the caller (:func:`linkage.api.whatif`) reports it
    together with the names and ranges it checks on the model: every problem
    of the command line at once."""
    out: dict[str, float | str] = {}
    problems = []
    for pair in pairs:
        name, sep, text = pair.partition("=")
        name = name.strip()
        if not sep or not name:
            problems.append(f"'{pair}' is not NAME=VALUE")
            continue
        value = parse_plain_number(text)
        if isinstance(value, str) and not keep_text:
            problems.append(f"{name}: '{text.strip()}' is {value}")
            continue
        if name in out:
            problems.append(f"{name} is set twice")
        out[name] = text.strip() if isinstance(value, str) else value
    if problems:
        raise UsageError("; ".join(problems))
    return out


def value_problems(chain, values: dict[str, float]) -> tuple[list[str], list[tuple[str, float, str]]]:
    """The names ``chain`` does not know, and each (name, value, rule) of a
    known name whose value is not finite or not physically possible."""
    names = valid_names(chain)
    unknown = [n for n in values if n not in names]
    bad: list[tuple[str, float, str]] = []
    for name, value in values.items():
        if name in unknown:
            continue
        if not math.isfinite(value):
            bad.append((name, value, "is not a finite number"))
        elif name in _FRACTIONS and not 0 < value < 1:
            bad.append((name, value, "must lie between 0 and 1 (a fraction, not a percent)"))
        else:
            column = _schema_column(name)
            if column is not None:
                low_ok = column.low is None or (value >= column.low if column.low_inclusive else value > column.low)
                high_ok = column.high is None or (value <= column.high if column.high_inclusive
                                                  else value < column.high)
                if not (low_ok and high_ok):
                    bad.append((name, value, f"is outside the possible range {column.bound_text()} [{column.unit}]"))
    return unknown, bad


def check_values(chain, values: dict[str, float], *, row: int | None = None, more: list[str] = (),
                 refused: Mapping[str, str] | None = None) -> None:
    """Refuse unknown names, non-finite values and physically impossible ones,
    with the problems in ``more`` (found before the model was at hand), all at once.

    ``refused``: names the chain knows but the calling command does not take,
    each with the reason, a rule said after the name (``window`` scans ribbon_porosity, so it cannot be
    held): each given one is refused with its reason, and none is listed
    among the valid names (a user test: window's refusal offered
    ribbon_porosity, then refused it)."""
    refused = dict(refused or {})
    where = "" if row is None else f"row {row}: "
    unknown, bad = value_problems(chain, values)  # a refused name's value is checked too
    from linkage.nearest import did_you_mean

    # only for a refusal: a what-if's check stays as cheap as before
    valid = [n for n in valid_names(chain) if n not in refused] if unknown else []
    problems = [*more, *(f"{where}{n} {reason}" for n, reason in refused.items() if n in values),
                *(f"{where}unknown name '{n}'{did_you_mean(n, valid)}" for n in unknown)]
    if unknown:
        problems.append(f"valid names are: {', '.join(valid)}")
    problems += [f"{where}{name} = {value} {rule}" for name, value, rule in bad]
    if problems:
        raise UsageError("; ".join(problems))


def check_judgeable(chain, spec, values: dict | None = None) -> None:
    """Refuse (exit code 2) a spec none of whose attributes the chain
    predicts (nor the acceptance value it judges on simulated units): a
    what-if against it would judge nothing and promise that nothing, as
    ``linkage window`` refuses it. So too a spec every predicted attribute
    of which is given in ``values`` (``--set``): a given value is not
    predicted, so not judged. No spec: nothing to check."""
    if spec is None:
        return
    given = set(values or {})
    predicted = [a for a in spec.limits if a in chain.targets]
    if spec.acceptance_value_max is None and predicted and all(a in given for a in predicted):
        raise UsageError(f"every attribute of the spec that model {chain.model_id or 'unsaved'} predicts is given "
                         f"with --set ({', '.join(predicted)}), and a given value is not predicted, so not judged: "
                         "nothing to judge; leave it unset to have it predicted and judged, or use a spec with "
                         "an attribute downstream of it")
    if spec.acceptance_value_max is not None or predicted:
        return
    raise UsageError(f"none of the spec's attributes is predicted by model {chain.model_id or 'unsaved'} "
                     f"(spec names {', '.join(spec.limits) or 'no attribute'}; the chain predicts "
                     f"{', '.join(sorted(set(chain.targets)))}); nothing to judge")


def _schema_column(name):
    for table in TABLES.values():
        if name in table.names:
            return table.column(name)
    return None


@dataclass
class WhatIf:
    model_id: str
    made_at: str
    level: float
    inputs: dict[str, dict]
    predictions: dict[str, dict]
    p_pass_all: float | None
    in_domain: bool
    domain_reasons: list[str]
    domain: dict[str, dict] = field(default_factory=dict)
    #: attribute -> how the spec judges it, in words (linkage.decide.compendial.judge_text)
    judges: dict[str, str] = field(default_factory=dict)
    #: spec attributes judged (their P(pass) enters p_pass_all), and those not, with the reason
    attributes: list[str] = field(default_factory=list)
    not_modelled: dict[str, str] = field(default_factory=dict)
    #: the spec's file, SHA-256, and each attribute's judge and time point (:meth:`linkage.spec.Spec.describe`)
    spec: dict | None = None
    #: time point [min] of the model's dissolution_pct, and whether the model records it
    dissolution_time_min: float | None = None
    time_point_recorded: bool = True
    #: the lot and product the what-if was made for (None: not stated), and where the product came from
    lot: str | None = None
    product: str | None = None
    product_source: str | None = None
    #: the lower bound at ``assurance`` of P(all pass) (None without bootstrap replicates or without a spec),
    #: and why there is none
    assurance: float = 0.9
    p_pass_all_low: float | None = None
    bound_reason: str | None = None
    #: how the settings not given were held (:func:`linkage.decide.held.rule_of`); None when all were given
    held_rule: str | None = None
    #: the products of the model's training lots with their lot counts (``product`` None: lots without a
    #: product name; ``n_lots`` None in a model saved before they were kept), :func:`linkage.products.chain_counts`
    trained_products: list[dict] = field(default_factory=list)
    #: when the model was trained (its ``created_at``; None: not recorded), said on the what-if sheet
    model_created_at: str | None = None

    @property
    def held_point(self) -> dict:
        """The point the what-if ran at (given and held settings) against the
        domain: the rule that held the settings not given, the names held,
        and the verdict (the what-if's own, every stage it used)."""
        held = [k for k, v in self.inputs.items() if v["source"] != "given"]
        return {"rule": self.held_rule if held else "every setting the chain needs was given", "held": held,
                "in_domain": bool(self.in_domain), "reasons": list(self.domain_reasons)}

    @property
    def promise(self) -> bool:
        """Whether the what-if promises its probabilities and intervals: only
        inside the applicability domain of every stage it used, and (when a
        spec is given) with a lower bound on the probability. Outside the
        domain the numbers are extrapolations of the models, shown but not
        promised."""
        return bool(self.in_domain) and self.bound_reason is None

    @property
    def promise_reasons(self) -> list[str]:
        out = [f"outside the applicability domain: {r}" for r in self.domain_reasons] if not self.in_domain else []
        return out + ([self.bound_reason] if self.bound_reason is not None else [])

    def to_dict(self) -> dict:
        return {
            "model_id": self.model_id,
            "made_at": self.made_at,
            "interval_level": self.level,
            "inputs": self.inputs,
            "predictions": self.predictions,
            "p_pass_all": self.p_pass_all,
            "in_domain": self.in_domain,
            "domain_reasons": self.domain_reasons,
            "domain": self.domain,
            "p_pass_all_bound": {"assurance": self.assurance, "low": self.p_pass_all_low,
                                 **({"reason": self.bound_reason} if self.bound_reason else {})},
            "promise": self.promise,
            "promise_reasons": self.promise_reasons,
            "judges": self.judges,
            "attributes": list(self.attributes),
            "not_modelled": list(self.not_modelled),
            "not_modelled_reasons": dict(self.not_modelled),
            "spec": self.spec,
            "dissolution_time_min": self.dissolution_time_min,
            "time_point_recorded": self.time_point_recorded,
            "lot": self.lot,
            "product": self.product,
            "product_source": self.product_source,
            "held_point": self.held_point,
            "trained_products": [dict(p) for p in self.trained_products],
            "model_created_at": self.model_created_at,
            "caution": CAUTION,
        }


def predict_whatif(chain, values: dict[str, float], *, spec=None, level: float | None = None,
                   n_draws: int = 4000, seed: int = 0, contributions: bool = True,
                   lot: str | None = None, product: str | None = None, assurance: float = 0.9) -> WhatIf:
    """Predict every downstream attribute for one set of values.

    ``chain`` is a fitted chain or its lean form (what ``linkage predict``
    loads, :mod:`linkage.models.lean`); the arithmetic runs on the lean form
    either way, so both give the same numbers. ``lot`` and ``product`` say
    what the what-if was made for (shown on the sheet); a product the model
    was not trained on is refused. A spec attribute the what-if does not
    predict is listed in ``not_modelled`` with the reason, and left out of
    ``p_pass_all``.

    With a spec, each P(pass) and P(all pass) also gets its lower bound at
    ``assurance`` (``p_pass_low``, ``p_pass_all_bound``) from the chain's
    lot-level bootstrap replicates (:mod:`linkage.decide.bound`); a model
    without replicates says so in ``p_pass_all_bound.reason`` and promises
    nothing.
    """
    from linkage.decide.bound import check_assurance
    from linkage.models.lean import as_lean
    from linkage.timepoint import check_time_point, model_time_point

    chain = as_lean(chain)
    assurance = check_assurance(assurance)
    check_values(chain, values)
    check_time_point(chain, spec, "predict")
    check_judgeable(chain, spec, values)
    product, product_source = _product_for(chain, product)
    level = float(level if level is not None else chain.nominal_coverage)
    if not 0 < level < 1:
        raise UsageError(f"interval level must lie between 0 and 1; got {level}")
    filled, source = fill_settings(chain, values)
    draws = simulate(chain, {k: [v] for k, v in filled.items()}, n_draws=n_draws, seed=seed)
    spec_limits = spec.limits if spec is not None else {}
    judged = compendial.judge_draws(chain, draws, spec, seed=seed) if compendial.needs_units(spec) else None
    stages = _stage_predictions(chain, draws, spec, judged, level, contributions)
    predictions, pass_all = stages.predictions, stages.pass_all
    if judged is not None and compendial.ACCEPTANCE_VALUE in judged.passes:
        predictions[compendial.ACCEPTANCE_VALUE] = compendial.av_entry(spec, judged, level)
        pass_all &= judged.passes[compendial.ACCEPTANCE_VALUE][0]
        stages.any_spec = True
    p_all_low, bound_reason = _bound_entries(chain, filled, spec, predictions, pass_all, assurance, seed)
    if stages.any_spec and p_all_low is None and bound_reason is None:  # never a promise without its bound
        bound_reason = "no lower bound of P(all pass) was computed for this spec"

    inputs = {k: {"value": float(filled[k]), "source": source[k]} for k in filled}
    judged_attributes = [a for a in spec_limits if a in predictions]
    if compendial.ACCEPTANCE_VALUE in predictions:
        judged_attributes.append(compendial.ACCEPTANCE_VALUE)
    not_modelled = {a: ("given with --set, not predicted: not judged" if a in draws.fixed
                        else "not predicted by this model's chain")
                    for a in spec_limits if a not in predictions}
    time_min, recorded = model_time_point(chain)
    return WhatIf(
        model_id=chain.model_id or "unsaved",
        made_at=datetime.now(timezone.utc).isoformat(timespec="seconds"),
        level=level, inputs=inputs, predictions=predictions,
        p_pass_all=float(pass_all.mean()) if stages.any_spec else None,
        in_domain=not stages.reasons, domain_reasons=stages.reasons, domain=stages.domain,
        judges={a: t for a, t in compendial.judge_text(spec).items() if a in judged_attributes}
        if spec is not None else {},  # the judged attributes only: the others are in not_modelled
        attributes=judged_attributes, not_modelled=not_modelled,
        spec=spec.describe() if spec is not None else None,
        dissolution_time_min=time_min if "dissolution_pct" in chain.targets else None,
        time_point_recorded=recorded,
        lot=lot, product=product, product_source=product_source,
        assurance=assurance, p_pass_all_low=p_all_low, bound_reason=bound_reason,
        held_rule=rule_of(chain),
        trained_products=[{"product": p, "n_lots": n} for p, n in chain_counts(chain)],
        model_created_at=getattr(chain, "created_at", None),
    )


@dataclass
class _StagePredictions:
    """What :func:`_stage_predictions` gives: an entry per predicted
    attribute, the domain verdict per stage and its reasons, whether each
    draw passes every spec limit judged so far, and whether any was."""

    predictions: dict[str, dict]
    domain: dict[str, dict]
    reasons: list[str]
    pass_all: np.ndarray
    any_spec: bool


def _stage_predictions(chain, draws, spec, judged, level: float, contributions: bool) -> _StagePredictions:
    """Every attribute the what-if predicts, stage by stage: its value and
    interval, its P(pass) where the spec limits it (on the draws, or on
    simulated units where ``judged`` has it), its three largest
    contributions; and each stage's applicability-domain verdict at the
    chain of mean predictions."""
    from linkage.models.lean import given_inputs_verdict

    spec_limits = spec.limits if spec is not None else {}
    out = _StagePredictions({}, {}, [], np.ones(draws.n_draws, dtype=bool), False)
    for stage in chain.stages:
        todo = [t for t in stage.targets if t not in draws.fixed]
        if not todo:  # every target given: the stage is not run, but the values given to it are still checked
            if stage.domain is not None:
                verdict = given_inputs_verdict(stage.domain, {c: draws.means[c] for c in stage.inputs
                                                              if c in draws.fixed})
                out.domain[stage.name] = {**{k: _num(v) if k in ("t2_limit", "q_limit") else v
                                             for k, v in verdict.items()},
                                          "checked": "training ranges of the given inputs only (the stage was "
                                                     "not run: every target of it was given)"}
                out.reasons += [f"{stage.name} stage: {r}" for r in verdict["reasons"]]
            continue
        x = {c: draws.means[c] for c in stage.inputs}
        verdict = stage.domain.check(x)[0]
        out.domain[stage.name] = {
            "in_domain": bool(verdict["in_domain"]), "t2": _num(verdict["t2"]),
            "t2_limit": _num(verdict["t2_limit"]), "q": _num(verdict["q"]), "q_limit": _num(verdict["q_limit"]),
            "reasons": list(verdict["reasons"]),
        }
        out.reasons += [f"{stage.name} stage: {r}" for r in verdict["reasons"]]
        inputs_known = all(c in draws.fixed for c in stage.inputs)
        for name in todo:
            target = stage.targets[name]
            entry = _attribute_entry(name, target, draws, x, level, inputs_known)
            if name in spec_limits:
                v = draws.values[name][0]
                ok = within(v, spec_limits[name])
                if judged is not None and name in judged.passes:  # judged on simulated units
                    ok = judged.passes[name][0]
                    entry.update(compendial.stage_entry(spec, judged))
                entry["p_pass"] = float(ok.mean())
                entry["limits"] = {"min": spec_limits[name].min, "max": spec_limits[name].max}
                entry.setdefault("judge", "mean")
                out.pass_all &= ok
                out.any_spec = True
            if contributions:
                entry["contributions"], entry["contributions_base"] = _top_contributions(target, x)
            out.predictions[name] = entry
    return out


def _attribute_entry(name: str, target, draws, x: dict, level: float, inputs_known: bool) -> dict:
    """One attribute's value and interval at ``level``: the stage model's
    conformal interval where every input of its stage is known, else the
    central quantile range of the Monte Carlo draws through the chain; each
    projected onto the physical range, the unprojected numbers beside."""
    from linkage.models.lean import physical_range, project

    v = draws.values[name][0]
    if inputs_known:
        lo, hi = target.interval(x, level, raw=True)
        raw_low, raw_high = float(lo[0]), float(hi[0])
        method = "cv+ conformal" if getattr(target, "spread", None) is None else "locally weighted cv+ conformal"
        low, high = (float(project(name, e)[0]) for e in (raw_low, raw_high))
    else:
        q = (1 - level) / 2
        low, high = (float(a) for a in np.quantile(v, [q, 1 - q]))
        raw_low, raw_high = (float(a) for a in np.quantile(draws.raw[name][0], [q, 1 - q]))
        method = "monte carlo through the chain"
    value, raw_value = float(draws.means[name][0]), float(draws.raw_means[name][0])
    bounds = physical_range(name)
    return {
        "value": value, "low": low, "high": high,
        "interval_method": method, "selected_model": target.selected,
        "projected": bool(value != raw_value or low != raw_low or high != raw_high),
        "unprojected": {"value": raw_value, "low": raw_low, "high": raw_high},
        "physical_range": [_num(b) for b in bounds],
    }


def _bound_entries(chain, filled: dict, spec, predictions: dict, pass_all: np.ndarray, assurance: float,
                   seed: int) -> tuple[float | None, str | None]:
    """The lower bounds at ``assurance`` (:mod:`linkage.decide.bound`): each
    limited attribute's ``p_pass_low`` and ``p_pass_point`` are added to its
    entry (the acceptance value's bound scaled as P(all)'s); returns the
    bound of P(all pass) and, when there is none, the reason."""
    from linkage.decide.bound import chain_probabilities, with_unit_level

    spec_limits = spec.limits if spec is not None else {}
    p_all_low, bound_reason = None, None
    bounded = [n for n in predictions if "p_pass" in predictions[n] and n in spec_limits]
    if not bounded and compendial.ACCEPTANCE_VALUE not in predictions:
        return p_all_low, bound_reason
    # a spec of the acceptance value alone: the lot-level factor judges no attribute (1 in every replicate) and
    # the bound is its unit-level factor, as the window computes it (bound.with_unit_level)
    cp = chain_probabilities(chain, {k: [v] for k, v in filled.items()}, spec_limits, bounded, seed=seed,
                             cells=WHATIF_CELLS)
    low_each = cp.low_each(assurance)
    if low_each is None:
        bound_reason = cp.reason
    else:
        p_all_low = float(cp.low_all(assurance)[0])
        if compendial.needs_units(spec):  # units judged too: the unit-level factor at its point estimate
            p_all_low = float(with_unit_level(p_all_low, cp.p_all[0], pass_all.mean()))
            for n in bounded:
                if spec.judge_of(n) == "stages":
                    low_each[n] = with_unit_level(low_each[n], cp.p_each[n], predictions[n]["p_pass"])
    for n in bounded:
        predictions[n]["p_pass_low"] = None if low_each is None else float(low_each[n][0])
        predictions[n]["p_pass_point"] = float(cp.p_each[n][0])
    if compendial.ACCEPTANCE_VALUE in predictions and p_all_low is not None:  # scaled as P(all)'s bound
        point_all = float(pass_all.mean())
        scale = min(1.0, p_all_low / point_all) if point_all > 0 else 0.0
        predictions[compendial.ACCEPTANCE_VALUE]["p_pass_low"] = predictions[compendial.ACCEPTANCE_VALUE][
            "p_pass"] * scale
    return p_all_low, bound_reason


def _product_for(chain, product: str | None) -> tuple[str | None, str | None]:
    """(product, where it came from): the given one, checked against the
    products the model was trained on; else the model's only product."""
    products = list(getattr(chain, "products", None) or [])
    if product is not None:
        product = str(product).strip()
        if products and product not in products:
            raise UsageError(f"the what-if is for product {product!r}, but model {chain.model_id} was trained on "
                             f"lots of {', '.join(repr(p) for p in products)} only")
        return product, "given"
    from linkage.products import one_product

    only = one_product({"products": products})
    return (only, "the model's only training product") if only is not None else (None, None)


def predict_many(chain, rows, **kwargs) -> list[WhatIf]:
    """One what-if per row of ``rows``: a list of {name: value} dicts, a
    DataFrame whose columns are names, or a file read by :func:`read_rows`;
    empty cells are unset. Every row is checked before any is predicted, and
    every problem is raised at once (:class:`~linkage.exceptions.InputError`)
    with the file (``rows`` for rows given from Python), the row (the header
    is row 1), the column, the value and the rule. A row with no value at all
    is refused: predicting it would be a silent guess (every setting held),
    and dropping it a silent loss."""
    from linkage.exceptions import InputError, Problem
    from linkage.models.lean import as_lean

    chain = as_lean(chain)
    if isinstance(rows, CsvRows):
        source, header_row, numbers, records_in = rows.source, rows.header_row, rows.rows, rows.records
        problems = list(rows.problems)
    else:
        records_in = rows.to_dict(orient="records") if hasattr(rows, "to_dict") else list(rows)
        source, header_row, numbers, problems = "rows", 1, list(range(2, len(records_in) + 2)), []
    names = valid_names(chain)
    by_case = {n.lower(): n for n in names}  # a name in any case is that name, as the reader matches headers
    def canonical(k) -> str:
        k = " ".join(str(k).split())
        return by_case.get(k.lower(), k)

    unknown = list(dict.fromkeys(canonical(k) for rec in records_in for k in rec if canonical(k) not in names))
    if isinstance(rows, CsvRows):
        # a template column that is no name of the model (plan's process.csv: compactor, manufactured_at ...)
        # is ignored when empty in every row, and listed in rows.ignored; with a value it is refused below
        from linkage.schema import TABLES

        template = {c.name for t in TABLES.values() for c in t.columns}
        rows.ignored = [n for n in unknown if n in template and all(
            _blank(v) for rec in records_in for k, v in rec.items() if canonical(k) == n)]
        unknown = [n for n in unknown if n not in rows.ignored]
    valid = (["lot", "product"] if isinstance(rows, CsvRows) else []) + names
    problems += [Problem(source, f"unknown name; valid names are: {', '.join(valid)}", row=header_row, column=n)
                 for n in unknown]
    row_products = _row_products(chain, rows, numbers, kwargs.get("product"), source, problems)
    ignored = set(rows.ignored) if isinstance(rows, CsvRows) else set()
    records = []
    for i, rec in zip(numbers, records_in):
        values, given, broken = {}, {}, False
        for k, v in rec.items():
            if _blank(v) or canonical(k) in ignored:
                continue
            value = parse_plain_number(v) if isinstance(v, str) else _given_number(v)
            name = canonical(k)
            if name in unknown:
                broken = True  # the column is refused as a whole, in the header
            elif isinstance(value, str):
                problems.append(Problem(source, value, row=i, column=name, value=v))
                broken = True
            else:
                values[name], given[name] = value, v
        if not values and not broken:
            problems.append(Problem(source, "the row holds no value: a what-if needs at least one setting or "
                                            "measured value (a row is never dropped, nor predicted with every "
                                            "setting held); fill it or delete it", row=i))
        problems += [Problem(source, f"{name} = {value:g} {rule}", row=i, column=name, value=given[name])
                     for name, value, rule in value_problems(chain, values)[1]]
        records.append(values)
    if problems:
        raise InputError(sorted(problems, key=lambda p: p.row or 0))  # the header's first, then row by row
    return [predict_whatif(chain, values, **{**kwargs, "product": p}) for values, p in zip(records, row_products)]


def _blank(v) -> bool:
    """An empty cell: None, NaN, or a missing token as text."""
    return v is None or (isinstance(v, float) and math.isnan(v)) or (
        isinstance(v, str) and v.strip().lower() in MISSING_TOKENS)


def _row_products(chain, rows, numbers: list[int], product: str | None, source: str, problems: list) -> list:
    """Each row's product: its ``product`` cell (a file read by :func:`read_rows`), else ``product`` (the
    ``--product`` given). A cell the model was not trained on, or one that contradicts ``--product``, is a
    problem of its row."""
    from linkage.exceptions import Problem

    cells = rows.products if isinstance(rows, CsvRows) and rows.products else [None] * len(numbers)
    trained = list(getattr(chain, "products", None) or [])
    out = []
    for i, cell in zip(numbers, cells):
        if cell is not None and product is not None and cell != " ".join(str(product).split()):
            problems.append(Problem(source, f"the row is for product {cell!r}, --product says {product!r}; give "
                                            "one or the other", row=i, column="product", value=cell))
        elif cell is not None and trained and cell not in trained:
            problems.append(Problem(source, f"model {chain.model_id} was trained on lots of "
                                            f"{', '.join(repr(p) for p in trained)} only", row=i, column="product",
                                    value=cell))
        out.append(cell if cell is not None else product)
    return out


def _given_number(v) -> float | str:
    """A number given from Python (int, float, numpy scalar) as a float, or the rule it breaks."""
    try:
        f = float(v)
    except (TypeError, ValueError, OverflowError):
        return "not a number"
    return f if math.isfinite(f) else "not a finite number"


def _top_contributions(target, x: dict, n: int = 3) -> tuple[list[dict], float]:
    """The ``n`` largest contributions of the inputs to ``target``'s prediction at ``x``, and the base value
    every input's contribution is added to (the model's value is the base plus all of them: the sheet says so,
    ``predict --json`` has it as ``contributions_base``)."""
    values, base = target.contributions(x)
    row = values[0]
    # largest absolute first; ties keep the order of the inputs (a stable sort)
    order = sorted(range(len(row)), key=lambda j: -abs(row[j]))[:n]
    base = float(np.asarray(base, dtype=float).reshape(-1)[0])  # one row: a scalar, or an array of one
    return [{"input": str(target.inputs[j]), "value": float(row[j])} for j in order], base


def _num(v):
    return None if v is None or not np.isfinite(v) else float(v)


@dataclass
class CsvRows:
    """A ``--from-csv`` file as read: each row's cells as text (``records``,
    without the ``lot`` and ``product`` columns), its lot (``lots``) and
    product (``products``), its spreadsheet row
    (``rows``; the header is ``header_row``), the file's name (``source``) and
    the problems found in reading it, reported with those of the cells."""
    records: list[dict[str, str]]
    lots: list[str | None]
    rows: list[int]
    source: str
    header_row: int = 1
    problems: list = field(default_factory=list)
    #: each row's product (an optional ``product`` column; None where blank or without the column)
    products: list[str | None] = field(default_factory=list)
    #: template columns that are no name of the model and empty in every row, ignored (set by
    #: :func:`predict_many`; ``linkage plan`` writes such columns blank)
    ignored: list[str] = field(default_factory=list)

    def __len__(self) -> int:
        return len(self.records)


def read_rows(path) -> CsvRows:
    """Read a ``--from-csv`` file: a header of names, one what-if per row.

    Every cell is kept as text (parsed and checked by :func:`predict_many`,
    which reports this file's problems with those of its cells, all at once).
    A row with more or fewer fields than the header is refused with its row
    number, never shifted into other columns. An empty line (nothing on it,
    not even a separator) is skipped and counted in the row numbers, as the
    ingest reader does; a row of empty cells is refused by :func:`predict_many`
    (never dropped). Headers are read as the reader reads them: trimmed, runs
    of spaces one space, matched to a name in any case (``Lot``). An optional
    ``lot`` column names the lot each row is for (read as the reader reads a
    lot id, and two spellings of one lot in the file refused as the reader
    refuses them); an optional ``product`` column the product each row is for
    (stated on its result as ``--product`` is). Neither is a model input. A
    file without a row under its header is refused, and so is one that cannot
    be read as CSV text (:class:`~linkage.exceptions.InputError`, at once).
    """
    import csv

    from linkage.exceptions import InputError, Problem
    from linkage.lotid import _lot_id_problems

    name = Path(path).name
    try:
        text = Path(path).read_bytes().decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise InputError(Problem(name, f"not UTF-8 text ({exc})")) from None
    try:
        lines = list(csv.reader(io.StringIO(text, newline=""), strict=True))
    except csv.Error as exc:
        raise InputError(Problem(name, f"cannot be read as CSV ({exc})")) from None
    numbered = [(i, r) for i, r in enumerate(lines, start=1) if any(cell.strip() for cell in r)]
    if not numbered:
        raise InputError(Problem(name, "empty: the file needs a header of names and one row per what-if"))
    header_row = numbered[0][0]
    header = [" ".join(h.split()) for h in numbered[0][1]]  # as the reader reads a header
    header = [h.lower() if h.lower() in ("lot", "product") else h for h in header]
    folded = [h.lower() for h in header]
    problems = [Problem(name, "column appears more than once in the header (names are matched in any case)",
                        row=header_row, column=h)
                for h in sorted({h for h in header if folded.count(h.lower()) > 1})]
    problems += [Problem(name, "a column without a name", row=header_row, column=f"column {j + 1}")
                 for j, h in enumerate(header) if not h]
    out = CsvRows([], [], [], name, header_row, problems)
    for i, r in enumerate(lines[header_row:], start=header_row + 1):
        if not r:
            continue  # an empty line: skipped and counted, as the ingest reader does
        if len(r) != len(header):
            problems.append(Problem(name, f"{len(r)} fields under a header of {len(header)} (a row is never "
                                          "shifted into other columns)", row=i))
            continue
        record = dict(zip(header, r))
        lot = " ".join(str(record.pop("lot", "")).split()) or None  # a lot id as the reader reads a text cell
        out.records.append(record)
        out.lots.append(lot)
        out.products.append(" ".join(str(record.pop("product", "")).split()) or None)
        out.rows.append(i)
    if not out.rows and not problems:
        problems.append(Problem(name, "no rows: the file holds a header and no what-if under it; give one row per "
                                      "what-if", row=header_row))
    # invisible characters, and two spellings of one lot (A1 and a1): refused as the reader refuses them
    problems += _lot_id_problems(out.lots, name, out.rows, "lot", set())
    return out
