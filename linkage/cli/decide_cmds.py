"""``linkage window`` and ``linkage predict``."""

from __future__ import annotations

import json
from pathlib import Path

import click

from linkage import CAUTION
from linkage.cli.common import PROBABILITY, handle_errors, json_option, models_dir_option, store_option
from linkage.jsonable import jsonable

_model_option = click.option("--model", "model_id", default="latest", show_default=True,
                             help="Model id from 'linkage models', or 'latest'.")
_set_option = click.option("--set", "assignments", multiple=True, metavar="NAME=VALUE",
                           help="Hold a setting (or a measured value) at VALUE. Repeatable.")


@click.command()
@click.option("--spec", "spec_path", required=True, type=click.Path(exists=True, dir_okay=False, path_type=Path),
              help="Specification file (spec.toml).")
@_model_option
@_set_option
@click.option("--confidence", default=0.9, show_default=True, type=PROBABILITY,
              help="Probability of meeting every specification together that the window must reach.")
@click.option("--draws", "n_draws", default=2000, show_default=True, type=click.IntRange(200, 200_000),
              help="Monte Carlo draws per porosity.")
@click.option("--seed", default=0, show_default=True, type=int)
@models_dir_option
@store_option
@json_option
@handle_errors
def window(spec_path, model_id, assignments, confidence, n_draws, seed, models_dir, store, as_json):
    """Find the ribbon porosity window where every specification passes
    with the stated confidence, and the roll force that lands in it.

    Settings not given with --set are held at the training median; the
    output says which.

    \b
    Example:
      linkage window --spec spec.toml --set roll_gap_mm=2.5 --confidence 0.9
      linkage window --spec spec.toml --json > window.json
    """
    from linkage.decide.whatif import parse_assignments
    from linkage.decide.window import find_window
    from linkage.models.registry import load
    from linkage.spec import read_spec

    spec = read_spec(spec_path)
    settings = parse_assignments(list(assignments))
    chain = load(models_dir, model_id)
    result = find_window(chain, spec, settings=settings, confidence=confidence, n_draws=n_draws, seed=seed)
    record(store, "window", model_id=result.model_id,
           inputs={"spec": spec.to_dict(), "settings": settings, "confidence": confidence, "seed": seed},
           outputs=result.to_dict(curve=False))
    if as_json:
        click.echo(json.dumps(jsonable(result.to_dict()), indent=2, allow_nan=False))
        return
    click.echo(format_window(result))


def format_window(result) -> str:
    d = result.to_dict(curve=False)
    por = d["ribbon_porosity"]
    lines = [f"Model {d['model_id']}; confidence {d['confidence']:.0%} that every specification passes together.",
             f"Training lots cover ribbon porosity {por['data_range'][0]:.3f}–{por['data_range'][1]:.3f}."]
    if not d.get("promise", True):
        from linkage.report.sheet import WINDOW_NO_PROMISE

        lines.append(f"!! {WINDOW_NO_PROMISE}")
        lines += [f"   - {r}" for r in d["promise_reasons"]]
    if not d["found"]:
        lines.append("NO WINDOW: at no porosity in the training range does the chance of meeting every "
                     f"specification reach {d['confidence']:.0%}.")
    else:
        lines.append(f"Porosity window: {por['low']:.3f} – {por['high']:.3f}"
                     + ("" if d.get("promise", True) else " (extrapolation, not promised)"))
        for side in ("low", "high"):
            by = por[f"{side}_limited_by"]
            why = "cut by the range of the training data, not by a specification" if by == "data range" \
                else f"limited by {by}"
            lines.append(f"  {side} edge: {why}")
        if len(por["segments"]) > 1:
            lines.append("  other passing ranges: " + ", ".join(f"{a:.3f}–{b:.3f}" for a, b in por["segments"]))
    mw = d["mean_response_window"]
    if mw["low"] is not None:
        lines.append(f"Mean-response window (overstates what can be promised): {mw['low']:.3f} – {mw['high']:.3f}")
    rf = d["roll_force_kn_per_cm"]
    if rf.get("low") is not None:
        lines.append(f"Roll force for the window: {rf['low']:.2f} – {rf['high']:.2f} kN/cm "
                     f"({d['confidence']:.0%} of lots inside); mean prediction inside: "
                     f"{rf['mean_low']:.2f} – {rf['mean_high']:.2f} kN/cm")
    elif rf.get("reason"):
        lines.append(f"Roll force: {rf['reason']}")
    lines.append("Settings used:")
    for k, v in d["settings"].items():
        lines.append(f"  {k} = {v['value']:.4g} ({v['source']})")
    if rf.get("held"):
        lines.append("Held for the roll force range: " +
                     ", ".join(f"{k} = {v['value']:.4g} ({v['source']})" for k, v in rf["held"].items()))
    if d["not_modelled"]:
        lines.append("Not part of the window (not predicted from porosity): " + ", ".join(d["not_modelled"]))
    lines.append(CAUTION)
    return "\n".join(lines)


@click.command()
@_model_option
@_set_option
@click.option("--spec", "spec_path", type=click.Path(exists=True, dir_okay=False, path_type=Path),
              help="Specification file; adds the probability of passing each limit.")
@click.option("--level", type=PROBABILITY, default=None,
              help="Interval level (default: the model's nominal coverage).")
@click.option("--from-csv", "from_csv", type=click.Path(exists=True, dir_okay=False, path_type=Path),
              help="Predict every row of a CSV whose columns are names.")
@click.option("--html", "html_path", type=click.Path(dir_okay=False, path_type=Path),
              help="Write a one-page what-if sheet (one row only).")
@click.option("--lot", default=None, help="The lot this what-if is for; its results, when they arrive, are "
              "compared with the prediction ('linkage watch').")
@click.option("--seed", default=0, show_default=True, type=int)
@models_dir_option
@store_option
@json_option
@handle_errors
def predict(model_id, assignments, spec_path, level, from_csv, html_path, lot, seed, models_dir, store, as_json):
    """What-if: predict every downstream attribute from settings and/or
    measured values, with intervals, the chance of passing each specification
    and the applicability-domain verdict.

    \b
    Example:
      linkage predict --set roll_force_kn_per_cm=9 --set roll_gap_mm=2.5 --spec spec.toml
      linkage predict --set ribbon_porosity=0.31 --spec spec.toml --html whatif.html
      linkage predict --from-csv planned.csv --json
      linkage predict --set ribbon_porosity=0.29 --lot Q26-049 --spec spec.toml

    Every what-if is recorded in the lot store (when it exists) with the
    model id, the inputs and the outputs.
    """
    from linkage.decide.whatif import parse_assignments, predict_many, predict_whatif, read_rows
    from linkage.exceptions import UsageError
    from linkage.models.registry import load_whatif

    spec = None
    if spec_path is not None:
        from linkage.spec import read_spec

        spec = read_spec(spec_path)
    values = parse_assignments(list(assignments))
    chain = load_whatif(models_dir, model_id)  # numbers only: no scikit-learn or pandas to import
    if from_csv is not None:
        if values:
            raise UsageError("give either --set or --from-csv, not both")
        if html_path is not None:
            raise UsageError("--html writes one sheet for one what-if; use it without --from-csv")
        rows, csv_lots = read_rows(from_csv)
        row_lots = csv_lots if lot is None else [lot] * len(rows)
        results = predict_many(chain, rows, spec=spec, level=level, seed=seed)
    else:
        if not values:
            raise UsageError("nothing to predict from: give --set NAME=VALUE (or --from-csv)")
        results = [predict_whatif(chain, values, spec=spec, level=level, seed=seed)]
        row_lots = [lot]
    for r, row_lot in zip(results, row_lots):
        d = r.to_dict()
        record(store, "predict", model_id=d["model_id"], lot=row_lot, inputs=d["inputs"], outputs=d,
               prediction=True)
    if html_path is not None:
        from linkage.report.sheet import whatif_html

        html_path.parent.mkdir(parents=True, exist_ok=True)
        html_path.write_text(whatif_html(results[0]), encoding="utf-8")
    if as_json:
        payload = results[0].to_dict() if from_csv is None else [r.to_dict() for r in results]
        # strict JSON: an unbounded interval end (too few lots) is null; the model's notes say why
        click.echo(json.dumps(jsonable(payload), indent=2, allow_nan=False))
    else:
        for r, row_lot in zip(results, row_lots):
            if row_lot is not None:
                click.echo(f"For lot {row_lot}:")
            click.echo(format_whatif(r))
    if html_path is not None:
        click.echo(f"What-if sheet written to {html_path}", err=True)


def format_whatif(result) -> str:
    from linkage.report.sheet import NO_PROMISE, PROJECTED_NOTE, probability_text, projected_text

    d = result.to_dict()
    lvl = f"{d['interval_level']:.0%}"
    lines = [f"Model {d['model_id']}, {lvl} intervals."]
    if not d["promise"]:
        lines.append(f"!! {NO_PROMISE}")
        lines += [f"   - {r}" for r in d["domain_reasons"]]
    lines.append("Inputs: " + ", ".join(f"{k}={v['value']:.4g}"
                                        + (" (median)" if v["source"] != "given" else "")
                                        for k, v in d["inputs"].items()))
    projected = []
    for name, p in d["predictions"].items():
        line = f"  {name:<24} {p['value']:>9.4g}   [{_end(p['low'])}, {_end(p['high'])}]"
        if p.get("projected"):
            line += " *"
            projected.append(f"   * {name}: {projected_text(p)}")
        if "p_pass" in p:
            line += f"   P(pass) {probability_text(p['p_pass'])}"
            if not d["promise"]:
                line += " (extrapolation, not promised)"
        lines.append(line)
    if projected:
        lines.append(f"   * {PROJECTED_NOTE}")
        lines += projected
    if d["p_pass_all"] is not None:
        if d["promise"]:
            lines.append(f"P(every specification passes together): {probability_text(d['p_pass_all'])}")
        else:
            lines.append("No probability of meeting every specification is promised here; the share of simulated "
                         f"lots that pass every limit, {probability_text(d['p_pass_all'])}, is an extrapolation.")
    lines.append(CAUTION)
    return "\n".join(lines)


def _end(v) -> str:
    return "unbounded" if v is None or abs(v) == float("inf") else f"{v:.4g}"


def record(store, action: str, *, model_id: str, inputs, outputs, lot: str | None = None,
           prediction: bool = False) -> None:
    """Write to the store's audit trail (and its predictions table for a
    what-if) when the store exists; say so on stderr when it does not."""
    if not store.exists():
        click.echo(f"Note: no lot store at {store}; this {action} was not recorded in an audit trail.", err=True)
        return
    from linkage.store import LotStore

    with LotStore(store, create=False) as s:
        if prediction:
            s.record_prediction(model_id, inputs, outputs, lot=lot)
        s.log(action, lot=lot, model_id=model_id, inputs=inputs, outputs=outputs)
