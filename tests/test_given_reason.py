"""One test of "needs a reason" (``linkage.store.given_reason``): --accept-unusual (the API and the store),
--reanchor (the CLI, ``verify_record`` and ``LotStore.reanchor``) and a forced promotion each wrote their own
check, with different ideas of a blank reason. Each now refuses None, text that is blank or whitespace only,
and a reason that is not text, the same way, and records the reason stripped.

Regression tests of a refusal: they need no outside source.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import pytest

from linkage import api, seal
from linkage.decide.retrain import decide
from linkage.exceptions import UsageError
from linkage.integrity import verify_record
from linkage.read import read_folder
from linkage.store import LotStore, given_reason

EXAMPLE = Path(__file__).resolve().parent / "data" / "template-example"
NONE = [None, "", "  ", "\t\n", "\u00a0", 7]


def test_a_reason_is_text_with_something_in_it():
    assert [given_reason(r) for r in NONE] == [None] * len(NONE)
    assert given_reason("  deviation D-7\n") == "deviation D-7"


def test_every_check_refuses_the_same_blank_reasons(tmp_path):
    path = tmp_path / "site.db"
    with LotStore(path) as s:
        s.ingest(read_folder(EXAMPLE, known_lots=s.lot_ids()))
    seal.anchor_path(path).unlink()  # a store to anchor again
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        store = LotStore(path, create=False)
    with store:
        for reason in NONE:
            with pytest.raises(UsageError, match="--reason"):
                api.ingest(EXAMPLE, tmp_path / "other.db", reason=reason, accept_unusual=True)
            with pytest.raises(UsageError, match="--reason"):
                store.reanchor(reason)
            if reason is not None:  # None: verify without --reanchor
                with pytest.raises(UsageError, match="--reason"):
                    verify_record(path, None, reanchor_reason=reason)
            with pytest.raises(UsageError, match="--reason"):
                decide([], force=True, reason=reason)
        assert not (tmp_path / "other.db").exists() and not seal.anchor_path(path).exists()
        done = store.reanchor("  anchor lost in the copy \n")
        entry = store.audit()[-1]
    assert entry["id"] == done["audit_id"] and entry["inputs"]["reason"] == "anchor lost in the copy"  # stripped


def test_the_store_refuses_unusual_values_taken_with_a_blank_reason(tmp_path):
    with LotStore(tmp_path / "site.db") as s:
        for reason in NONE:
            with pytest.raises(UsageError, match="--reason"):
                s.ingest(read_folder(EXAMPLE, known_lots=s.lot_ids()), reason=reason, accept_unusual=True)
        assert s.lot_ids() == []
