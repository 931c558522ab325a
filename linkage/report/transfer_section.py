"""The report's section on transfer between compactors (Johanson rolling theory).

Fits the ribbon physics (:func:`linkage.decide.transfer.fit_ribbon_physics`)
to the assembled lots of every compactor, draws each lot's porosity against
its specific roll force with the fitted curve of each compactor's rolls, and
tabulates the specific roll force that gives the porosity window's edges
(or the median porosity) on each compactor of the lots and, as an
illustration only, on an example larger compactor that nobody stated
(:data:`SCALE_UP_ROLLS`); the section gives the ``linkage transfer`` command
that answers for the user's own rolls. The fit is the section's own, on
every lot of the report's table with the four columns it needs, and says how
many of them the model was trained on.
"""

from __future__ import annotations

from functools import partial

import numpy as np

from linkage.decide.transfer import LEAVES_OUT

__all__ = ["EXAMPLE_LABEL", "SCALE_UP_ROLLS", "transfer_section"]

#: an illustrative larger compactor the report transfers to besides the lots' own compactors: (diameter, width)
#: [mm]. Round numbers chosen here, not rolls a user stated (no source); the section labels its rows so and
#: points to ``linkage transfer`` for the user's own rolls
SCALE_UP_ROLLS = (400.0, 150.0)
#: the label of the illustrative rows in the section's table
EXAMPLE_LABEL = "illustrative example (not your rolls)"

_FORCE, _GAP, _DIAMETER, _POROSITY = "roll_force_kn_per_cm", "roll_gap_mm", "roll_diameter_mm", "ribbon_porosity"


def _targets(window, table) -> tuple[list[float], str]:
    if window is not None and getattr(window, "found", False):
        return [float(window.low.value), float(window.high.value)], "the edges of the porosity window"
    return [float(np.nanmedian(table[_POROSITY]))], "the lots' median ribbon porosity"


def _rolls(table, physics) -> list[tuple[str, float, float, float]]:
    """(label, diameter, width, gap) for each compactor of the lots and the illustrative example rolls."""
    gap = float(np.nanmedian(table[_GAP]))
    out = []
    for name, c in physics.compactors.items():
        width = c["roll_width_mm"] if c["roll_width_mm"] is not None else float("nan")
        out.append((name, c["roll_diameter_mm"], width, gap))
    if not out:
        out.append(("lots", float(np.nanmedian(table[_DIAMETER])), float("nan"), gap))
    out.append((EXAMPLE_LABEL, *SCALE_UP_ROLLS, gap))
    return out


def _command(targets: list[float], gap: float) -> str:
    """The ``linkage transfer`` command that answers for the user's own rolls, with the section's targets."""
    target = (f"--window {targets[0]:.3f}:{targets[1]:.3f}" if len(targets) == 2 else f"--porosity {targets[0]:.3f}")
    return f"linkage transfer --roll-diameter-mm D --roll-width-mm W --gap-mm {gap:.3g} {target}"


def transfer_section(b, table, window=None, *, seed: int = 0, trained_on=None, trained=None) -> None:
    """Add the section to the report builder ``b`` (``linkage.report.html._Builder``). ``trained_on``: which of
    some lots the model was trained on (:meth:`linkage.models.fitted.FittedChain.trained_on`; the fit says how
    many of its lots they are); None: not said. ``trained``: the keyword before ``trained_on``, kept for callers
    written before it: the lots the model was trained on (a list), judged by the same rule."""
    if trained is not None:
        if trained_on is not None:
            raise TypeError("transfer_section: give trained_on or trained (its earlier form), not both")
        from linkage.models.fitted import trained_mask

        trained_on = partial(trained_mask, training_lots=list(trained))
    from linkage.decide.transfer import fit_ribbon_physics
    from linkage.exceptions import LinkageError
    from linkage.report import figures as F
    from linkage.report.html import _part, table_html

    b.section("transfer", "Transfer between compactors (Johanson rolling theory)")
    missing = [c for c in (_FORCE, _GAP, _DIAMETER, _POROSITY) if c not in table.columns]
    if missing:
        b.note(f"The lots have no {', '.join(missing)}, so the ribbon physics cannot be fitted; record the roll "
               "diameter of every lot to transfer between compactors.")
        return
    try:
        physics = fit_ribbon_physics(table, source="assembled lots")
    except LinkageError as exc:
        b.note(f"The ribbon physics could not be fitted: {exc}")
        return
    t = table.dropna(subset=[_FORCE, _GAP, _DIAMETER, _POROSITY])
    n_trained = None if trained_on is None else int(trained_on(t["lot"]).sum())
    b.add(_part("sections", "transfer_fit", physics=physics, d=physics.to_dict(), n_trained=n_trained))

    groups = t["compactor"].astype(str).to_numpy() if "compactor" in t.columns else None
    gap = float(np.nanmedian(t[_GAP]))

    def make():  # made where it is drawn, and not at all when kept (issue 20)
        ax = F.new_axes(panel=(5.0, 3.2))
        F._scatter_groups(ax, t[_FORCE], t[_POROSITY], groups, legend_title="compactor")
        grid = np.linspace(float(t[_FORCE].min()) * 0.8, float(t[_FORCE].max()) * 1.2, 80)
        styles = F.group_styles(sorted(set(groups))) if groups is not None else {}
        for name, c in physics.compactors.items():
            colour = styles.get(name, ("black", "o"))[0]
            ax.plot(grid, physics.porosity(grid, gap, c["roll_diameter_mm"]), color=colour, lw=1.2)
        ax.set_xlabel(F.axis_label(_FORCE))
        ax.set_ylabel(F.axis_label(_POROSITY))
        return ax

    b.figure(make, f"Ribbon porosity of each lot against specific roll force, by compactor; lines: the fitted "
                 f"Johanson model on each compactor's rolls at the median gap {gap:.3g} mm (lots at other gaps "
                 f"scatter about them).")

    targets, which = _targets(window, t)
    rows, extrapolated, refused = _force_rows(physics, t, targets, seed)
    b.add(_part("sections", "transfer_rolls", which=which, rolls=SCALE_UP_ROLLS, label=EXAMPLE_LABEL,
                command=_command(targets, gap)))
    b.add(table_html(["rolls", "diameter [mm]", "width [mm]", "gap [mm]", "porosity [-]", "force [kN/cm]",
                  "95% interval [kN/cm]", "total [kN]", "P max [MPa]"], rows,
                 num_cols={1, 2, 3, 4, 5, 6, 7, 8}))
    for text in refused:
        b.note(f"No force for the rolls {text}")
    if extrapolated:
        b.add(_part("sections", "transfer_extrapolated"))
    b.add(_part("sections", "transfer_leaves_out", text=LEAVES_OUT))


def _force_rows(physics, t, targets: list[float], seed: int) -> tuple[list[list[str]], bool, list[str]]:
    """The rows of the section's force table, one per set of rolls (:func:`_rolls`) and target porosity; whether
    any force lies outside the lots' peak pressures (extrapolated, marked ``*``); and the rolls the theory gives
    no force for, each with why (said in the section, not fatal)."""
    from linkage.decide.transfer import transfer
    from linkage.exceptions import LinkageError

    rows = []
    extrapolated = False
    refused = []
    for label, diameter, width, g in _rolls(t, physics):
        w = width if np.isfinite(width) else 100.0
        try:
            result = transfer(physics, roll_diameter_mm=diameter, roll_width_mm=w, roll_gap_mm=g,
                              porosity=targets[0] if len(targets) == 1 else None,
                              window=tuple(targets) if len(targets) == 2 else None, seed=seed)
        except LinkageError as exc:  # rolls the theory gives no answer for (a gap too wide to nip): said, not fatal
            refused.append(f"{label} (diameter {diameter:g} mm, gap {g:.3g} mm): {exc}")
            continue
        for r in result.targets:
            lo, hi = r["force_interval_kn_per_cm"]
            extrapolated |= not r["inside_lots_pressure_range"]
            rows.append([label, f"{diameter:g}", f"{width:g}" if np.isfinite(width) else "—",
                         f"{g:.3g}", f"{r['ribbon_porosity']:.3f}",
                         f"{r['roll_force_kn_per_cm']:.2f}" + ("" if r["inside_lots_pressure_range"] else " *"),
                         f"{lo:.2f}–{hi:.2f}",
                         f"{r['roll_force_kn']:.0f}" if np.isfinite(width) else "—",
                         f"{r['peak_pressure_mpa']:.0f}"])
    return rows, extrapolated, refused
