"""Lot identity: one lot, one spelling; invisible characters refused.

The rule itself (:func:`lot_key`, :func:`lot_id_rule`, and the spellings of one
lot in a file, :func:`_lot_id_problems`) lives in :mod:`linkage.lotid`, free of
pandas, so that a what-if (``linkage predict --lot`` and ``--from-csv``) and the
store's look-ups apply the very rule the reader applies."""

from __future__ import annotations

from linkage.lotid import (_DASHES, _INVISIBLE, _lot_id_problems, row_span, _visible, _without_invisible,
                           lot_id_rule, lot_key)

__all__ = ["_DASHES", "_INVISIBLE", "_lot_id_problems", "row_span", "_visible", "_without_invisible", "lot_id_rule",
           "lot_key"]
