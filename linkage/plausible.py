"""Plausibility against history: a value far from what the store holds is refused, with the likely unit mistake.

The template's bounds are physical (a roll force of 0–100 kN/cm), so a
site's unit slips pass them: a total roll force in kN in the kN/cm column, a
dissolution result written as a fraction (0.963), a tablet weight in g. Each
is far from the lots the store already holds for the same product. This
module compares every judged column of an ingest with a sample of the
product's recent lots (:data:`HISTORY_LOTS` at most, so an ingest costs the
same however large the store is).

The rule, per column, on a log scale (unit slips are factors): each
history lot contributes the median of its rows (one value per lot, so a lot
with 30 unit weights counts once); the median ``m`` of their base-10
logarithms and the median absolute deviation give the robust scale
``s = 1.4826 · MAD`` (the consistency constant of the MAD for a normal
distribution: Rousseeuw & Croux 1993, J. Am. Stat. Assoc. 88:1273–1283,
eq. 1), floored at 0.02 decades (about 5 %) so that a setting every lot
shared (one mill screen) does not make every new value extreme. A positive
value ``x`` with ``d = |log10 x − m|`` is *unusual* when ``d`` exceeds a
factor of 3 (:data:`RATIO_LIMIT`) and either

- a unit slip explains it: ``x`` divided or multiplied by 10, 100 or 1000
  (or a roll force divided by the roll width in cm) lands within
  ``max(3 s, log10 1.5)`` of ``m`` and within ``d / 3`` (the slip accounts
  for most of the distance), and ``d > 4 s``; or
- ``d > 10 s``, explained or not.

So a new design point at a quarter of the usual roll force passes, a
dissolution written as a fraction or a breaking force in kN does not. The
limits are common practice, no source; they are set for unit mistakes, not
for drift (``linkage watch`` is for that). Zero and negative values are not
judged on a log scale.

History needs at least :data:`MIN_HISTORY_LOTS` lots of the product with a
value; a column with fewer is not judged. A product none of whose columns
could be judged is named in one note (:func:`history_note`; the ingest and
its preview print it), so that the check is not off without a word. ``linkage ingest --accept-unusual --reason TEXT``
takes unusual values deliberately; the audit trail records them. A folder the
reader refuses for other problems is judged too, on its tables read whole,
so that one refusal names every problem (``LotStore.unusual_beside``).

Without history, so on a first ingest too, :func:`sieve_apertures` refuses
sieve apertures no test sieve has (below :data:`SMALLEST_SIEVE_UM`, a stack
written in mm for um); the reader applies it (``read_folder(...,
accept_unusual=)``) beside a folder's other problems, before a store is
created, and ``--accept-unusual`` takes those too.
"""

from __future__ import annotations

import math
from statistics import median

from linkage.exceptions import Problem
from linkage.lotid import row_span

#: columns judged: lot-level quantities, one value or a few replicates per lot
JUDGED: dict[str, tuple[str, ...]] = {
    "process": ("roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm", "screw_speed_rpm", "mill_screen_mm",
                "roll_width_mm", "roll_diameter_mm"),
    "ribbon": ("envelope_density_g_cm3", "skeletal_density_g_cm3"),
    "granules_laser": ("d10_um", "d50_um", "d90_um"),
    "tablets": ("compression_force_kn", "breaking_force_n", "thickness_mm", "diameter_mm", "weight_rsd_pct",
                "friability_pct", "dissolution_pct"),
    "tablet_weights": ("weight_mg",),
}
#: columns judged on the lot's median, not row by row: a sieve stack spans decades within one lot (pan to top
#: sieve), so only the stack as a whole can look like a unit slip (apertures in mm for um)
JUDGED_BY_LOT: dict[str, tuple[str, ...]] = {"granules": ("sieve_um",)}
#: every table judged, either way (what the store reads back as history)
TABLES_JUDGED = frozenset(JUDGED) | frozenset(JUDGED_BY_LOT)
HISTORY_LOTS = 50
MIN_HISTORY_LOTS = 10
#: robust SDs (log scale) beyond which an explained value is refused, and an unexplained one
Z_EXPLAINED, Z_ANY = 4.0, 10.0
#: a value within this factor of the usual one is never refused
RATIO_LIMIT = 3.0
#: scale of the MAD for a normal distribution, 1 / Phi^-1(3/4) (Rousseeuw & Croux 1993)
MAD_SCALE = 1.4826
#: floor of the robust scale, decades (about 5 %; common practice, no source)
FLOOR_DECADES = 0.02
#: a slip "explains" a value that it brings within this many decades (or 3 robust SDs, the larger)
EXPLAINED_DECADES = math.log10(1.5)

_FACTORS = ((10.0, "ten times too large"), (100.0, "a hundred times too large (% for a fraction?)"),
            (1000.0, "a thousand times too large (mg for g, or N for kN?)"),
            (0.1, "ten times too small"), (0.01, "a hundred times too small (a fraction for %?)"),
            (0.001, "a thousand times too small (g for mg, or kN for N?)"))
#: the unit slip behind a factor, by the unit a column's name ends with (``sieve_um`` -> ``um``): a value in
#: mm in a column in um is a thousand times too small. Where a column's unit has an entry, only its slips are
#: named (a length's never "g for mg"); the words of _FACTORS serve the other columns.
_UNIT_SLIPS: dict[str, dict[float, str]] = {
    "um": {0.001: "mm for µm?", 1000.0: "nm for µm?"},
    "mm": {0.1: "cm for mm?", 0.001: "m for mm?", 1000.0: "µm for mm?"},
    "g": {1000.0: "mg for g?", 0.001: "kg for g?"},
    "mg": {0.001: "g for mg?", 1000.0: "µg for mg?"},
    "n": {0.001: "kN for N?"},
    "kn": {1000.0: "N for kN?"},
}
_SIZES = {10.0: "ten times too large", 100.0: "a hundred times too large", 1000.0: "a thousand times too large",
          0.1: "ten times too small", 0.01: "a hundred times too small", 0.001: "a thousand times too small"}


def _factor_words(column: str) -> tuple[tuple[float, str], ...]:
    """(factor, words) of each slip looked for in ``column``, in the order of :data:`_FACTORS`."""
    slips = _UNIT_SLIPS.get(column.rsplit("_", 1)[-1].lower())
    if slips is None:
        return _FACTORS
    return tuple((f, _SIZES[f] + (f" ({slips[f]})" if f in slips else "")) for f, _ in _FACTORS)


def robust_reference(lot_values: list[float]) -> tuple[float, float] | None:
    """(median, robust scale) of the base-10 logarithms of positive per-lot values, or None with too few lots."""
    logs = [math.log10(v) for v in lot_values if v is not None and math.isfinite(v) and v > 0]
    if len(logs) < MIN_HISTORY_LOTS:
        return None
    m = median(logs)
    mad = median(abs(v - m) for v in logs)
    return m, max(MAD_SCALE * mad, FLOOR_DECADES)


def likely_mistake(x: float, m: float, s: float, column: str, roll_width_mm: float | None = None) -> str | None:
    """The unit slip that brings ``x`` near the usual value (``m``, ``s`` on the log10 scale), in words, or None."""
    if x <= 0:
        return None
    # near the usual value, and at most a third as far from it as x itself: a slip explains most of the distance
    near = min(max(3 * s, EXPLAINED_DECADES), abs(math.log10(x) - m) / 3)
    if column == "roll_force_kn_per_cm" and roll_width_mm and roll_width_mm > 0:
        per_cm = x / (roll_width_mm / 10.0)
        if abs(math.log10(per_cm) - m) <= near:
            return total_force_words(roll_width_mm, per_cm, "as usual")
    for factor, words in _factor_words(column):
        if abs(math.log10(x / factor) - m) <= near:
            return f"{words}: {x:g} / {factor:g} = {x / factor:.4g} would be usual"
    return None


def total_force_words(roll_width_mm: float, per_cm: float, judged: str) -> str:
    """The hint of a total roll force in the kN/cm column, what it is per cm and why that fits (``judged``: "as
    usual", "within the bounds"); also the reader's, for a value above the column's bounds
    (:func:`linkage.read.cells.total_force_slip`)."""
    return (f"a total roll force in kN: divided by the roll width ({roll_width_mm:g} mm) it is {per_cm:.3g} kN/cm, "
            f"{judged}; map it in columns.toml with unit = \"kN\"")


def is_unusual(x: float, m: float, s: float, explained: bool) -> bool:
    """The rule of the module notes, for a value ``x`` against (``m``, ``s``) on the log10 scale."""
    if not math.isfinite(x) or x <= 0:
        return False
    d = abs(math.log10(x) - m)
    if d <= math.log10(RATIO_LIMIT):
        return False
    return d > Z_ANY * s or (explained and d > Z_EXPLAINED * s)


def per_lot_rows(df, column: str) -> dict[str, list[dict]]:
    """The positive values of ``column`` of a table, as rows by lot (what :func:`per_lot_medians` takes)."""
    out: dict[str, list[dict]] = {}
    for lot, v in zip(df["lot"].tolist(), df[column].tolist()):
        if isinstance(v, float) and math.isfinite(v) and v > 0:
            out.setdefault(lot, []).append({column: v})
    return out


def per_lot_medians(rows_by_lot: dict[str, list[dict]], column: str) -> list[float]:
    """One value per lot: the median of the lot's positive values of the column (a log scale has no place for
    0: the pan of a sieve stack, a friability of 0 %)."""
    out = []
    for rows in rows_by_lot.values():
        values = [r[column] for r in rows if isinstance(r.get(column), (int, float)) and not isinstance(
            r.get(column), bool) and r[column] > 0]
        if values:
            out.append(float(median(values)))
    return out


def history_note(product: str | None, n_lots: int) -> str:
    """What an ingest says of a product whose values were not judged for want of history: one line."""
    held = "no earlier lots" if n_lots == 0 else f"only {n_lots} earlier lot{'' if n_lots == 1 else 's'}"
    return (f"plausibility not judged for {'product ' + product if product else 'lots without a product'}: "
            f"{held} with values ({MIN_HISTORY_LOTS} needed)")


def unusual_values(ingest, history: dict[str, dict[str | None, dict[str, list[dict]]]],
                   product_of: dict[str, str | None],
                   notes: list[str] | None = None) -> tuple[list[Problem], list[dict]]:
    """Problems for every unusual value of the ingest, and the same as records (for the audit trail).

    ``history[table][product][lot]`` holds the stored rows of the product's
    recent lots; ``product_of`` maps each lot of the ingest to its product.
    ``notes``, when given, gets one :func:`history_note` per product of which no column was judged (fewer than
    :data:`MIN_HISTORY_LOTS` earlier lots with values).
    """
    problems: list[Problem] = []
    records: list[dict] = []
    judged_products: set = set()
    short: dict = {}  # product -> the most earlier lots with values of a column not judged
    process = ingest.tables.get("process")
    widths = {}
    if process is not None and "roll_width_mm" in process:
        widths = {lot: w for lot, w in zip(process["lot"].tolist(), process["roll_width_mm"].tolist())
                  if isinstance(w, float) and math.isfinite(w)}
    for table, columns in [*JUDGED.items(), *JUDGED_BY_LOT.items()]:
        df = ingest.tables.get(table)
        if df is None or len(df) == 0:
            continue
        label = ingest.sources.get(table, {}).get("file", table)
        rows = df.attrs.get("source_rows", list(range(2, len(df) + 2)))
        products = {product_of.get(lot) for lot in df["lot"].unique().tolist()}
        for column in columns:
            if column not in df:
                continue
            medians = {product: per_lot_medians(history.get(table, {}).get(product, {}), column)
                       for product in products}
            references = {product: robust_reference(values) for product, values in medians.items()}
            for product, ref in references.items():
                if ref is None:
                    short[product] = max(short.get(product, 0), len(medians[product]))
                else:
                    judged_products.add(product)
            if all(ref is None for ref in references.values()):
                continue  # nothing to compare with (an empty store, a new product)
            candidates = (_lot_candidates if table in JUDGED_BY_LOT else _row_candidates)(df, column, references,
                                                                                         product_of)
            by_lot = table in JUDGED_BY_LOT
            for k, lot, x in candidates:
                if not isinstance(x, float) or not math.isfinite(x):
                    continue
                product = product_of.get(lot)
                ref = references[product]
                if ref is None:
                    continue
                m, s = ref
                hint = likely_mistake(x, m, s, column, widths.get(lot))
                if not is_unusual(x, m, s, explained=hint is not None):
                    continue
                typical = 10.0 ** m
                ratio = f"{max(x / typical, typical / x):.3g} times {'that' if x > typical else 'smaller'}"
                if by_lot:
                    lot_rows = _lot_rows(df, column, lot, rows)
                    judged = (f"the median {column} of lot {lot!r} ({x:g}, of its {row_span(lot_rows)}; the stack "
                              "is judged as a whole, not row by row)")
                    what = f"the recent lots have a median {column} around {typical:.4g}, {judged} is {ratio}"
                else:
                    what = f"the recent lots have {column} around {typical:.4g}, this value is {ratio}"
                rule = (f"unusual for {'product ' + product if product else 'this store'}: {what}"
                        + (f"; it looks like {hint}" if hint else "; a unit mistake?")
                        + ". If it is right, ingest with --accept-unusual --reason TEXT")
                problems.append(Problem(label, rule, row=None if by_lot else rows[k], column=column, value=x))
                record = {"file": label, "row": rows[k], "lot": lot, "column": column, "value": x,
                          "typical": typical, "robust_sd_log10": s}
                if by_lot:  # row: the first of the lot's rows; value: their median, what was judged
                    record.update(row=lot_rows[0], judged="median of the lot's positive values", rows=lot_rows)
                records.append(record)
    if notes is not None:
        notes += [history_note(product, short[product]) for product in sorted(short, key=str)
                  if product not in judged_products]
    return problems, records


def _lot_rows(df, column: str, lot: str, rows) -> list[int]:
    """The sheet rows of a lot's positive values of ``column`` (those its median is taken of)."""
    return [rows[k] for k, (name, v) in enumerate(zip(df["lot"].tolist(), df[column].tolist()))
            if name == lot and isinstance(v, float) and math.isfinite(v) and v > 0]


#: decades of slack of the vectorised first pass (numpy's log10 and pandas' median may differ from math's and
#: statistics' in the last bit); the rule itself is then applied value by value to what passes
_SLACK = 1e-9


def _far(values, lots: list, references: dict, product_of: dict):
    """Which positive values are far enough from their product's reference that :func:`is_unusual` may hold
    (a necessary condition, vectorised)."""
    import numpy as np
    import pandas as pd

    # each lot's product, and each product's reference, looked up once (a lot without one: product None)
    codes, distinct = pd.factorize(pd.Series(lots, dtype=object), use_na_sentinel=False)
    of_lot = pd.Series(distinct, dtype=object).map(product_of)
    product_codes, products = pd.factorize(of_lot.where(of_lot.notna(), None), use_na_sentinel=False)
    refs = [references.get(None if product is None or (isinstance(product, float) and math.isnan(product)) else product)
            for product in products]
    m = np.array([np.nan if r is None else r[0] for r in refs] + [np.nan])[product_codes][codes]
    s = np.array([np.nan if r is None else r[1] for r in refs] + [np.nan])[product_codes][codes]
    x = np.asarray(values, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        d = np.abs(np.log10(np.where(x > 0, x, np.nan)) - m)
        return (d > math.log10(RATIO_LIMIT) - _SLACK) & (d > min(Z_ANY, Z_EXPLAINED) * s - _SLACK)


def _row_candidates(df, column: str, references: dict, product_of: dict) -> list[tuple[int, str, object]]:
    """(row index, lot, value) of every row that may be unusual, in row order."""
    if df[column].dtype.kind != "f":  # not a float column: every row, judged one by one
        return list(zip(range(len(df)), df["lot"].tolist(), df[column].tolist()))
    import numpy as np

    far = np.flatnonzero(_far(df[column].to_numpy(), df["lot"].to_numpy(dtype=object), references, product_of))
    return list(zip(far.tolist(), df["lot"].to_numpy(dtype=object)[far].tolist(),
                    df[column].to_numpy()[far].tolist()))


def _lot_candidates(df, column: str, references: dict, product_of: dict) -> list[tuple[int, str, object]]:
    """(first row of the lot, lot, median of the lot's positive values) of every lot that may be unusual, in
    order of the lots' first positive value."""
    import numpy as np

    lots = df["lot"].tolist()
    keep = None
    if df[column].dtype.kind == "f":
        v = df[column].to_numpy()
        positive = np.isfinite(v) & (v > 0)
        medians = df.loc[positive, ["lot", column]].groupby("lot", sort=False)[column].median()
        near = medians.index[~_far(medians.to_numpy(), medians.index.tolist(), references, product_of)]
        keep = ~df["lot"].isin(set(near.tolist())).to_numpy()
    firsts: dict[str, int] = {}
    for k, lot in enumerate(lots):
        firsts.setdefault(lot, k)
    by_lot = per_lot_rows(df if keep is None else df[keep], column)
    return [(firsts[lot], lot, m) for lot, m in zip(by_lot, per_lot_medians(by_lot, column))]


# --------------------------------------------------------------------------- without history

#: the smallest aperture of a test sieve of woven metal wire cloth [um]: ISO 3310-1:2016, clause 1 (Scope), test
#: sieves with apertures from 125 mm down to 20 um, following the series of ISO 565. Finer sieves are
#: electroformed sheets for fine powders (ISO 3310-3), not what a roller compactor's milled granules are sieved on:
#: mechanical sieving suits particles larger than about 75 um (USP <786> / Ph. Eur. 2.9.38, introduction)
SMALLEST_SIEVE_UM = 20.0
#: columns judged without history, by table: the apertures of a sieve analysis (a stack in mm for um)
JUDGED_WITHOUT_HISTORY: dict[str, tuple[str, ...]] = {"granules": ("sieve_um",)}


def sieve_apertures(df, label: str, header: str = "sieve_um", unit: str | None = None,
                    header_unit: str | None = None) -> tuple[list[Problem], list[dict]]:
    """Apertures no test sieve has, lot by lot, without history: the problems and the same as records (for the
    audit trail when they are taken deliberately).

    A positive aperture below :data:`SMALLEST_SIEVE_UM` is no woven-wire test sieve's; a stack written in mm (0.063
    to 1.4 for 63 to 1400 um) has every aperture below it, so a first ingest, which has no history to compare
    with (:func:`unusual_values`), catches the slip too. One problem per lot, naming the lot's rows below the
    limit as runs and, as the value, the median of their apertures (the whole stack's median when every aperture
    is below, as :func:`unusual_values` judges a stack). ``header`` is the column as the file names it, ``unit``
    the unit columns.toml reads it in (None: the template's, um) and ``header_unit`` a unit the header itself
    names (``Sieve (mm)``), for the hint. The pan (0) is never judged."""
    column = "sieve_um"
    if df is None or len(df) == 0 or column not in df:
        return [], []
    import numpy as np

    v = df[column].to_numpy(dtype=float, na_value=np.nan)
    if not ((v > 0) & (v < SMALLEST_SIEVE_UM)).any():
        return [], []  # the common case, decided on the whole column
    rows = df.attrs.get("source_rows", list(range(2, len(df) + 2)))
    positive: dict[str, list[int]] = {}
    below: dict[str, list[int]] = {}
    values = df[column].tolist()
    for k, (lot, v) in enumerate(zip(df["lot"].tolist(), values)):
        if not isinstance(lot, str) or not isinstance(v, float) or not math.isfinite(v) or v <= 0:
            continue
        positive.setdefault(lot, []).append(k)
        if v < SMALLEST_SIEVE_UM:
            below.setdefault(lot, []).append(k)
    problems: list[Problem] = []
    records: list[dict] = []
    for lot, ks in below.items():
        named = [float(values[k]) for k in ks]
        value = float(median(named))
        lot_rows = [rows[k] for k in ks]
        whole = len(ks) == len(positive[lot])
        if whole:
            judged = (f"the median {column} of lot {lot!r} ({value:g} µm, of its {row_span(lot_rows)}; the stack is "
                      "judged as a whole, not row by row) is below")
        elif len(ks) == 1:
            judged = f"lot {lot!r} has an aperture of {value:g} µm ({row_span(lot_rows)}), below"
        else:
            judged = (f"lot {lot!r} has {len(ks)} apertures of {min(named):g} to {max(named):g} µm (median "
                      f"{value:g}; {row_span(lot_rows)}), below")
        limit = f"{judged} {SMALLEST_SIEVE_UM:g} µm, the smallest aperture of a woven-wire test sieve (ISO 3310-1)"
        if unit is not None and unit != "um":  # converted on read: the unit the mapping gives is the one to check
            cause = (f"read as {unit} by columns.toml and converted to µm; check the unit it gives '{header}' "
                     f"(unit = \"{unit}\")")
        else:
            times = (f"× 1000 {'the stack' if whole else 'they'} would be {min(named) * 1000:g} to "
                     f"{max(named) * 1000:g} µm" if len(named) > 1 else f"× 1000 it would be {value * 1000:g} µm")
            if header_unit == "mm":
                mapped = "as um" if unit else "without a unit"
                fix = (f"the header '{header}' says mm, but columns.toml maps it {mapped}: map it with unit = "
                       f"\"mm\" ([granules.columns] \"{header}\" = {{ column = \"{column}\", unit = \"mm\" }})")
            elif unit is not None:
                fix = f"columns.toml reads '{header}' as um: if the file gives mm, map it with unit = \"mm\""
            else:
                fix = ("write the apertures in µm, or map the column in columns.toml with unit = \"mm\" "
                       f"([granules.columns] \"{header}\" = {{ column = \"{column}\", unit = \"mm\" }})")
            cause = f"it looks like a thousand times too small ({_UNIT_SLIPS['um'][0.001]}): {times}; {fix}"
        rule = f"no test sieve has so small an aperture: {limit}; {cause}. If it is right, ingest with " \
               "--accept-unusual --reason TEXT"
        problems.append(Problem(label, rule, row=None, column=header, value=value))
        records.append({"file": label, "row": lot_rows[0], "lot": lot, "column": column, "value": value,
                        "typical": None, "robust_sd_log10": None, "judged": (
                            "median of the lot's positive values" if whole else
                            f"median of the lot's apertures below {SMALLEST_SIEVE_UM:g} um"),
                        "rows": lot_rows, "limit": SMALLEST_SIEVE_UM})
    return problems, records
