"""Material attributes as inputs, kept only where grouped CV says they help
(issue 19 item 4; ``train --materials``).

The process table may carry extra numeric columns the template does not
name: raw-material attributes such as blend moisture or the drug
substance's particle size. They are stored but no stage uses them unless a
chain file names them. With ``materials=True`` the chain is fitted twice,
without them and with them as inputs of **every stage** (the blend's
properties can act on compaction, on milling and on tableting; which ones do
is left to the data), under the same grouped CV, and an attribute keeps them
only where the comparison says they help (:data:`RULE`). The extra columns
are tried as one set; within it, the candidates that select inputs
(``linear_select`` and the physics forms) choose among them. The chain with the kept
inputs is then fitted as usual; the comparison is recorded in the model
(``training.materials``).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from linkage.models.chain import ChainSpec, StageSpec
from linkage.schema import ASSEMBLED, TABLES

__all__ = ["RULE", "extra_columns", "with_columns", "with_columns_for", "compare_targets", "train_with_materials"]

RULE = ("an attribute keeps the extra columns as inputs when its selected model's grouped-CV RMSE with them is "
        "lower than without them by more than one standard error of the RMSE without (the one-standard-error rule "
        "of the model selection: Breiman et al. 1984, §3.4.3; Hastie, Tibshirani & Friedman 2009, §7.10); where "
        "only some attributes of a stage keep them, those move to a stage of their own, '<stage>_materials', "
        "right after it, with the stage's inputs and the extra columns")


def extra_columns(table: pd.DataFrame, chain: ChainSpec) -> list[str]:
    """Numeric columns of the process table that neither the template nor
    the chain names and that vary between lots, in table order (from what
    :func:`linkage.assemble.assemble` records in ``table.attrs``; for a table
    without it, every column no template table or assembled column names)."""
    known = set(ASSEMBLED) | {c for t in TABLES.values() for c in t.names}
    known |= set(chain.root_inputs()) | set(chain.targets())
    recorded = table.attrs.get("process_extra_columns") if hasattr(table, "attrs") else None
    out = []
    for c in table.columns:
        if c in known or (recorded is not None and c not in recorded) or not pd.api.types.is_numeric_dtype(table[c]) or pd.api.types.is_bool_dtype(table[c]):
            continue
        v = pd.to_numeric(table[c], errors="coerce").to_numpy(float)
        v = v[np.isfinite(v)]
        if v.size >= 3 and np.ptp(v) > 0:
            out.append(str(c))
    return out


def with_columns(chain: ChainSpec, columns: list[str], stages: list[str] | None = None) -> ChainSpec:
    """The chain with ``columns`` added to the inputs of ``stages`` (default: every stage)."""
    out = []
    for st in chain.stages:
        extra = [c for c in columns if c not in st.inputs] if stages is None or st.name in stages else []
        out.append(StageSpec(st.name, list(st.inputs) + extra, list(st.targets),
                             {t: dict(d) for t, d in st.monotone.items()}))
    return ChainSpec(out, source=chain.source)


def with_columns_for(chain: ChainSpec, columns: list[str], targets: list[str]) -> ChainSpec:
    """The chain in which ``targets`` (and only they) also take ``columns`` as
    inputs: a stage whose every attribute takes them gains them; a stage where
    only some do is split, those moving to ``<stage>_materials`` right after it."""
    out = []
    for st in chain.stages:
        mono = {t: dict(d) for t, d in st.monotone.items()}
        keep = [t for t in st.targets if t in targets]
        extra = [c for c in columns if c not in st.inputs]
        if not keep:
            out.append(StageSpec(st.name, list(st.inputs), list(st.targets), mono))
        elif len(keep) == len(st.targets):
            out.append(StageSpec(st.name, list(st.inputs) + extra, list(st.targets), mono))
        else:
            rest = [t for t in st.targets if t not in keep]
            out.append(StageSpec(st.name, list(st.inputs), rest, {t: mono[t] for t in rest if t in mono}))
            out.append(StageSpec(f"{st.name}_materials", list(st.inputs) + extra, keep,
                                 {t: mono[t] for t in keep if t in mono}))
    return ChainSpec(out, source=chain.source)


def compare_targets(without, with_, columns: list[str]) -> dict:
    """Per attribute: the selected model and CV RMSE without and with the
    columns, and whether it keeps them by :data:`RULE`."""
    rows = {}
    for name, t in without.targets.items():
        u = with_.targets.get(name)
        if u is None:
            continue
        r0, se0 = float(t.candidates[t.selected]["rmse"]), float(t.candidates[t.selected]["rmse_se"])
        r1 = float(u.candidates[u.selected]["rmse"])
        rows[name] = {"stage": t.stage, "kept": bool(r1 < r0 - se0),
                      "without": {"selected": t.selected, "rmse": r0, "rmse_se": se0, "n_lots": t.n_lots},
                      "with": {"selected": u.selected, "rmse": r1,
                               "rmse_se": float(u.candidates[u.selected]["rmse_se"]), "n_lots": u.n_lots}}
    return {"columns": list(columns), "rule": RULE, "targets": rows,
            "kept_for": [t for t, v in rows.items() if v["kept"]]}


def train_with_materials(table: pd.DataFrame, chain: ChainSpec | None = None, **kwargs):
    """:func:`linkage.models.train.train_chain` with the comparison of the
    module docstring; ``kwargs`` go to every fit (the exploratory two without
    bootstrap replicates). The returned chain's ``training["materials"]``
    holds the comparison (``columns`` empty, with ``reason``, when the table
    has none)."""
    from linkage.models.train import train_chain

    chain = chain if chain is not None else ChainSpec.default()
    columns = extra_columns(table, chain)
    if not columns:
        fitted = train_chain(table, chain, **kwargs)
        fitted.training["materials"] = {"columns": [], "reason": "the table has no extra numeric column", "rule": RULE}
        return fitted
    explore = {**kwargs, "n_bootstrap": 0, "progress": None}
    without = train_chain(table, chain, **explore)
    with_ = train_chain(table, with_columns(chain, columns), **explore)
    comparison = compare_targets(without, with_, columns)
    final_chain = with_columns_for(chain, columns, comparison["kept_for"]) if comparison["kept_for"] else chain
    fitted = train_chain(table, final_chain, **kwargs)
    fitted.training["materials"] = comparison
    return fitted
