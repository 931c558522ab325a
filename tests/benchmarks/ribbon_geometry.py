"""Would the ribbon stage gain from the compactor's roll geometry as an input?

Not a test (pytest does not collect it). The default ribbon stage takes roll
force, gap, roll speed and screw speed, and no roll geometry, while the demo
and the synthetic lots come from two compactors whose truth differs by a
porosity offset (``linkage.synthetic.Truth.compactor_offsets``). This script
fits the ribbon stage alone with ``linear_select`` (least squares on inputs
selected by inner grouped CV), under the same grouped outer folds (same lots,
same seed), with and without ``roll_diameter_mm`` and ``roll_width_mm``, and
compares the lots' out-of-fold squared errors pair by pair with the
materials comparison's own test (:func:`linkage.models.materials.paired_test`:
the one-sided paired t-test, Diebold & Mariano 1995 with Harvey, Leybourne &
Newbold 1997). It prints a markdown table and writes it to
``reports/ribbon-geometry.md``.

    python tests/benchmarks/ribbon_geometry.py --campaigns 10

Data: the demo's lots (``data_demo/lots``, ingested and assembled by linkage
into a temporary store) and ``--campaigns`` synthetic campaigns of 48 lots
(``make_lots(48, seed=s)``, seeds 3000 up).
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
EXTRAS = ([], ["roll_diameter_mm"], ["roll_diameter_mm", "roll_width_mm"])


def _demo_table():
    from linkage import api

    with tempfile.TemporaryDirectory() as tmp:
        store = Path(tmp) / "lots.db"
        api.ingest(ROOT / "data_demo" / "lots", store)
        return api.assemble(store, spec=ROOT / "data_demo" / "lots" / "spec.toml")


def _campaign_table(seed: int):
    from linkage.assemble import assemble
    from linkage.synthetic import make_lots

    return assemble(make_lots(48, seed=seed).tables)


def _errors(table, extra):
    """Out-of-fold errors of linear_select on the ribbon stage with ``extra`` inputs, and the compactor of each lot."""
    from linkage.models.chain import ChainSpec, StageSpec
    from linkage.models.train import train_chain

    ribbon = next(s for s in ChainSpec.default().stages if s.name == "ribbon")
    chain = ChainSpec([StageSpec("ribbon", list(ribbon.inputs) + extra, list(ribbon.targets),
                                 {k: dict(v) for k, v in ribbon.monotone.items()})])
    fitted = train_chain(table, chain, seed=0, n_bootstrap=0, candidates=["linear_select"]).targets["ribbon_porosity"]
    errors = (fitted.oof["linear_select"] - fitted.oof["observed"]).to_numpy(float)
    compactors = table.set_index("lot").loc[fitted.lots, "compactor"].astype(str).to_numpy()
    return errors, compactors


def _row(name, table) -> list[str]:
    from linkage.models.materials import paired_test

    runs = [_errors(table, extra) for extra in EXTRAS]
    base = runs[0][0]
    cells = [name, str(base.size)]
    for errors, compactors in runs:
        gap = {c: float(np.mean(errors[compactors == c])) for c in sorted(set(compactors))}
        spread = max(gap.values()) - min(gap.values())
        cells.append(f"{np.sqrt(np.mean(errors ** 2)):.4f} ({spread:.4f})")
    for errors, _ in runs[1:]:
        cells.append(f"{paired_test(base ** 2, errors ** 2)['p']:.3g}")
    return cells


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--campaigns", type=int, default=10)
    parser.add_argument("--out", type=Path, default=ROOT / "reports" / "ribbon-geometry.md")
    args = parser.parse_args(argv)
    started = time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime())
    rows = [_row("demo", _demo_table())]
    rows += [_row(f"synthetic, seed {s}", _campaign_table(s)) for s in range(3000, 3000 + args.campaigns)]
    head = ("| lots | n | RMSE (spread of compactor mean errors): without | + roll_diameter_mm | + roll_width_mm too "
            "| p, + diameter | p, + diameter and width |\n|---|---:|---:|---:|---:|---:|---:|")
    text = (f"# Roll geometry as an input of the ribbon stage\n\nMeasured {started} by "
            f"`python tests/benchmarks/ribbon_geometry.py --campaigns {args.campaigns}` (see its docstring). "
            "`linear_select` on the ribbon stage, grouped outer CV, seed 0; RMSE of ribbon porosity out of fold; "
            "in brackets the largest minus the smallest mean out-of-fold error by compactor; p of the one-sided "
            "paired test against the stage without geometry (the materials comparison's test).\n\n"
            + head + "\n" + "\n".join("| " + " | ".join(r) + " |" for r in rows) + "\n")
    args.out.write_text(text, encoding="utf-8")
    print(text)


if __name__ == "__main__":
    main()
