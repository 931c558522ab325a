"""One row per lot: the raw tables joined by lot, with derived quantities.

The input is the dict of validated tables that :func:`linkage.read.read_folder`
or :meth:`linkage.store.LotStore.current_tables` returns; the output is the
assembled table whose columns :data:`linkage.schema.ASSEMBLED` lists. Every
derived number comes from a function of :mod:`linkage.physics`; this module
only groups rows by lot and calls them. The one exception is speed: the sieve
analyses of lots that share a sieve stack are computed all at once, by the
same equations in the same floating-point order (see ``_sieve_stacks``), since
calling the physics functions lot by lot made 100,000 lots take minutes.

Methods (stated here because they change numbers):

- ``ribbon_porosity`` is the mean over replicates of 1 − envelope/skeletal
  density, each replicate with its own skeletal density; ``ribbon_porosity_sd``
  is their sample SD (n − 1), NaN for a single replicate;
  ``ribbon_solid_fraction`` = 1 − ``ribbon_porosity``.
- Granule d-values are interpolated on the cumulative undersize curve,
  linearly in ln(size) between the bracketing apertures
  (:func:`linkage.physics.psd.percentile_size_um`, ``method="log"``). A d-value
  that falls below the finest aperture or above the coarsest is NaN, and the
  reason is written to the table's notes. Laser-diffraction d-values are used
  only for lots without a sieve analysis (``granule_size_source`` says which).
- ``fines_pct`` is the mass percent passing ``fines_cutoff_um`` (125 µm by
  default) on the same curve.
- ``rrsb_x_prime_um`` and ``rrsb_n`` are the least-squares RRSB fit of
  ln(−ln(1 − Q3)) on ln x over the apertures with 0 < Q3 < 100 %
  (:func:`linkage.physics.psd.fit_rrsb`), given with at least 3 such
  apertures.
- Tensile strength follows Fell & Newton (1970) for flat-faced tablets and
  Pitt, Newton & Stanley (1988) when a cup depth is given.
- ``weight_rsd_pct`` comes from individual tablet weights when the lot has
  them (sample SD over mean), otherwise from the tablets table; the value the
  lab reported stays in ``weight_rsd_reported_pct``. The acceptance value of
  weight variation (USP <905>) assumes an assay of 100 % of label claim and is
  given only for 10 or 30 units, the sample sizes the chapter defines.
- ``dissolution_pct`` comes from vessel data when the lot has them: each
  vessel's profile is interpolated linearly in time at the spec time point (no
  extrapolation), then averaged over vessels. The S1 verdict (USP <711>) needs
  Q, the spec's dissolution minimum, and is given where Q is known.
  Between two measured points the release is read off the straight line
  between them, vessel by vessel. Basis: the interpolation error theorem for a
  twice-differentiable profile F(t), |F(t) − line(t)| ≤ h²/8 · max|F''| over a
  gap of h minutes (any numerical-analysis text, e.g. Burden & Faires,
  *Numerical Analysis*, Thm 3.3; from memory). A cumulative release profile
  is monotone, so the value always lies between the two measured ones; on a
  concave stretch (first-order-like, Weibull β ≤ 1, Langenbucher 1972) the
  line reads low, on the convex onset of a sigmoid profile high. Measure the
  time point itself when it decides a release. A lot whose vessels do not
  reach the time point has no ``dissolution_pct`` (the reported lot value
  belongs to another time point), and the notes say so;
  :func:`check_dissolution_time` refuses a time point no vessel profile
  reaches.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from linkage.exceptions import InputError, Problem
from linkage.physics import pharmacopeia, psd, tablet
from linkage.physics.porosity import porosity as _porosity
from linkage.schema import DEFAULT_DISSOLUTION_TIME_MIN, DEFAULT_FINES_CUTOFF_UM, TABLES

#: order of the leading columns; every other process column follows them
_LEADING = [
    "lot", "product", "compactor", "manufactured_at",
    "roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm", "screw_speed_rpm", "mill_screen_mm",
    "compression_force_kn",
]


def assemble(
    tables: dict[str, pd.DataFrame],
    *,
    fines_cutoff_um: float = DEFAULT_FINES_CUTOFF_UM,
    dissolution_time_min: float = DEFAULT_DISSOLUTION_TIME_MIN,
    dissolution_q_pct: float | None = None,
) -> pd.DataFrame:
    """Join the raw tables into one row per lot with the derived quantities.

    Parameters
    ----------
    tables : dict of DataFrames keyed by table name (``process`` required).
    fines_cutoff_um : size below which granules count as fines [µm].
    dissolution_time_min : time point of ``dissolution_pct`` [min].
    dissolution_q_pct : Q of the dissolution specification [% label claim],
        for the S1 verdict; ``None`` leaves the verdict empty.

    Returns
    -------
    DataFrame, one row per lot, in time order (``manufactured_at``) when it is
    known, else by lot. ``table.attrs["notes"]`` lists every value that could
    not be derived, with the lot and the reason.
    """
    from linkage.read import bulk

    with bulk():  # Python's cyclic collector paused while the per-lot rows are built, as when reading tables
        return _assemble(tables, fines_cutoff_um, dissolution_time_min, dissolution_q_pct)


def _assemble(tables: dict[str, pd.DataFrame], fines_cutoff_um: float, dissolution_time_min: float,
              dissolution_q_pct: float | None) -> pd.DataFrame:
    if "process" not in tables or tables["process"].empty:
        raise InputError([Problem(file="process", rule="the process table is required and has no rows")])
    process = tables["process"].copy()
    process["lot"] = process["lot"].astype(str)
    _refuse_orphans(tables, set(process["lot"].tolist()))
    notes: list[str] = []

    out = process.set_index("lot", drop=False)
    parts = {
        "ribbon": _ribbon(tables.get("ribbon")),
        "granules": _granules(tables.get("granules"), tables.get("granules_laser"), fines_cutoff_um, notes),
        "tablets": _tablets(tables.get("tablets"), tables.get("tablet_weights"), notes),
        "dissolution": _dissolution(tables.get("dissolution"), dissolution_time_min, dissolution_q_pct, notes),
    }
    source = {c: "process" for c in out.columns}
    clashes = []
    for name, part in parts.items():
        if part is None or part.empty:
            continue
        clashes += [Problem(file=name, column=c, rule=f"the column '{c}' comes from both {source[c]} and {name} "
                                                      "(an extra column of the same name, or a quantity linkage "
                                                      "derives); rename one of them")
                    for c in part.columns if c in source]
        source.update({c: name for c in part.columns})
        if not clashes:
            out = out.join(part, how="left")
    if clashes:
        raise InputError(clashes)
    # vessel results replace the reported lot mean where both exist
    if "dissolution_from_vessels_pct" in out:
        reported = out["dissolution_pct"] if "dissolution_pct" in out else pd.Series(np.nan, index=out.index)
        out["dissolution_reported_pct"] = reported
        out["dissolution_pct"] = out["dissolution_from_vessels_pct"].where(
            out["dissolution_from_vessels_pct"].notna(), reported
        )
        # vessel data that do not reach the time point: no value rather than one of another time point
        out.loc[out["dissolution_vessels"] == 0, "dissolution_pct"] = np.nan
        out = out.drop(columns="dissolution_from_vessels_pct")

    leading = [c for c in _LEADING if c in out.columns]
    out = out[leading + [c for c in out.columns if c not in leading]].reset_index(drop=True)
    if "manufactured_at" in out and out["manufactured_at"].notna().any():
        out = out.sort_values(["manufactured_at", "lot"], kind="stable", na_position="last")
    else:
        out = out.sort_values("lot", kind="stable")
    out = out.reset_index(drop=True)
    out.attrs["notes"] = notes
    out.attrs["fines_cutoff_um"] = float(fines_cutoff_um)
    out.attrs["dissolution_time_min"] = float(dissolution_time_min)
    # the process table's columns the template does not name (raw-material attributes; issue 19, train --materials)
    out.attrs["process_extra_columns"] = [c for c in process.columns if c not in TABLES["process"].names]
    return out


def check_dissolution_time(tables: dict[str, pd.DataFrame], time_min: float) -> None:
    """Refuse a dissolution time point that no vessel profile reaches.

    With vessel data (the ``dissolution`` table), a time point is modelled
    when at least one vessel has results at or on both sides of it (then
    :func:`assemble` interpolates linearly); one before the first or after
    the last measured point of every vessel would need extrapolation, which
    linkage does not do. Without vessel data there is nothing to check: the
    tablets table's ``dissolution_pct`` is taken as measured at the spec's
    time point (the template's rule). Raises :class:`InputError` (exit 2)
    naming the measured time points.
    """
    vessels = tables.get("dissolution")
    if vessels is None or vessels.empty:
        return
    have = vessels[vessels["released_pct"].notna()]
    if have.empty:
        return
    span = have.groupby([have["lot"].astype(str), have["vessel"].astype(str)])["time_min"].agg(["min", "max"])
    t = float(time_min)
    if ((span["min"] <= t) & (span["max"] >= t)).any():
        return
    measured = sorted({float(v) for v in have["time_min"]})
    shown = ", ".join(f"{v:g}" for v in measured[:12]) + (" ..." if len(measured) > 12 else "")
    raise InputError([Problem(
        file="dissolution", column="time_min", value=t,
        rule=f"no vessel profile reaches {t:g} min (measured time points: {shown} min); linkage interpolates "
             "between measured points and does not extrapolate beyond them: choose a time point inside the "
             "measured range")])


def _refuse_orphans(tables: dict[str, pd.DataFrame], known: set[str]) -> None:
    problems = []
    for name, df in tables.items():
        if name == "process" or df is None or df.empty or "lot" not in df:
            continue
        for lot in sorted(set(df["lot"].astype(str).unique().tolist()) - known):
            problems.append(Problem(file=name, column="lot", value=lot,
                                    rule="results for a lot with no process record"))
    if problems:
        raise InputError(problems)


def _ribbon(ribbon: pd.DataFrame | None) -> pd.DataFrame | None:
    if ribbon is None or ribbon.empty:
        return None
    df = ribbon.copy()
    df["lot"] = df["lot"].astype(str)
    df["_porosity"] = _porosity(df["envelope_density_g_cm3"].to_numpy(float),
                                df["skeletal_density_g_cm3"].to_numpy(float))
    g = df.groupby("lot", sort=False)["_porosity"]
    out = pd.DataFrame({
        "ribbon_porosity": g.mean(),
        "ribbon_porosity_sd": g.std(ddof=1),
        "ribbon_samples": g.count().astype(float),
    })
    out["ribbon_solid_fraction"] = 1.0 - out["ribbon_porosity"]
    bend = ["ribbon_break_force_n", "ribbon_span_mm", "ribbon_width_mm", "ribbon_thickness_mm"]
    if all(c in df for c in bend):
        df["_ribbon_ts"] = tablet.ribbon_tensile_strength_mpa(*(df[c].to_numpy(float) for c in bend))
        out["ribbon_tensile_strength_mpa"] = df.groupby("lot", sort=False)["_ribbon_ts"].mean()
    return out


def _by_lot(lots: pd.Series):
    """Rows grouped by lot as ``groupby(lot, sort=False)`` groups them: lots
    in order of first appearance, each with its row positions in table order
    (rows without a lot left out). Returns (lot names, row order, bounds):
    the rows of lot k are ``order[bounds[k]:bounds[k + 1]]``."""
    codes, names = pd.factorize(lots)
    order = np.argsort(codes, kind="stable")
    order = order[codes[order] >= 0]
    counts = np.bincount(codes[codes >= 0], minlength=len(names))
    return [str(v) for v in names], order, np.concatenate([[0], np.cumsum(counts)])


def _granules(sieve: pd.DataFrame | None, laser: pd.DataFrame | None, cutoff_um: float,
              notes: list[str]) -> pd.DataFrame | None:
    rows = {}
    if sieve is not None and not sieve.empty:
        names, order, bounds = _by_lot(sieve["lot"].astype(str))
        sizes_all = sieve["sieve_um"].to_numpy(float)[order]
        masses_all = sieve["retained_g"].to_numpy(float)[order]
        fast = _sieve_stacks(names, sizes_all, masses_all, bounds, cutoff_um)
        for k, lot in enumerate(names):
            if lot in fast:
                rows[lot], lot_notes = fast[lot]
                notes.extend(lot_notes)
                continue
            sizes = sizes_all[bounds[k]:bounds[k + 1]]
            masses = masses_all[bounds[k]:bounds[k + 1]]
            if np.isnan(masses).any():
                notes.append(f"lot {lot}: a sieve fraction has no mass; granule sizes not derived")
                continue
            aperture, undersize = psd.cumulative_undersize_pct(sizes, masses)
            d = {}
            for q in (10, 50, 90):
                d[q] = float(psd.percentile_size_um(aperture, undersize, q, method="log"))
                if np.isnan(d[q]):
                    notes.append(_outside_note(lot, q, aperture, undersize))
            row = {
                "granule_d10_um": d[10], "granule_d50_um": d[50], "granule_d90_um": d[90],
                "granule_span": float(psd.span(d[10], d[50], d[90])),
                "granule_size_source": "sieve",
                "fines_pct": float(psd.fines_pct(sizes, masses, cutoff_um=cutoff_um)),
            }
            inside = (undersize > 0) & (undersize < 100)
            if inside.sum() >= 3:
                fit = psd.fit_rrsb(aperture, undersize)
                row["rrsb_x_prime_um"], row["rrsb_n"] = fit["x_prime_um"], fit["n"]
            else:
                notes.append(f"lot {lot}: fewer than 3 points inside (0, 100)% undersize; no RRSB fit")
            rows[lot] = row
    if laser is not None and not laser.empty:
        for rec in laser.itertuples(index=False):
            lot = str(rec.lot)
            if lot in rows:
                rows[lot].update(laser_d10_um=rec.d10_um, laser_d50_um=rec.d50_um, laser_d90_um=rec.d90_um)
                continue
            rows[lot] = {
                "granule_d10_um": rec.d10_um, "granule_d50_um": rec.d50_um, "granule_d90_um": rec.d90_um,
                "granule_span": float(psd.span(rec.d10_um, rec.d50_um, rec.d90_um)),
                "granule_size_source": "laser",
                "laser_d10_um": rec.d10_um, "laser_d50_um": rec.d50_um, "laser_d90_um": rec.d90_um,
            }
    if not rows:
        return None
    # what DataFrame.from_dict(rows, orient="index") makes (columns in order of first appearance, missing
    # cells NaN), from the list of rows: the same frame, without building it column by column in Python
    return pd.DataFrame(list(rows.values()), index=list(rows))


def _outside_note(lot, q, aperture, undersize) -> str:
    """``aperture`` and ``undersize``: the stack's, finest first (only the first and last items are quoted)."""
    return (f"lot {lot}: d{q} lies outside the sieve stack "
            f"(undersize {undersize[0]:.1f}% at {aperture[0]:g} um, "
            f"{undersize[-1]:.1f}% at {aperture[-1]:g} um)")


def _sieve_stacks(names, sizes_all, masses_all, bounds, cutoff_um) -> dict[str, tuple]:
    """Sieve analyses of the lots that share a sieve stack (the same
    apertures in the same row order), all at once: lot -> (row, notes).

    The equations of the per-lot path through :mod:`linkage.physics.psd`
    (cumulative undersize, log-interpolated d-values, span, fines) on the
    whole lots × apertures matrix, each operation in the same floating-point
    order, so that both paths give the same numbers to the last bit (the RRSB
    fits by the same LAPACK solver, many at once: see ``_rrsb_rows``). Lots
    outside the common case (a missing or negative mass, a zero total,
    repeated apertures, a stack no other lot has) are left to the per-lot
    path, which reports or refuses them as it always did.
    """
    out: dict[str, tuple] = {}
    if not np.all(np.asarray(cutoff_um, dtype=float) > 0):
        return out  # the per-lot path refuses it
    counts = np.diff(bounds)
    for k_rows in np.unique(counts):
        lots = np.flatnonzero(counts == k_rows)
        if k_rows < 2 or len(lots) < 2:
            continue
        idx = bounds[lots][:, None] + np.arange(k_rows)[None, :]
        S, M = sizes_all[idx], masses_all[idx]
        for x, members in _same_rows(S):
            if np.isnan(x).any() or np.any(x < 0) or len(np.unique(x)) != len(x) or not np.any(x > 0):
                continue
            m = M[members]
            total = m.sum(axis=1)
            ok = np.all(np.isfinite(m) & (m >= 0), axis=1) & (total > 0)
            if ok.sum() < 2:
                continue
            members, m, total = members[ok], m[ok], total[ok]
            order = np.argsort(x)[::-1]  # coarsest first, as psd.cumulative_undersize_pct
            x_desc = x[order]
            cum = np.cumsum(m[:, order], axis=1)
            under = np.clip(100.0 * (total[:, None] - cum) / total[:, None], 0.0, 100.0)
            keep = x_desc > 0
            aperture = x_desc[keep][::-1]
            U = np.ascontiguousarray(under[:, keep][:, ::-1])
            t = np.log(aperture)
            d = {q: _percentile_rows(aperture, t, U, float(q)) for q in (10, 50, 90)}
            fines = _undersize_at_rows(aperture, t, U, float(cutoff_um))
            valid = ~((d[50] <= 0) | (d[10] < 0) | (d[10] > d[50]) | (d[50] > d[90]))
            span = (d[90] - d[10]) / d[50]
            inside = (U > 0) & (U < 100)
            fit = inside.sum(axis=1) >= 3
            x_prime, n_rrsb = _rrsb_rows(aperture, U, inside, fit)
            # as Python floats and bools once, not element by element
            d10, d50, d90 = d[10].tolist(), d[50].tolist(), d[90].tolist()
            outside = {q: np.isnan(d[q]).tolist() for q in (10, 50, 90)}
            span, fines, x_prime, n_rrsb = span.tolist(), fines.tolist(), x_prime.tolist(), n_rrsb.tolist()
            ends = (float(aperture[0]), float(aperture[-1]))  # what a note quotes, as Python floats (the same
            u_ends = list(zip(U[:, 0].tolist(), U[:, -1].tolist()))  # text; numpy scalars format slowly)
            for r, (member, is_valid, has_fit) in enumerate(zip(members.tolist(), valid.tolist(), fit.tolist())):
                if not is_valid:
                    continue  # psd.span refuses it: the per-lot path raises the same error
                lot = names[lots[member]]
                lot_notes = [_outside_note(lot, q, ends, u_ends[r]) for q in (10, 50, 90) if outside[q][r]]
                row = {
                    "granule_d10_um": d10[r], "granule_d50_um": d50[r], "granule_d90_um": d90[r],
                    "granule_span": span[r], "granule_size_source": "sieve", "fines_pct": fines[r],
                }
                if has_fit:
                    row["rrsb_x_prime_um"], row["rrsb_n"] = x_prime[r], n_rrsb[r]
                else:
                    lot_notes.append(f"lot {lot}: fewer than 3 points inside (0, 100)% undersize; no RRSB fit")
                out[lot] = (row, lot_notes)
    return out


def _same_rows(S: np.ndarray) -> list[tuple[np.ndarray, np.ndarray]]:
    """Groups of equal rows of ``S`` (as ``np.unique(S, axis=0)`` groups
    them; rows with a NaN left out): (row, positions of its rows, ascending).
    A comparison with each distinct row while there are few (most lots share
    one sieve stack), a sort when there are many."""
    rest = np.flatnonzero(~np.isnan(S).any(axis=1)) if S.dtype.kind == "f" else np.arange(len(S))
    groups = []
    while rest.size:
        if len(groups) == 16:
            stacks, which = np.unique(S[rest], axis=0, return_inverse=True)
            which = which.reshape(-1)
            return groups + [(x, rest[which == s]) for s, x in enumerate(stacks)]
        x = S[rest[0]].copy()
        same = (S[rest] == x).all(axis=1)
        groups.append((x, rest[same]))
        rest = rest[~same]
    return groups


def _percentile_rows(x, t, U, q: float) -> np.ndarray:
    """psd.percentile_size_um(x, U[r], q, method="log") for every row r."""
    n, k = U.shape
    i = np.sum(U < q, axis=1)  # first aperture whose undersize reaches q (searchsorted, side="left")
    res = np.full(n, np.nan)
    first = (i == 0) & (U[:, 0] == q)
    res[first] = x[0]
    mid = np.flatnonzero((i > 0) & (i < k))
    j = i[mid]
    qa, qb = U[mid, j - 1], U[mid, j]
    on = qb == q  # exactly on an aperture
    res[mid[on]] = x[j[on]]
    mid, j, qa, qb = mid[~on], j[~on], qa[~on], qb[~on]
    ti = t[j - 1] + (q - qa) / (qb - qa) * (t[j] - t[j - 1])
    res[mid] = np.minimum(np.maximum(np.exp(ti), x[j - 1]), x[j])
    return res


def _undersize_at_rows(x, t, U, size: float) -> np.ndarray:
    """psd.undersize_at_size_pct(x, U[r], size, method="log") for every row r."""
    if size < x[0]:
        return np.where(U[:, 0] == 0.0, 0.0, np.nan)
    if size > x[-1]:
        return np.where(U[:, -1] == 100.0, 100.0, np.nan)
    i = int(np.searchsorted(x, size, side="left"))
    if x[i] == size:
        return U[:, i].copy()
    ts = np.log(np.float64(size))
    return U[:, i - 1] + (U[:, i] - U[:, i - 1]) * (ts - t[i - 1]) / (t[i] - t[i - 1])


def _rrsb_rows(x, U, inside, fit):
    """RRSB x' and n of every row with ``fit``, as psd.fit_rrsb(x, U[r])
    computes them: least squares of v = ln(−ln(1 − Q3)) on u = ln x over the
    points inside (0, 100) %, by LAPACK's SVD solver. The rows that use the
    same points are solved in one call of numpy's least-squares kernel, which
    solves each stacked problem exactly as ``np.linalg.lstsq`` solves one;
    without that kernel, row by row through psd.fit_rrsb."""
    n = U.shape[0]
    x_prime, slope = np.full(n, np.nan), np.full(n, np.nan)
    rows = np.flatnonzero(fit)
    if rows.size == 0:
        return x_prime, slope
    try:
        from numpy.linalg import _umath_linalg
        kernel = _umath_linalg.lstsq
    except (ImportError, AttributeError):
        kernel = None
    for use, at in _same_rows(inside[rows]):
        members = rows[at]
        if kernel is None:
            for r in members:
                res = psd.fit_rrsb(x, U[r])
                x_prime[r], slope[r] = res["x_prime_um"], res["n"]
            continue
        u = np.log(x[use])
        q = U[np.ix_(members, np.flatnonzero(use))] / 100.0
        v = np.log(-np.log1p(-q))  # ln(-ln(1 - Q3)), as psd.fit_rrsb
        design = np.column_stack([u, np.ones_like(u)])
        m = design.shape[0]
        rcond = np.finfo(float).eps * max(2, m)  # np.linalg.lstsq's rcond=None
        with np.errstate(over="ignore", divide="ignore", under="ignore", invalid="ignore"):
            coef = kernel(np.broadcast_to(design, (len(members), m, 2)), v[:, :, None], rcond,
                          signature="ddd->ddid")[0][:, :, 0]
            slope[members] = coef[:, 0]
            x_prime[members] = np.exp(-coef[:, 1] / coef[:, 0])  # ln x' = -b / n
    return x_prime, slope


def _tablets(tablets: pd.DataFrame | None, weights: pd.DataFrame | None,
             notes: list[str]) -> pd.DataFrame | None:
    out = None
    if tablets is not None and not tablets.empty:
        df = tablets.copy()
        df["lot"] = df["lot"].astype(str)
        out = df.set_index("lot")
        if {"breaking_force_n", "diameter_mm", "thickness_mm"} <= set(out.columns):
            cup = out["cup_depth_mm"].to_numpy(float) if "cup_depth_mm" in out else np.zeros(len(out))
            out["tensile_strength_mpa"] = tablet.tensile_strength_mpa(
                out["breaking_force_n"].to_numpy(float), out["diameter_mm"].to_numpy(float),
                out["thickness_mm"].to_numpy(float), cup)
            out["tensile_strength_method"] = tablet.tensile_strength_method(cup)
        if "weight_rsd_pct" in out:
            out["weight_rsd_reported_pct"] = out["weight_rsd_pct"]
    if weights is not None and not weights.empty:
        rows = {}
        names, order, bounds = _by_lot(weights["lot"].astype(str))
        all_w = weights["weight_mg"].to_numpy(float)[order]
        for k, lot in enumerate(names):
            w = all_w[bounds[k]:bounds[k + 1]]
            row = {"weight_units": float(len(w)), "weight_rsd_from_units_pct": float(pharmacopeia.relative_sd_pct(w))}
            if len(w) in (10, 30):
                contents = pharmacopeia.weight_variation_contents_pct(w, assay_pct=100.0)
                row["weight_acceptance_value"] = float(pharmacopeia.acceptance_value(contents)["av"])
            else:
                notes.append(f"lot {lot}: {len(w)} tablet weights; the acceptance value is defined "
                             "for 10 or 30 units, so none was computed")
            rows[lot] = row
        units = pd.DataFrame.from_dict(rows, orient="index")
        out = units if out is None else out.join(units, how="outer")
        reported = out["weight_rsd_pct"] if "weight_rsd_pct" in out else pd.Series(np.nan, index=out.index)
        out["weight_rsd_pct"] = out["weight_rsd_from_units_pct"].where(
            out["weight_rsd_from_units_pct"].notna(), reported)
        out = out.drop(columns="weight_rsd_from_units_pct")
    return out


def _dissolution(vessels: pd.DataFrame | None, time_min: float, q_pct: float | None,
                 notes: list[str]) -> pd.DataFrame | None:
    if vessels is None or vessels.empty:
        return None
    rows = {}
    # lots in order of first appearance, and in each lot its vessels in order of first appearance
    # (as groupby(lot, sort=False) then groupby(vessel, sort=False)), each vessel's rows in table order
    lot_code, names = pd.factorize(vessels["lot"].astype(str))
    vessel_code, vessel_names = pd.factorize(vessels["vessel"].astype(str))
    ok = np.flatnonzero((lot_code >= 0) & (vessel_code >= 0))
    pair_code, pairs = pd.factorize(lot_code[ok].astype(np.int64) * (len(vessel_names) + 1) + vessel_code[ok])
    by_pair = ok[np.argsort(pair_code, kind="stable")]
    pair_bounds = np.concatenate([[0], np.cumsum(np.bincount(pair_code, minlength=len(pairs)))])
    pair_lot = pairs // (len(vessel_names) + 1)
    pair_vessel = pairs % (len(vessel_names) + 1)
    pairs_of_lot = np.argsort(pair_lot, kind="stable")  # pair codes grouped by lot, first appearance within
    lot_bounds = np.concatenate([[0], np.cumsum(np.bincount(pair_lot, minlength=len(names)))])
    times = vessels["time_min"].to_numpy(float)
    results = vessels["released_pct"].to_numpy(float)
    for k, lot in enumerate(str(v) for v in names):
        released = []
        for p in pairs_of_lot[lot_bounds[k]:lot_bounds[k + 1]]:
            vessel = vessel_names[pair_vessel[p]]
            idx = by_pair[pair_bounds[p]:pair_bounds[p + 1]]
            t, r = times[idx], results[idx]
            have = ~np.isnan(r)  # as dropna(subset=["released_pct"]), then in time order
            t, r = t[have], r[have]
            by_time = np.argsort(t, kind="stable")
            t, r = t[by_time], r[by_time]
            if len(t) == 0 or time_min < t[0] or time_min > t[-1]:
                notes.append(f"lot {lot}, vessel {vessel}: no result at or around {time_min:g} min")
                continue
            released.append(float(np.interp(time_min, t, r)))  # linear between the measured points around it
        if not released:
            # the lot has vessel data, but none at this time point: its reported lot value (another time
            # point) must not stand in for it
            notes.append(f"lot {lot}: no vessel reaches {time_min:g} min; dissolution_pct left empty, not "
                         "extrapolated")
            rows[lot] = {"dissolution_from_vessels_pct": np.nan, "dissolution_sd_pct": np.nan,
                         "dissolution_vessels": 0.0}
            continue
        released = np.asarray(released)
        row = {
            "dissolution_from_vessels_pct": float(released.mean()),
            "dissolution_sd_pct": float(released.std(ddof=1)) if len(released) > 1 else np.nan,
            "dissolution_vessels": float(len(released)),
        }
        if q_pct is not None and len(released) in (6, 12, 24):
            row["dissolution_s1_pass"] = bool(pharmacopeia.dissolution_s1_pass(released[:6], q_pct))
            verdict = pharmacopeia.dissolution_stage(released, q_pct)
            row["dissolution_stage_verdict"] = f"{verdict['stage']} {'pass' if verdict['passed'] else 'fail'}"
        rows[lot] = row
    return pd.DataFrame.from_dict(rows, orient="index") if rows else None
