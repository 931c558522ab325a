"""The what-if sheet: one self-contained HTML page to send a colleague.

No scripts, no external resources, no matplotlib (it must be fast): each
attribute's interval is drawn against its limits as inline SVG. The numbers
and sentences are computed here; the HTML is in the templates
``sheet.html.j2`` and ``sheet_parts.html.j2`` (jinja2, autoescape on, the
report's environment: :mod:`linkage.report.templating`), so every piece of
user-supplied text is escaped wherever it is put.
"""

from __future__ import annotations

from linkage import CAUTION, __version__
from linkage.numbers import percent_text
from linkage.report.figures import shown_unit, shown_units_text

# colour-blind-safe (Okabe & Ito 2008): blue, vermillion, bluish green, grey
BLUE, VERMILLION, GREEN, GREY = "#0072B2", "#D55E00", "#009E73", "#6b6b6b"

STYLE = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:64rem;margin:1.5rem auto;
padding:0 1rem;color:#1b1b1b;line-height:1.4}
h1{font-size:1.35rem;margin:0 0 .2rem} h2{font-size:1.05rem;margin:1.3rem 0 .4rem;border-bottom:1px solid #ccc}
table{border-collapse:collapse;width:100%;font-size:.9rem} td,th{padding:.25rem .5rem;text-align:left;
border-bottom:1px solid #e3e3e3;vertical-align:middle} th{background:#f3f3f3}
.num{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
.prob{text-align:right;font-variant-numeric:tabular-nums;max-width:16rem} .meta{color:#555;font-size:.8rem}
tr.detail td{border-bottom:1px solid #ccc;padding-top:0} tr.main td{border-bottom:none}
.caution{border-left:4px solid #E69F00;background:#fff7e6;padding:.6rem .8rem;margin:1rem 0;font-size:.9rem}
.out{border-left:4px solid #D55E00;background:#fdeee6;padding:.6rem .8rem;margin:1rem 0}
.in{border-left:4px solid #009E73;background:#e8f6f1;padding:.6rem .8rem;margin:1rem 0}
@media print{body{margin:0}}
"""


def _fmt(v, digits: int = 4) -> str:
    if v is None:
        return "–"
    return f"{v:.{digits}g}"


def probability_text(p: float) -> str:
    """A probability as a percent that never rounds to a certainty it does not have."""
    if p > 0.999:
        return "> 99.9%"
    if p < 0.001:
        return "< 0.1%"
    return f"{100 * p:.1f}%"


def every_spec_text(not_modelled) -> str:
    """"every specification", or "every specification except a, b" when some
    attributes of the spec are not judged (the headline names them, never
    only a footnote)."""
    names = list(not_modelled)
    return "every specification" if not names else "every specification except " + ", ".join(names)


def not_judged_text(not_modelled: dict[str, str]) -> str:
    """One sentence naming the spec attributes that are not judged and why ('' when none)."""
    if not not_modelled:
        return ""
    return "Not judged: " + "; ".join(f"{a} ({why})" for a, why in not_modelled.items()) + "."


def spec_lines(spec: dict | None) -> list[str]:
    """Plain-text lines on the spec a result was judged against: its file and
    SHA-256, and per attribute its limits, judge and time point."""
    if not spec:
        return ["No specification given: nothing judged."]
    lines = [f"Specification {spec.get('file') or '(not read from a file)'}, "
             f"SHA-256 {spec.get('sha256') or '(none)'}"]
    for a, v in spec["attributes"].items():
        at = "" if v.get("time_min") is None else f" at {v['time_min']:g} min"
        lines.append(f"  {a}: {v['limits']}{at}; judge: {v['judge']}")
    return lines


#: how a spec's judge judges, in words without brackets: the sheet writes them in brackets after the judge's name
#: ("stages (the compendial stages ...)") and the report after "Judge \"stages\":"
JUDGE_TEXT = {"mean": "the lot value, a lot mean, against the limits",
              "stages": "the compendial stages of USP <711> Table 1 for dissolution, with Q = the minimum, "
                        "simulated unit by unit"}


def spec_table_html(spec: dict | None, judged: list[str] | None = None,
                    not_modelled: dict[str, str] | None = None) -> str:
    """The spec a result was judged against, as HTML: file, SHA-256, and per
    attribute its limits, judge, time point and whether it was judged."""
    from linkage.report.templating import macro

    if not spec:
        return macro("sheet_parts.html.j2", "no_spec")()
    not_modelled = not_modelled or {}
    rows = []
    for a, v in spec["attributes"].items():
        judge = v["judge"] + (f" ({JUDGE_TEXT[v['judge']]})" if v["judge"] in JUDGE_TEXT else "")
        status = (f"not judged: {not_modelled[a]}" if a in not_modelled
                  else "judged" if judged is None or a in judged else "–")
        rows.append({"name": a, "unit": _unit(a), "limits": limits_text(v["limits"]), "judge": judge,
                     "status": status,
                     "time_point": "–" if v.get("time_min") is None else f"{v['time_min']:g} min"})
    return macro("sheet_parts.html.j2", "spec_table")(str(spec.get("file") or "(not read from a file)"),
                                                     str(spec.get("sha256") or "(none)"), rows)


def bound_text(low: float | None, point: float, assurance: float) -> str:
    """A probability as its lower bound first, the point estimate beside it:
    'at least 97.9% (assurance 90%; point estimate 99.4%)'; the point
    estimate alone, said so, when there is no bound."""
    if low is None:
        return f"{probability_text(point)} (point estimate; no lower bound)"
    return f"{at_least(low)} (assurance {percent_text(assurance)}; point estimate {probability_text(point)})"


def at_least(p: float) -> str:
    """'at least 97.9%'; '> 99.9%' where the percent would round to a certainty; 'under 0.1% at its lower
    bound' where it would round to nothing (not 'at least < 0.1%')."""
    t = probability_text(p)
    if t.startswith("<"):
        return f"under {t[1:].strip()} at its lower bound"
    return t if t.startswith(">") else f"at least {t}"


#: the headline of a what-if or window outside the applicability domain (text, HTML sheet, report)
NO_PROMISE = ("OUT OF THE APPLICABILITY DOMAIN: no probability is promised here. The numbers below are "
              "extrapolations of the models, shown for orientation only; the reasons:")

#: the headline of a window whose held settings leave a stage's applicability domain (text and report)
WINDOW_NO_PROMISE = ("OUT OF THE APPLICABILITY DOMAIN at the held settings: no probability is promised for this "
                     "window. It is an extrapolation of the models, shown for orientation only; the reasons:")

#: what a projected value means (text and HTML sheet)
PROJECTED_NOTE = ("projected: the model gave a physically impossible value or interval end, moved onto the "
                  "quantity's physical range (README, 'How the numbers are made')")


def projected_text(p: dict) -> str:
    """What the model gave before the projection of one prediction entry, and the range it was projected onto."""
    u, (lo, hi) = p["unprojected"], p["physical_range"]
    rng = f"{_fmt(lo, 6) if lo is not None else 'unbounded'} to {_fmt(hi, 6) if hi is not None else 'unbounded'}"
    ends = ", ".join(_fmt(u[k]) if u[k] is not None and abs(u[k]) != float("inf") else "unbounded"
                     for k in ("low", "high"))
    return f"the model gave {_fmt(u['value'])} [{ends}]; physical range {rng}"


def _unit(name: str) -> str:
    """' [unit]' after a quantity's name as the report writes it (:func:`linkage.report.figures.shown_unit`:
    ' [µm]'); '' for a quantity without a unit."""
    u = shown_unit(name)
    return "" if u == "-" else f" [{u}]"


def interval_svg(value: float, low: float, high: float, lo_limit: float | None, hi_limit: float | None,
                 width: int = 260, height: int = 28) -> str:
    """A small inline SVG: the interval as a bar, the value as a dot, limits as lines."""
    from linkage.report.templating import macro

    finite = [v for v in (value, low, high, lo_limit, hi_limit) if v is not None and abs(v) != float("inf")]
    a, b = min(finite), max(finite)
    pad = (b - a) * 0.12 or abs(a) * 0.1 or 1.0
    a, b = a - pad, b + pad

    def x_px(v):
        """The SVG x coordinate of value ``v`` (clipped to the drawn range)."""
        v = min(max(v, a), b)
        return 6 + (width - 12) * (v - a) / (b - a)

    geometry = {"width": width, "height": height, "low": f"{low:.4g}", "high": f"{high:.4g}",
                "middle": height / 2, "right": width - 6, "bottom": height - 2,
                "limits": [f"{x_px(lim):.1f}" for lim in (lo_limit, hi_limit) if lim is not None],
                "bar_x": f"{x_px(low):.1f}", "bar_y": height / 2 - 5,
                "bar_width": f"{max(x_px(high) - x_px(low), 1):.1f}",
                "dot_x": f"{x_px(value):.1f}", "colour": BLUE, "limit_colour": VERMILLION}
    return macro("sheet_parts.html.j2", "interval_svg")(geometry)


def contribution_text(value: float) -> str:
    """A contribution with its sign ('+0.0658', '-3.84'); an exact zero as '0', never '-0'."""
    return "0" if value == 0 else f"{value:+.3g}"


def _limits_text(limits: dict) -> str:
    """'min 80 – max 120', 'min 80', or 'no limit given'."""
    return " – ".join(
        s for s in (
            f"min {_fmt(limits.get('min'))}" if limits.get("min") is not None else "",
            f"max {_fmt(limits.get('max'))}" if limits.get("max") is not None else "",
        ) if s
    ) or "no limit given"


def _prediction_row(name: str, p: dict, d: dict) -> dict:
    """One attribute's row of the predictions table: its texts and its interval drawing."""
    lim = p.get("limits") or {}
    return {
        "name": name, "unit": _unit(name), "value": _fmt(p["value"]),
        "projected": projected_text(p) if p.get("projected") else "",
        "low": _fmt(p["low"]), "high": _fmt(p["high"]),
        "svg": interval_svg(p["value"], p["low"], p["high"], lim.get("min"), lim.get("max")),
        "limits": _limits_text(lim),
        "p_pass": ("–" if "p_pass" not in p
                   else bound_text(p.get("p_pass_low"), p["p_pass"], d["p_pass_all_bound"]["assurance"])),
        "stages": stages_text(p.get("p_stage")),
        "extrapolation": "p_pass" in p and not d["promise"],
        "method": p["interval_method"], "model": p["selected_model"],
        "contributions": contributions_shown(p), "contributions_unit": contributions_unit(name, p),
        "base": base_text(name, p),
    }


def stages_text(p_stage: dict | None) -> str:
    """The compendial stages' probabilities as the sheet writes them: 'passing at S1 84.4%, by S2 > 99.9%, by S3
    > 99.9%', the words ``linkage predict`` writes (:func:`linkage.results.stage_text`: at the first stage, by each
    later one); '' without stages."""
    from linkage.results import stage_text

    return f"passing {stage_text(p_stage)}" if p_stage else ""


#: said in place of the largest contributions when every one the what-if gives is zero
NO_CONTRIBUTION = "none (no input moves this prediction from the model's base value at these settings)"


def contributions_shown(p: dict) -> list[tuple[str, str]] | str:
    """The largest contributions of one prediction entry that are not zero, as (input, text) pairs (an input
    the model does not use contributes exactly 0 and is not a contribution); :data:`NO_CONTRIBUTION` when
    the entry has some and all are zero, and [] when it has none (a what-if made without them)."""
    given = p.get("contributions") or []
    shown = [(c["input"], contribution_text(c["value"])) for c in given if c["value"] != 0]
    return shown if shown or not given else NO_CONTRIBUTION


def _with_unit(number: str, name: str) -> str:
    """A number of quantity ``name`` with its unit after it as the report writes it ('1.92 MPa', '590.6 µm',
    '19.38%': a percent without a space, as every percent the tool writes), joined by a no-break space so that
    a line never ends between them; the number alone for a quantity without a unit (porosity)."""
    u = shown_unit(name)
    return number if u == "-" else f"{number}%" if u == "%" else f"{number}\u00a0{u}"


def contributions_unit(name: str, p: dict) -> str:
    """The unit the contributions of one prediction entry are in, '(in MPa)' after the listed ones: the unit of
    the attribute they add up to; '' where none is listed or the attribute has no unit."""
    u, shown = shown_unit(name), contributions_shown(p)
    return f"(in {u})" if u != "-" and isinstance(shown, list) and shown else ""


#: what the sheet says once of every attribute's contributions and base value (above its predictions table)
CONTRIBUTIONS_NOTE = ("An attribute's contributions are in its unit: the model's value is its base value plus "
                      "the contribution of every input (the largest are listed), before the projection onto the "
                      "attribute's physical range (where a value was projected, the predicted value shown is the "
                      "projected one).")


def base_text(name: str, p: dict) -> str:
    """What the contributions of one prediction entry add to, 'base value 1.92 MPa' (``contributions_base`` of
    ``predict --json``; :data:`CONTRIBUTIONS_NOTE`); '' for an entry without it (a what-if made without
    contributions)."""
    if p.get("contributions_base") is None:
        return ""
    return f"base value {_with_unit(_fmt(p['contributions_base']), name)}"


def _probability_all(d: dict) -> dict:
    """The paragraphs on the probability of meeting every specification at once, and what was judged how."""
    bound = d["p_pass_all_bound"]
    if d["p_pass_all"] is None:
        case = None
    else:
        case = "promise" if d["promise"] else "no bound" if d["in_domain"] else "out of domain"
    projected = any(p.get("projected") for p in d["predictions"].values())
    return {
        "case": case, "every": every_spec_text(d.get("not_modelled_reasons", {})),
        "point": None if d["p_pass_all"] is None else probability_text(d["p_pass_all"]),
        "bound": at_least(bound["low"]) if case == "promise" else None,
        "assurance": f"{100 * bound['assurance']:g}", "percentile": f"{100 * (1 - bound['assurance']):g}",
        "judges": [(k, limits_text(how)) for k, how in (d.get("judges") or {}).items()],  # ≥/≤, as the limits
        "not_judged": not_judged_text(d["not_modelled_reasons"]) if d.get("not_modelled_reasons") else "",
        "projected_note": PROJECTED_NOTE[0].upper() + PROJECTED_NOTE[1:] if projected else "",
    }


def limits_text(text: str) -> str:
    """A spec's limits as the what-if page and the report write them: '≥ 80', '≤ 15' (the spec's own text,
    :meth:`linkage.spec.Limit.text`, writes '>= 80')."""
    return text.replace(">=", "≥").replace("<=", "≤")


def _made_for(d: dict) -> dict:
    """The lot, product and dissolution time point the what-if was made for."""
    return {"lot": d.get("lot"), "product": d.get("product"),
            "product_source": d.get("product_source") if d.get("product_source") not in (None, "given") else "",
            "dissolution_min": (None if d.get("dissolution_time_min") is None
                                else f"{d['dissolution_time_min']:g}"),
            "time_point_default": not d.get("time_point_recorded", True)}


def _held(d: dict) -> dict | None:
    """The rule the settings not given were held by, and the held point's domain verdict (None: none held)."""
    hp = d.get("held_point") or {}
    if not hp.get("held"):
        return None
    from linkage.decide.held import held_text

    return {"rule": hp["rule"], "text": shown_units_text(held_text(hp))}


def whatif_html(result, set_aside_note: str | None = None) -> str:
    """Render a :class:`linkage.decide.whatif.WhatIf` as one HTML page; ``set_aside_note``: for a lot set aside in
    the store, what ``linkage predict`` says of it (:class:`linkage.results.Prediction`), put on the sheet too."""
    from linkage.report.page import trained_text
    from linkage.report.templating import Markup, render
    from linkage.results import trained_products_lines

    d = result.to_dict()
    bound = d["p_pass_all_bound"]
    return str(render(
        "sheet.html.j2", style=Markup(STYLE), model_id=d["model_id"], made_at=trained_text(d["made_at"]),
        trained_at=trained_text(d.get("model_created_at")), version=__version__,
        made_for=_made_for(d), trained_on=" ".join(trained_products_lines(d, reader=True)), caution=CAUTION,
        set_aside_note=set_aside_note[0].upper() + set_aside_note[1:] if set_aside_note else "",
        in_domain=d["in_domain"], no_promise=NO_PROMISE,
        domain_reasons=[shown_units_text(r) for r in d["domain_reasons"]], no_bound=bound.get("reason") or "",
        spec_html=Markup(spec_table_html(d.get("spec"), d.get("attributes"), d.get("not_modelled_reasons"))),
        inputs=[{"name": k, "unit": _unit(k), "value": _fmt(v["value"]), "source": v["source"]}
                for k, v in d["inputs"].items()],
        held=_held(d), level=round(100 * d["interval_level"]), probability=_probability_all(d),
        predictions=[_prediction_row(name, p, d) for name, p in d["predictions"].items()],
        contributions_note=CONTRIBUTIONS_NOTE if any(r.get("contributions_base") is not None
                                                     for r in d["predictions"].values()) else ""))
