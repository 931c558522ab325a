"""Defaults that a command, its Python function and the report's reuse keys
must share: a window or map computed by ``linkage window`` / ``linkage space``
with these is the one ``linkage report`` reuses (:mod:`linkage.models.reuse`
keys results by their arguments), so they are written once, here. A light
module (no numpy, no pandas): the command-line options import it.
"""

#: Monte Carlo draws per porosity of the window (``linkage window --draws``)
WINDOW_DRAWS = 2000
#: grid points per setting of the design-space map (``linkage space --grid``)
MAP_GRID = 40
#: the map's settings on the x and y axes (``linkage space --x/--y``)
MAP_X = "roll_force_kn_per_cm"
MAP_Y = "roll_gap_mm"

#: the plan's criteria (``linkage plan --criterion``; :func:`linkage.decide.plan.augment_design`), the default first
PLAN_CRITERIA = ("cover", "local", "target", "thompson")
