"""The valid name nearest a mistyped one, for the refusal's ``(did you mean 'x'?)`` (standard library only, so
that the lean what-if can use it)."""

from __future__ import annotations

import difflib
from typing import Iterable

#: difflib's ratio a whole valid name must reach to be suggested (the cutoff the readers use for headers)
CUTOFF = 0.6
#: the ratio against a valid name's beginning as long as the typed one (``roll_forse`` for
#: ``roll_force_kn_per_cm``: a name typed without its unit), a stricter bar since the compared texts are shorter
PREFIX_CUTOFF = 0.8


def nearest(name: str, choices: Iterable[str], *, by_beginning: bool = True) -> str | None:
    """The choice nearest ``name`` (difflib's ratio over the whole name, else, with ``by_beginning``, over the
    choice's beginning of the same length), or None when none is near."""
    choices = [str(c) for c in choices]
    name = str(name)
    near = difflib.get_close_matches(name, choices, n=1, cutoff=CUTOFF)
    if near or not by_beginning:
        return near[0] if near else None
    best, score = None, PREFIX_CUTOFF
    for choice in choices:
        ratio = difflib.SequenceMatcher(None, name, choice[:len(name)]).ratio()
        if len(choice) > len(name) and ratio >= score:
            best, score = choice, ratio + 1e-12  # the first of equals wins
    return best


def did_you_mean(name: str, choices: Iterable[str], *, by_beginning: bool = True) -> str:
    """`` (did you mean 'x'?)`` with the choice :func:`nearest` ``name``, or ''. Without ``by_beginning`` only a
    whole name near enough is suggested (the readers' and the spec's refusals, which never matched beginnings)."""
    near = nearest(name, choices, by_beginning=by_beginning)
    return f" (did you mean '{near}'?)" if near else ""
