"""Which lots the model was trained on, judged once (``FittedChain.trained_on``) for the report's sections that
say it: the lots section ("trained on N of them"), the design-space map (open dots and filled squares), the
transfer section's fit ("N of them lots the model was trained on"), the lots each attribute left out and the
domain of the training lots. Each judged it on its own before.

The reference is numpy's set membership (``numpy.isin``) of the lot ids, as text, in the training record's lots.
"""

from __future__ import annotations

import copy
import re
from pathlib import Path

import numpy as np
import pytest

from linkage.report.html import _Builder, _data_section
from linkage.report.transfer_section import transfer_section
from linkage.synthetic_rolling import make_transfer_lots

REPORT = Path(__file__).resolve().parents[2] / "linkage" / "report"


def _reference(lots, training_lots) -> np.ndarray:
    return np.isin(np.asarray([str(v) for v in lots]), np.asarray([str(v) for v in training_lots]))


def test_trained_on_is_set_membership_of_the_training_lots(chain, table):
    part = copy.copy(chain)
    part.training = {**chain.training, "lots": list(chain.training["lots"])[:20]}
    lots = list(table["lot"]) + ["not-a-lot", 7]
    got = part.trained_on(lots)
    assert got.dtype == bool and got.tolist() == _reference(lots, part.training["lots"]).tolist()
    assert int(got.sum()) == 20
    assert part.trained_on(table["lot"]).tolist() == _reference(table["lot"], part.training["lots"]).tolist()


def test_the_lots_and_transfer_sections_say_the_same_count(chain, table):
    """On a table of which 20 of 36 lots are training lots, the lots section says 20 and 16; on the transfer
    campaign, with a model of its first 10 lots, the transfer fit says 10 of its lots are training lots."""
    part = copy.copy(chain)
    part.training = {**chain.training, "lots": list(chain.training["lots"])[:20]}
    n = int(_reference(table["lot"], part.training["lots"]).sum())
    b = _Builder(parallel=False)
    _data_section(b, part, table, None, [])
    text = "".join(b.parts)
    assert f"the model was trained on {n} of them; the other {len(table) - n} are not among its training lots" in text
    campaign = make_transfer_lots(seed=2)
    model = copy.copy(chain)
    model.training = {**chain.training, "lots": list(campaign["lot"])[:10]}
    b = _Builder(parallel=False)
    transfer_section(b, campaign, trained_on=model.trained_on)
    k = int(_reference(campaign.dropna(subset=["roll_force_kn_per_cm", "roll_gap_mm", "roll_diameter_mm",
                                               "ribbon_porosity"])["lot"], model.training["lots"]).sum())
    assert k == 10 and f"{k} of them lots the model was trained on" in "".join(b.parts)


def test_no_section_of_the_report_judges_training_lots_on_its_own():
    """A regression test of the one place (no outside source): no line of the report's code makes a set of the
    training record's lots or tests membership in it (it may still count them, or list revised lots), and the
    sections call trained_on."""
    uses = {}
    for path in sorted(REPORT.glob("*.py")):
        text = path.read_text(encoding="utf-8")
        for line in text.splitlines():
            if re.search(r"training(\.get\(|\[)\"lots\"", line):
                assert not re.search(r"\bset\(|\.isin\(|\bin\b", line), f"{path.name}: {line.strip()}"
        uses[path.name] = text.count("trained_on(") + text.count("trained_on=chain.trained_on")
    assert uses["space_section.py"] >= 1 and uses["transfer_section.py"] >= 1 and uses["html.py"] >= 4, uses


def test_transfer_section_takes_its_earlier_keyword_trained(chain):
    """``transfer_section`` is in ``__all__``: its keyword before ``trained_on``, ``trained`` (the list of training
    lots), still gives the same section (a rule of the API's names: no outside source; the count is checked
    against ``_reference``, pandas' isin)."""
    campaign = make_transfer_lots(seed=2)
    lots = list(campaign["lot"])[:10]
    model = copy.copy(chain)
    model.training = {**chain.training, "lots": lots}
    new, old = _Builder(parallel=False), _Builder(parallel=False)
    transfer_section(new, campaign, trained_on=model.trained_on)
    transfer_section(old, campaign, trained=lots)
    assert "".join(old.parts) == "".join(new.parts) and "10 of them lots the model was trained on" in "".join(old.parts)
    with pytest.raises(TypeError, match="not both"):
        transfer_section(_Builder(parallel=False), campaign, trained_on=model.trained_on, trained=lots)
