"""Rules over whole rows of a table: unique keys and the schema's row rules."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from linkage.exceptions import Problem
from linkage.schema import Table



def _key_problems(df, tdef: Table, label, sheet_rows, headers, bad) -> list[Problem]:
    """A key repeated in a file (the row of its first writing named). The common case, every key given and none
    repeated, is decided on whole columns (pandas hashes them; 0.0 and -0.0 are one key there as in Python)."""
    key = list(tdef.key)
    if not bad and not df[key].isna().to_numpy().any() and not df.duplicated(subset=key).any():
        return []
    problems = []
    first: dict[tuple, int] = {}
    for k, key in enumerate(zip(*(df[c].tolist() for c in tdef.key))):
        if any((k, c) in bad for c in tdef.key) or any(_nan(v) for v in key):
            continue
        if key in first:
            names = ", ".join(tdef.key)
            shown = ", ".join(_fmt(v) for v in key)
            what = "lot row" if tdef.key == ("lot",) else "row for this key"
            problems.append(Problem(label, f"duplicate {what}: ({names}) = ({shown}) is already on row "
                                           f"{sheet_rows[first[key]]}; one row is expected",
                                    row=sheet_rows[k], column=headers.get(tdef.key[-1], tdef.key[-1]),
                                    value=key[-1] if len(key) > 1 else key[0]))
        else:
            first[key] = k
    return problems


def _nan(v) -> bool:
    return v is None or (isinstance(v, float) and math.isnan(v))


def _fmt(v) -> str:
    return f"{v:g}" if isinstance(v, float) else str(v)


def _rule_problems(df, tdef: Table, label, sheet_rows, headers, bad) -> list[Problem]:
    problems = []
    for rule in tdef.rules:
        if rule in ROW_RULES_HOLD and ROW_RULES_HOLD[rule](df):
            continue  # no row breaks it (checked on whole columns); else the row-by-row check says where
        check = ROW_RULES[rule]
        for k, col, value, text in check(df, bad):
            row = sheet_rows[k] if k is not None else None
            value = value.item() if hasattr(value, "item") else value
            problems.append(Problem(label, f"{text} (rule: {rule})", row=row, column=headers.get(col, col),
                                    value=value))
    return problems


def _usable(df, bad, k, *cols) -> bool:
    return all((k, c) not in bad and not _nan(df[c].iloc[k]) for c in cols)


def _rule_density(df, bad):
    env, ske = "envelope_density_g_cm3", "skeletal_density_g_cm3"
    for k in range(len(df)):
        if _usable(df, bad, k, env, ske) and df[env].iloc[k] > df[ske].iloc[k]:
            e, s = df[env].iloc[k], df[ske].iloc[k]
            yield k, env, e, f"envelope density {e:g} g/cm3 is above the skeletal density {s:g} g/cm3"


def _rule_sieve_sum(df, bad):
    totals: dict[str, float] = {}
    first: dict[str, int] = {}
    for k, lot in enumerate(df["lot"].tolist()):
        if _nan(lot):
            continue
        first.setdefault(lot, k)
        if _usable(df, bad, k, "retained_g"):
            totals[lot] = totals.get(lot, 0.0) + df["retained_g"].iloc[k]
        elif (k, "retained_g") in bad:
            totals[lot] = math.nan
    for lot, total in totals.items():
        if total == 0:
            yield first[lot], "retained_g", 0.0, f"lot {lot!r}: the retained masses sum to 0 g"


def _rule_d_order(df, bad):
    cols = ("d10_um", "d50_um", "d90_um")
    for k in range(len(df)):
        if _usable(df, bad, k, *cols):
            d10, d50, d90 = (df[c].iloc[k] for c in cols)
            if not d10 <= d50 <= d90:
                col = "d10_um" if d10 > d50 else "d90_um"
                yield k, col, df[col].iloc[k], f"d10 {d10:g}, d50 {d50:g}, d90 {d90:g} um are not in order"


def _rule_cup_depth(df, bad):
    for k in range(len(df)):
        if _usable(df, bad, k, "cup_depth_mm", "thickness_mm"):
            c, t = df["cup_depth_mm"].iloc[k], df["thickness_mm"].iloc[k]
            if not 2 * c < t:
                yield k, "cup_depth_mm", c, f"two cups of {c:g} mm do not fit in a tablet {t:g} mm thick"


#: schema rule text -> checker yielding (row index, column, value, message).
#: Every rule named in ``schema.TABLES`` has one (a test checks this).
ROW_RULES = {
    "envelope_density_g_cm3 <= skeletal_density_g_cm3": _rule_density,
    "each lot's retained masses sum to more than 0 g": _rule_sieve_sum,
    "d10_um <= d50_um <= d90_um": _rule_d_order,
    "2 * cup_depth_mm < thickness_mm": _rule_cup_depth,
}


def _floats(df, *cols) -> list[np.ndarray]:
    return [df[c].to_numpy(dtype=float, na_value=np.nan) for c in cols]


def _density_holds(df) -> bool:
    env, ske = _floats(df, "envelope_density_g_cm3", "skeletal_density_g_cm3")
    return not np.any(env > ske)  # NaN compares False, as a missing value breaks no rule


def _sieve_sum_holds(df) -> bool:
    """Every lot with a retained mass has one above 0 g: masses passed the
    bounds (>= 0), so a zero sum means all zero."""
    lots = df["lot"]
    known = lots.notna().to_numpy()
    codes, _ = pd.factorize(lots[known])
    mass = df["retained_g"].to_numpy(dtype=float, na_value=np.nan)[known]
    if np.any(mass < 0):
        return False
    have = np.bincount(codes, weights=~np.isnan(mass), minlength=codes.max(initial=-1) + 1)
    positive = np.bincount(codes, weights=mass > 0, minlength=codes.max(initial=-1) + 1)
    return not np.any((have > 0) & (positive == 0))


def _d_order_holds(df) -> bool:
    d10, d50, d90 = _floats(df, "d10_um", "d50_um", "d90_um")
    known = ~(np.isnan(d10) | np.isnan(d50) | np.isnan(d90))
    return bool(np.all((d10[known] <= d50[known]) & (d50[known] <= d90[known])))


def _cup_depth_holds(df) -> bool:
    cup, thick = _floats(df, "cup_depth_mm", "thickness_mm")
    known = ~(np.isnan(cup) | np.isnan(thick))
    return bool(np.all(2 * cup[known] < thick[known]))


#: schema rule text -> True when no row breaks the rule, from whole columns
#: (a fast pre-check; where it is not True the row checks of ROW_RULES run)
ROW_RULES_HOLD = {
    "envelope_density_g_cm3 <= skeletal_density_g_cm3": _density_holds,
    "each lot's retained masses sum to more than 0 g": _sieve_sum_holds,
    "d10_um <= d50_um <= d90_um": _d_order_holds,
    "2 * cup_depth_mm < thickness_mm": _cup_depth_holds,
}


def _sorted(problems: list[Problem]) -> list[Problem]:
    return sorted(problems, key=lambda p: (p.file, p.row if p.row is not None else 0))
