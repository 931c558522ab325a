"""The what-if sheet: one self-contained HTML page to send a colleague.

No scripts, no external resources, no matplotlib (it must be fast): each
attribute's interval is drawn against its limits as inline SVG. Every piece
of user-supplied text goes through :func:`html.escape`.
"""

from __future__ import annotations

from html import escape

from linkage import CAUTION, __version__
from linkage.schema import ASSEMBLED

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


JUDGE_TEXT = {"mean": "the lot value (a lot mean) against the limits",
              "stages": "the compendial stages, simulated unit by unit (USP <711> Table 1 for dissolution, with "
                        "Q = the minimum)"}


def spec_table_html(spec: dict | None, judged: list[str] | None = None,
                    not_modelled: dict[str, str] | None = None) -> str:
    """The spec a result was judged against, as HTML: file, SHA-256, and per
    attribute its limits, judge, time point and whether it was judged."""
    if not spec:
        return "<p>No specification given: nothing judged.</p>"
    not_modelled = not_modelled or {}
    rows = []
    for a, v in spec["attributes"].items():
        at = "–" if v.get("time_min") is None else f"{v['time_min']:g} min"
        judge = v["judge"] + (f" ({JUDGE_TEXT[v['judge']]})" if v["judge"] in JUDGE_TEXT else "")
        status = (f"not judged: {not_modelled[a]}" if a in not_modelled
                  else "judged" if judged is None or a in judged else "–")
        rows.append(f"<tr><td>{escape(a)}{_unit(a)}</td><td>{escape(v['limits'])}</td><td>{escape(judge)}</td>"
                    f"<td class=num>{escape(at)}</td><td>{escape(status)}</td></tr>")
    return (f"<p class=meta>File <b>{escape(str(spec.get('file') or '(not read from a file)'))}</b>, "
            f"SHA-256 <code>{escape(str(spec.get('sha256') or '(none)'))}</code></p>"
            "<table><tr><th>attribute</th><th>limits</th><th>judge</th><th class=num>time point</th>"
            f"<th>in this result</th></tr>{''.join(rows)}</table>")


def bound_text(low: float | None, point: float, assurance: float) -> str:
    """A probability as its lower bound first, the point estimate beside it:
    'at least 97.9% (assurance 90%; point estimate 99.4%)'; the point
    estimate alone, said so, when there is no bound."""
    if low is None:
        return f"{probability_text(point)} (point estimate; no lower bound)"
    return f"{at_least(low)} (assurance {100 * assurance:g}%; point estimate {probability_text(point)})"


def at_least(p: float) -> str:
    """'at least 97.9%', or '> 99.9%' where the percent would round to a certainty."""
    t = probability_text(p)
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
    u = ASSEMBLED.get(name, "")
    return "" if u in ("-", "") else f" [{escape(u)}]"


def interval_svg(value: float, low: float, high: float, lo_limit: float | None, hi_limit: float | None,
                 width: int = 260, height: int = 28) -> str:
    """A small inline SVG: the interval as a bar, the value as a dot, limits as lines."""
    finite = [v for v in (value, low, high, lo_limit, hi_limit) if v is not None and abs(v) != float("inf")]
    a, b = min(finite), max(finite)
    pad = (b - a) * 0.12 or abs(a) * 0.1 or 1.0
    a, b = a - pad, b + pad

    def x(v):
        v = min(max(v, a), b)
        return 6 + (width - 12) * (v - a) / (b - a)

    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" role="img" '
             f'aria-label="interval {low:.4g} to {high:.4g}">',
             f'<line x1="6" y1="{height/2}" x2="{width-6}" y2="{height/2}" stroke="#ddd"/>']
    for lim in (lo_limit, hi_limit):
        if lim is not None:
            parts.append(f'<line x1="{x(lim):.1f}" y1="2" x2="{x(lim):.1f}" y2="{height-2}" '
                         f'stroke="{VERMILLION}" stroke-width="2" stroke-dasharray="4 2"/>')
    parts.append(f'<rect x="{x(low):.1f}" y="{height/2-5}" width="{max(x(high)-x(low), 1):.1f}" height="10" '
                 f'fill="{BLUE}" fill-opacity="0.35" stroke="{BLUE}"/>')
    parts.append(f'<circle cx="{x(value):.1f}" cy="{height/2}" r="4" fill="{BLUE}"/>')
    parts.append("</svg>")
    return "".join(parts)


def whatif_html(result) -> str:
    """Render a :class:`linkage.decide.whatif.WhatIf` as one HTML page."""
    d = result.to_dict()
    level = round(100 * d["interval_level"])
    rows = []
    for name, p in d["predictions"].items():
        lim = p.get("limits") or {}
        limits = " – ".join(
            s for s in (
                f"min {_fmt(lim.get('min'))}" if lim.get("min") is not None else "",
                f"max {_fmt(lim.get('max'))}" if lim.get("max") is not None else "",
            ) if s
        ) or "no limit given"
        p_pass = "–" if "p_pass" not in p else escape(bound_text(p.get("p_pass_low"), p["p_pass"],
                                                                   d["p_pass_all_bound"]["assurance"]))
        if "p_stage" in p:
            p_pass += "<br><span class=meta>" + ", ".join(
                f"{escape(k if k.startswith('S') else 'stage ' + k)} {escape(probability_text(v))}"
                for k, v in p["p_stage"].items()) + " (passing by, point estimates)</span>"
        if "p_pass" in p and not d["promise"]:
            p_pass += "<br><span class=meta>extrapolation, not promised</span>"
        mark = ""
        if p.get("projected"):
            mark = (f"<br><span class=meta>projected: {escape(projected_text(p))}</span>")
        contrib = ", ".join(f"{escape(c['input'])} {c['value']:+.3g}" for c in p.get("contributions", []))
        rows.append(
            f"<tr class=main><td>{escape(name)}{_unit(name)}</td><td class=num>{_fmt(p['value'])}{mark}</td>"
            f"<td class=num>{_fmt(p['low'])} – {_fmt(p['high'])}</td>"
            f"<td>{interval_svg(p['value'], p['low'], p['high'], lim.get('min'), lim.get('max'))}</td>"
            f"<td>{escape(limits)}</td><td class=prob>{p_pass}</td></tr>"
            f"<tr class=detail><td colspan=6 class=meta>interval: {escape(p['interval_method'])}; "
            f"model: {escape(p['selected_model'])}"
            f"{'; largest contributions: ' + contrib if contrib else ''}</td></tr>"
        )
    inputs = "".join(
        f"<tr><td>{escape(k)}{_unit(k)}</td><td class=num>{_fmt(v['value'])}</td><td>{escape(v['source'])}</td></tr>"
        for k, v in d["inputs"].items()
    )
    hp = d.get("held_point") or {}
    held_html = ""
    if hp.get("held"):
        from linkage.decide.held import held_text

        held_html = f"<p class=meta>Held: {escape(hp['rule'])}. {escape(held_text(hp))}</p>"
    bound = d["p_pass_all_bound"]
    if d["in_domain"]:
        verdict = '<div class="in"><b>Inside the applicability domain</b> of every stage used.</div>'
    else:
        items = "".join(f"<li>{escape(r)}</li>" for r in d["domain_reasons"])
        verdict = f'<div class="out"><b>{escape(NO_PROMISE)}</b><ul>{items}</ul></div>'
    every = escape(every_spec_text(d.get("not_modelled_reasons", {})))
    if bound.get("reason"):
        verdict += f'<div class="out"><b>No lower bound.</b> {escape(bound["reason"])}</div>'
    if d["p_pass_all"] is None:
        p_all = ""
    elif d["promise"]:
        p_all = (f"<p>Probability that a lot made this way meets {every} at once: "
                 f"<b>{escape(at_least(bound['low']))}</b> with {100 * bound['assurance']:g}% "
                 f"assurance (point estimate {escape(probability_text(d['p_pass_all']))}; the bound is the "
                 f"{100 * (1 - bound['assurance']):g}th percentile over lot-level bootstrap replicates of the "
                 "chain).</p>")
    elif d["in_domain"]:
        p_all = (f"<p>No probability of meeting {every} is promised here (no lower bound, see above). "
                 f"The point estimate is {escape(probability_text(d['p_pass_all']))}.</p>")
    else:
        p_all = (f"<p>No probability of meeting {every} is promised here (outside the applicability "
                 "domain, see above). The share of simulated lots that pass every limit, "
                 f"{escape(probability_text(d['p_pass_all']))}, is an extrapolation.</p>")
    if d.get("judges"):
        p_all += ("<p class=meta>Judged: " + "; ".join(f"{escape(a)}: {escape(how)}" for a, how in d["judges"].items())
                  + ".</p>")
    if d.get("not_modelled_reasons"):
        p_all += f"<p><b>{escape(not_judged_text(d['not_modelled_reasons']))}</b></p>"
    made_for = (f"Lot <b>{escape(d['lot'])}</b>" if d.get("lot") else "Lot: not stated")
    made_for += " · " + (f"product <b>{escape(d['product'])}</b>"
                         + (f" ({escape(d['product_source'])})" if d.get("product_source") not in (None, "given")
                            else "") if d.get("product") else "product: not stated")
    if d.get("dissolution_time_min") is not None:
        made_for += f" · dissolution modelled at {d['dissolution_time_min']:g} min"
        if not d.get("time_point_recorded", True):
            made_for += " (not recorded in the model: the default)"
    spec_html = spec_table_html(d.get("spec"), d.get("attributes"), d.get("not_modelled_reasons"))
    if any(p.get("projected") for p in d["predictions"].values()):
        p_all += f"<p class=meta>{escape(PROJECTED_NOTE[0].upper() + PROJECTED_NOTE[1:])}.</p>"
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>What-if sheet – {escape(d['model_id'])}</title>
<style>{STYLE}</style></head><body>
<h1>What-if sheet</h1>
<p class=meta>Model {escape(d['model_id'])} · made {escape(d['made_at'])} · linkage {escape(__version__)}</p>
<p>What-if made for: {made_for}</p>
<div class="caution"><b>Caution.</b> {escape(CAUTION)}</div>
{verdict}
<h2>Specification</h2>
{spec_html}
<h2>Inputs</h2>
<table><tr><th>name</th><th class=num>value</th><th>source</th></tr>{inputs}</table>
{held_html}
<h2>Predictions ({level}% intervals)</h2>
{p_all}
<p class=meta>Each bar is drawn on its own scale: the shaded bar is the interval, the dot the prediction, the
dashed lines the specification limits.</p>
<table><tr><th>attribute</th><th class=num>predicted</th><th class=num>{level}% interval</th>
<th>interval (bar) against limits (dashed)</th><th>specification</th><th class=num>P(pass)</th></tr>{''.join(rows)}</table>
</body></html>
"""
