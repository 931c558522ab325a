"""One rule for a number written as text (issue 15 item 7): the ingest and the what-if agree.

Reference: Python's ``float()`` accepts more than a lab export holds (PEP 515 underscores, other scripts'
decimal digits, ``nan``/``inf``; Python Language Reference, "float"); the cases below are ones ``float()``
takes and the rule refuses, checked against ``float()`` itself so the difference is real.
"""

from __future__ import annotations

import pytest

from linkage.decide.whatif import parse_assignments
from linkage.exceptions import UsageError
from linkage.numbers import parse_plain_number
from linkage.read import _parse_number


@pytest.mark.parametrize("text, value", [("1.5", 1.5), ("-0.25", -0.25), ("1e-3", 1e-3), (" 7 ", 7.0), (".5", 0.5),
                                         ("3.", 3.0), ("+2E2", 200.0)])
def test_plain_numbers_read_as_float_reads_them(text, value):
    assert parse_plain_number(text) == float(text) == value
    assert _parse_number(text, ".", ",") == value


@pytest.mark.parametrize("text, words", [
    ("1_0", "not a number"),                # PEP 515 underscore: float('1_0') == 10.0
    ("\u0661\u0660", "another script"),     # Arabic-Indic digits: float('١٠') == 10.0
    ("\uff11\uff10", "another script"),     # full-width digits: float('１０') == 10.0
    ("nan", "not a finite number"),
    ("-inf", "not a finite number"),
    ("1e999", "not a finite number"),
])
def test_what_float_takes_and_the_rule_refuses(text, words):
    float(text)  # Python takes it (or gives inf/nan): the rule is the stricter one
    rule = parse_plain_number(text)
    assert isinstance(rule, str) and words in rule
    ingest = _parse_number(text, ".", ",")
    assert isinstance(ingest, str), "the ingest refuses it too"


def test_the_what_if_refuses_what_the_ingest_refuses():
    with pytest.raises(UsageError, match="roll_gap_mm: '1_0' is not a number"):
        parse_assignments(["roll_gap_mm=1_0"])
    with pytest.raises(UsageError, match="another script"):
        parse_assignments(["roll_gap_mm=\u0662"])
    assert parse_assignments(["roll_gap_mm=2.5"]) == {"roll_gap_mm": 2.5}


def test_a_confidence_is_written_with_the_digits_it_was_given():
    """A user test found --confidence 0.9999 written 'at least 100%' (a whole-percent rounding). The digits
    given are kept: no rounding to a certainty, no trailing zeros. No outside source (a regression test of
    wording)."""
    from linkage.numbers import percent_text

    assert [percent_text(p) for p in (0.9, 0.95, 0.975, 0.9999, 0.5)] == ["90%", "95%", "97.5%", "99.99%", "50%"]
    assert percent_text(0.9) == f"{0.9:.0%}"  # the usual confidences read as before
