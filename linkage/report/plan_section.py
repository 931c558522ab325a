"""The report's plan section: the planned lots drawn over roll force × roll
gap with the lots made so far, and a table of what each lot is for
(issue 18; :mod:`linkage.decide.plan`)."""

from __future__ import annotations

import json
from functools import partial
from pathlib import Path

import numpy as np

FORCE = "roll_force_kn_per_cm"
GAP = "roll_gap_mm"


def read_plan(plan) -> dict:
    """A plan as its JSON dict: from a :class:`~linkage.decide.plan.Planned`,
    a :class:`~linkage.decide.plan.Plan`, a dict, or the path of a
    ``plan.json`` (``linkage plan --out``). A file that is not a plan is
    refused, naming the file and what is missing."""
    from linkage.exceptions import InputError, Problem

    if hasattr(plan, "to_dict"):
        return plan.to_dict()
    if isinstance(plan, dict):
        return plan
    path = Path(plan)
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError(Problem(path.name, f"not a plan written by 'linkage plan' (not JSON: {exc})")) from None
    lots = data.get("lots") if isinstance(data, dict) else None
    if not isinstance(lots, list) or not all(isinstance(x, dict) and isinstance(x.get("settings"), dict)
                                             and "lot" in x for x in lots):
        raise InputError(Problem(path.name, "not a plan written by 'linkage plan': no list 'lots' of "
                                            "{lot, settings}"))
    return data


def plot_plan_map(force, gap, plan_force, plan_gap, labels, *, ax=None):
    """The lots made so far (grey dots: every lot of the report's table, trained on or not) and planned lots
    (black crosses, labelled with their run number) over roll force × roll gap."""
    from linkage.report.figures import BLACK, GREY, axis_label, new_axes

    ax = new_axes(ax, panel=(6.0, 3.4))
    force, gap = np.asarray(force, float), np.asarray(gap, float)
    keep = np.isfinite(force) & np.isfinite(gap)
    ax.scatter(force[keep], gap[keep], s=22, color=GREY, alpha=0.7, label=f"lots made so far ({int(keep.sum())})")
    pf, pg = np.asarray(plan_force, float), np.asarray(plan_gap, float)
    ax.scatter(pf, pg, s=60, marker="x", color=BLACK, linewidths=1.8, label="planned lots")
    for x, y, text in zip(pf, pg, labels):
        ax.annotate(str(text), (x, y), xytext=(4, 4), textcoords="offset points", fontsize=8, color=BLACK)
    ax.set_xlabel(axis_label(FORCE))
    ax.set_ylabel(axis_label(GAP))
    ax.grid(alpha=0.3)
    ax.legend(loc="best", fontsize=8)
    return ax


def plan_section(b, chain, table, plan: dict) -> None:
    """Add the plan section to the report builder ``b`` (see :mod:`linkage.report.html`)."""
    from linkage.report.html import _part, number_text

    b.section("plan", "Planned lots")
    lots = plan.get("lots") or []
    kind = "a starting design for a new product" if plan.get("kind") == "start" else "the next lots of the campaign"
    b.add(_part("sections", "plan_head", n=len(lots), kind=kind, method=plan.get("method"), seed=plan.get("seed"),
                model_id=plan.get("model_id")))
    if plan.get("model_id") and getattr(chain, "model_id", None) and plan["model_id"] != chain.model_id:
        b.note(f"The plan was made with model {plan['model_id']}, not the model of this report ({chain.model_id}).")
    for e in plan.get("edges") or []:
        b.add(_part("sections", "plan_edge", name=e.get("name"), where=e.get("where"),
                    variance=number_text(e.get("relative_variance"), 2)))
    have = [c for c in (FORCE, GAP) if c in table.columns]
    planned = [x["settings"] for x in lots]
    if len(have) == 2 and lots and all(FORCE in s and GAP in s for s in planned):
        make = partial(plot_plan_map, table[FORCE], table[GAP], [s[FORCE] for s in planned],
                       [s[GAP] for s in planned], [x.get("run", i + 1) for i, x in enumerate(lots)])
        b.figure(make, "Planned lots (crosses, labelled with their run number) and the lots made so far (dots; every "
                     "lot of this report's table, whether the model was trained on it or not) over "
                     "specific roll force and roll gap.")
    else:
        b.note("The plan or the lots lack roll force or roll gap, so the plan cannot be drawn over them.")
    names = list(dict.fromkeys(k for s in planned for k in s))
    rows = [[x.get("run"), x.get("lot"), *(number_text(x["settings"].get(k), 4) for k in names),
             number_text(x.get("predicted_porosity"), 3),
             {True: "inside", False: "outside", None: "—"}[x.get("in_domain")]] for x in lots]
    # each lot's reason on a line of its own under its settings: a column of it beside the settings' long
    # names was squeezed to a few words a line, each lot's row many lines tall
    b.add(_part("sections", "plan_lots", header=["run", "lot", *names, "predicted porosity", "domain"], rows=rows,
                reasons=[x.get("reason") or "—" for x in lots]))
    for n in plan.get("notes") or []:
        b.add(_part("blocks", "para", text=n))
