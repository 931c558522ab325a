"""The defaults a command, its Python function and the report's reuse keys share
(:mod:`linkage.decide.defaults`): a window or map that ``linkage window`` /
``linkage space`` kept with their defaults is the one ``linkage report``
looks for. A consistency check of the code against itself (no outside
reference applies)."""

from __future__ import annotations

import inspect


def _default(fn, name):
    return inspect.signature(fn).parameters[name].default


def test_window_and_map_defaults_are_the_same_everywhere():
    from linkage import api
    from linkage.cli.decide_cmds import window as window_cmd
    from linkage.cli.space_cmds import space as space_cmd
    from linkage.decide import defaults
    from linkage.decide.space import design_space
    from linkage.decide.window import find_window

    options = {p.name: p.default for cmd in (window_cmd, space_cmd) for p in cmd.params}
    assert options["n_draws"] == _default(api.window, "n_draws") == _default(find_window, "n_draws") \
        == defaults.WINDOW_DRAWS
    assert options["n_grid"] == _default(api.space, "n_grid") == _default(design_space, "n_grid") == defaults.MAP_GRID
    assert (options["x"], options["y"]) == (_default(api.space, "x"), _default(api.space, "y")) \
        == (_default(design_space, "x"), _default(design_space, "y")) == (defaults.MAP_X, defaults.MAP_Y)
