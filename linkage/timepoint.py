"""The dissolution time point belongs to the model.

A model's ``dissolution_pct`` is the release at one time point: the one the
lots were assembled at when it was trained (``linkage train --spec`` takes it
from the spec's ``[dissolution_pct] time_min``, else ``--dissolution-time``,
default 30 min). The fitted chain records it (``training.dissolution_time_min``
in its metadata, ``dissolution_time_min`` in the lean ``whatif.npz`` header).
A model saved before the time point was recorded is read as the default
30 min, and every command that judges it says so.

A spec judges dissolution at its own time point (``time_min``, default
30 min). Judging a model of one time point against a limit at another is
refused (exit code 2), naming both: the numbers would look like an answer to
a question nobody asked (a 30-min model passing a 15-min limit).

numpy, pandas and scikit-learn are not imported here: ``linkage predict``
uses this module.
"""

from __future__ import annotations

from linkage.exceptions import SpecError, toml_problem
from linkage.schema import DEFAULT_DISSOLUTION_TIME_MIN

DISSOLUTION = "dissolution_pct"

#: what the output says about a model that does not record its time point
UNRECORDED_NOTE = (f"this model was saved before models recorded their dissolution time point; it is taken as "
                   f"the default {DEFAULT_DISSOLUTION_TIME_MIN:g} min")


def model_time_point(chain) -> tuple[float, bool]:
    """(time point [min] of the model's ``dissolution_pct``, whether the model
    records it). ``chain`` is a fitted chain or its lean form; a model that
    does not record one is the default 30 min (``recorded`` False)."""
    lean_value = getattr(chain, "dissolution_time_min", None)
    training = getattr(chain, "training", None)
    value = lean_value if lean_value is not None else (
        training.get("dissolution_time_min") if isinstance(training, dict) else None)
    if value is None:
        return float(DEFAULT_DISSOLUTION_TIME_MIN), False
    return float(value), True


def models_dissolution(chain) -> bool:
    """Does the chain predict ``dissolution_pct``?"""
    return DISSOLUTION in getattr(chain, "targets", {})


def spec_time_point(spec) -> float | None:
    """The time point [min] at which ``spec`` judges dissolution, or None when
    it sets no dissolution limit."""
    if spec is None or DISSOLUTION not in spec.limits:
        return None
    return float(spec.dissolution_time_min)


def check_time_point(chain, spec, command: str) -> None:
    """Refuse (:class:`SpecError`, exit code 2) a spec whose dissolution limit
    is at a time point the model was not trained for. Nothing to check when
    the spec has no dissolution limit or the model does not predict
    dissolution."""
    wanted = spec_time_point(spec)
    if wanted is None or not models_dissolution(chain):
        return
    have, recorded = model_time_point(chain)
    if abs(wanted - have) <= 1e-9:
        return
    model_id = getattr(chain, "model_id", None) or "unsaved"
    how = "" if recorded else " (not recorded in the model, taken as the default)"
    raise time_point_error(spec, f"{command}: the spec judges dissolution_pct at {wanted:g} min, but model "
        f"{model_id} was trained on "
        f"dissolution at {have:g} min{how}; a model of one time point cannot judge a limit at another. "
        f"Train a model at {wanted:g} min ('linkage train --spec SPEC'), or use a spec at {have:g} min.")


def time_point_error(spec, rule: str) -> SpecError:
    """The error (exit code 2) for a spec at a time point the model was not
    trained for, naming the spec file and its time_min."""
    return SpecError(toml_problem(getattr(spec, "file", None) or "spec", rule, table="dissolution_pct",
                                  value=spec_time_point(spec), column="dissolution_pct time_min"))


def time_point_text(chain) -> str:
    """One line for an output: the model's dissolution time point, and whether
    it was recorded."""
    have, recorded = model_time_point(chain)
    return f"dissolution modelled at {have:g} min" + ("" if recorded else f" ({UNRECORDED_NOTE})")
