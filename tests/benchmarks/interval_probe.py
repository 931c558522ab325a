#!/usr/bin/env python
"""Which part of studentized CV+ does what (issue 12, coverage at 30 lots).
Not a test; pytest does not collect it.

On the same tables, seeds and folds as ``calibration.py --now-only
--coverage-only`` it trains the chain once and measures, on the same fresh
lots by third of the training porosity range, four intervals built from the
one fitted target:

* ``cv+``: the interval before studentized CV+: the selected candidate's
  fold models and out-of-fold residuals (locally weighted where a spread
  model is deployed);
* ``leverage``: the same folds, the scores studentized by ρ(x) = √(1 + c·h(x))
  (:func:`linkage.models.lean.leverage_scale`);
* ``procedure``: the candidate chosen inside each fold (the studentized
  basis's fold models and residuals), plain CV+;
* ``deployed``: both (``FittedTarget.interval``), as the benchmark measures.

Where locally weighted CV+ is deployed, all four are that interval.

    python tests/benchmarks/interval_probe.py --lots 30 --seeds 0-11 --out /tmp/probe30.json
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from calibration import ATTRS, _seeds, fresh_in_thirds, thirds  # noqa: E402


def variants(t, X) -> dict:
    """The four intervals of the module notes at the rows of DataFrame X."""
    from linkage.models.conformal import cv_plus_interval, lw_cv_plus_interval
    from linkage.models.lean import leverage_scale, project

    out = {"deployed": t.interval(X)}
    b = getattr(t, "interval_basis", None)
    if b is None:
        return {**out, "cv+": out["deployed"], "leverage": out["deployed"], "procedure": out["deployed"]}
    Xa = X.to_numpy(float)
    res = t.residuals.to_numpy(float)
    old = np.vstack([np.asarray(m.predict(Xa), float) for m in t.fold_models_])
    new = np.vstack([np.asarray(m.predict(Xa), float) for m in b["fold_models"]])
    ends = {"cv+": cv_plus_interval(old, t.fold_of_, res, 0.1),
            "procedure": cv_plus_interval(new, t.fold_of_, b["residuals"], 0.1)}
    if b["leverage"] is not None:
        s = leverage_scale(Xa, t.model_.lean_spec(), b["leverage"])
        ends["leverage"] = lw_cv_plus_interval(old, t.fold_of_, res, b["lot_scale"], s, 0.1)
    else:
        ends["leverage"] = ends["cv+"]
    return {**out, **{k: tuple(project(t.target, e)[0] for e in v) for k, v in ends.items()}}


def campaign(seed: int, n_lots: int, n_fresh: int) -> dict:
    from linkage.assemble import assemble
    from linkage.models.train import train_chain
    from linkage.synthetic import Truth, make_lots

    truth = Truth()
    table = assemble(make_lots(n_lots, seed=seed, truth=truth).tables)
    fresh = assemble(make_lots(n_fresh, seed=100_000 + seed, truth=truth, lot_prefix="NEW").tables)
    chain = train_chain(table, seed=0, n_bootstrap=0)
    lo, hi = chain.training["ranges"]["ribbon_porosity"]
    out = {}
    for name, t in chain.targets.items():
        sub, third = fresh_in_thirds(t, fresh, lo, hi)
        y = sub[name].to_numpy(float)
        out[name] = {"method": t.interval_method.split(" (")[0], "selected": t.selected,
                     **{k: thirds(low, high, y, third) for k, (low, high) in variants(t, sub[list(t.inputs)]).items()}}
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--lots", type=int, default=30)
    ap.add_argument("--seeds", default="0-11")
    ap.add_argument("--fresh", type=int, default=600)
    ap.add_argument("--out", type=Path, required=True)
    a = ap.parse_args(argv)
    runs = {}
    for s in _seeds(a.seeds):
        t0 = time.perf_counter()
        runs[s] = campaign(s, a.lots, a.fresh)
        a.out.write_text(json.dumps({"lots": a.lots, "runs": runs}, indent=1))
        print(f"{a.lots} lots, seed {s}: {time.perf_counter() - t0:.0f} s", flush=True)
    for a_ in ATTRS:
        cells = []
        for k in ("cv+", "leverage", "procedure", "deployed"):
            c = np.array([r[a_][k]["thirds"] for r in runs.values() if a_ in r], float)
            cells.append(f"{k} " + " ".join(f"{v:.3f}" for v in np.nanmean(c, axis=0)))
        print(f"{a_}: " + " | ".join(cells))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
