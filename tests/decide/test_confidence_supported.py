"""A confidence the lots cannot show is refused (a user test asked for a window at 99.99 % on 48 lots and got
one: where every residual passes).

Reference: with n exchangeable out-of-fold residuals, a new lot's residual lies beyond all n with probability
1/(n + 1) (the rank argument of conformal prediction: Vovk, Gammerman & Shafer 2005, *Algorithmic Learning in a
Random World*, ch. 2; the level limit of CV+, Barber et al. 2021, Ann. Statist. 49:486), so n/(n + 1) is the
highest probability the residuals can tell from 1. n is counted here from the training table itself (lots with
a value of the attribute), not from the model.
"""

from __future__ import annotations

import pytest

from linkage.exceptions import UsageError
from tests.decide.test_plan import campaign  # noqa: F401 - its 30-lot campaign fixture, shared


def test_a_confidence_above_n_over_n_plus_1_is_refused_by_window_and_map(campaign):
    from linkage.decide.space import design_space
    from linkage.decide.window import check_confidence_supported, find_window
    from linkage.models.lean import as_lean

    chain, table, spec = campaign
    judged = [a for a in spec.limits if a in chain.targets]
    n = min(int(table[a].notna().sum()) for a in judged)  # lots with a value of each judged attribute
    most = n / (n + 1)
    with pytest.raises(UsageError, match=rf"residuals on {n} lots, and a probability above n/\(n \+ 1\) = "
                                         rf"{most:.4f}"):
        find_window(chain, spec, confidence=most + 1e-4, n_draws=200)
    with pytest.raises(UsageError, match="asks more than the lots can show"):
        design_space(chain, spec, confidence=most + 1e-4, n_grid=3)
    check_confidence_supported(as_lean(chain), judged, most)  # n/(n + 1) itself is allowed
    assert find_window(chain, spec, confidence=0.9, n_draws=200).confidence == 0.9  # the default still runs


def test_the_acceptance_value_is_held_to_the_weight_rsds_residual_lots(campaign):
    """A spec of the acceptance value alone (USP <905>, units simulated from each lot's weight RSD) is held to
    n/(n + 1) of the weight RSD's residual lots too (the reviewer found it escaped the limit)."""
    from linkage.decide.window import find_window
    from linkage.spec import Spec

    chain, table, _ = campaign
    assert "weight_rsd_pct" in chain.targets
    n = int(table["weight_rsd_pct"].notna().sum())
    spec = Spec(limits={}, acceptance_value_max=15.0)
    with pytest.raises(UsageError, match=rf"weight_rsd_pct has out-of-fold residuals on {n} lots"):
        find_window(chain, spec, confidence=n / (n + 1) + 1e-4, n_draws=200)


def test_the_refusal_is_built_with_its_message(monkeypatch):
    """The refusal was built with an empty message and its text set afterwards (``args``), so anything that
    reads the message given to the constructor (a subclass, a handler that wraps it, a pickle made from the
    constructor's arguments) saw ''. It is now built with its message, as every other error of
    linkage.exceptions is. n = 9 residual lots: the limit is 9/10 (the rank argument above). Regression test of
    how the error is made (no outside source beyond the limit's)."""
    from types import SimpleNamespace

    import numpy as np

    from linkage.decide.window import check_confidence_supported
    from linkage.exceptions import UnsupportedConfidenceError

    built = []
    init = UnsupportedConfidenceError.__init__

    def spy(self, message, **kwargs):
        built.append(message)
        init(self, message, **kwargs)

    monkeypatch.setattr(UnsupportedConfidenceError, "__init__", spy)
    residuals = np.r_[np.linspace(-1.0, 1.0, 9), np.nan]  # 9 lots with a residual, one without
    stage = SimpleNamespace(targets=["tensile_strength_mpa"], residual_column=lambda name: residuals)
    with pytest.raises(UnsupportedConfidenceError) as refused:
        check_confidence_supported(SimpleNamespace(stages=[stage]), ["tensile_strength_mpa"], 0.95)
    assert built == [str(refused.value)] and refused.value.args == (built[0],)
    assert refused.value.n_lots == 9 and refused.value.most == 0.9
    assert "residuals on 9 lots" in built[0] and "at most 0.9," in built[0]
