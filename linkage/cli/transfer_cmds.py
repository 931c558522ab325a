"""``linkage transfer``: the roll force that gives a ribbon porosity on another compactor's rolls."""

from __future__ import annotations

import json

import click

from linkage.cli.common import PROBABILITY, FiniteFloat, handle_errors, json_option, store_option, with_store_upgraded

_MM = FiniteFloat(0, None, min_open=True)


def _window(value):
    """``LOW:HIGH`` -> (low, high); the range rule is checked by the library."""
    if value is None:
        return None
    try:
        low, high = (float(v) for v in value.split(":"))
    except ValueError:
        raise click.BadParameter(f"expected LOW:HIGH porosities such as 0.22:0.30; got {value!r}") from None
    return low, high


@click.command()
@click.option("--roll-diameter-mm", required=True, type=_MM, help="Roll diameter of the target compactor [mm].")
@click.option("--roll-width-mm", required=True, type=_MM, help="Roll width of the target compactor [mm].")
@click.option("--gap-mm", "gap_mm", required=True, type=_MM, help="Roll gap on the target compactor [mm].")
@click.option("--porosity", type=FiniteFloat(0, 1, min_open=True, max_open=True), default=None,
              help="Target ribbon porosity [-].")
@click.option("--window", "window_text", metavar="LOW:HIGH", default=None,
              help="Target ribbon porosity window, e.g. 0.22:0.30 (instead of --porosity).")
@click.option("--level", default=0.95, show_default=True, type=PROBABILITY, help="Coverage of the intervals.")
@click.option("--product", default=None, help="Fit only the lots of this product.")
@click.option("--internal-friction-deg", default=40.0, show_default=True, type=FiniteFloat(0, 90, min_open=True,
                                                                                          max_open=True),
              help="Effective angle of internal friction held in the nip angle [deg] (not fitted).")
@click.option("--wall-friction-deg", default=25.0, show_default=True, type=FiniteFloat(0, 90),
              help="Wall friction angle held in the nip angle [deg] (not fitted).")
@click.option("--draws", "n_draws", default=4000, show_default=True, type=click.IntRange(200, 200_000),
              help="Monte Carlo draws of the interval.")
@click.option("--seed", default=0, show_default=True, type=int, help="Seed of the Monte Carlo draws.")
@store_option
@json_option
@handle_errors
def transfer(roll_diameter_mm, roll_width_mm, gap_mm, porosity, window_text, level, product, internal_friction_deg,
             wall_friction_deg, n_draws, seed, store, as_json):
    """Say which specific roll force gives a ribbon porosity (or window) on a
    compactor with other rolls: scale-up by Johanson's rolling theory, with
    the material's compressibility and pressure constant fitted from the lots
    of every compactor in the store.

    Lots set aside ('linkage set-aside') are left out, and named.

    The model leaves out roll speed, leakage past the roll edges, side
    seals, the feed screw, dwell time and elastic recovery; confirm the
    answer with a few lots on the new rolls.

    \b
    Example:
      linkage transfer --roll-diameter-mm 400 --roll-width-mm 100 --gap-mm 2.5 --porosity 0.28
      linkage transfer --roll-diameter-mm 400 --roll-width-mm 100 --gap-mm 2.5 --window 0.22:0.30 --json
    """
    from linkage.api import transfer as find
    from linkage.exceptions import UsageError
    from linkage.jsonable import jsonable

    if wall_friction_deg > internal_friction_deg:
        raise UsageError("--wall-friction-deg cannot exceed --internal-friction-deg (the wall cannot grip harder "
                         "than the powder shears)")
    window = _window(window_text)
    if (porosity is None) == (window is None):
        raise UsageError("give either --porosity or --window LOW:HIGH")
    result = find(store, roll_diameter_mm=roll_diameter_mm, roll_width_mm=roll_width_mm, roll_gap_mm=gap_mm,
                  porosity=porosity, window=window, level=level, product=product,
                  internal_friction_deg=internal_friction_deg, wall_friction_deg=wall_friction_deg,
                  n_draws=n_draws, seed=seed)
    if as_json:
        click.echo(json.dumps(with_store_upgraded(jsonable(result.to_dict())), indent=2, allow_nan=False))
        return
    click.echo(result.text())
