"""The what-if page's embedded numbers that are words, not arithmetic (``linkage.report.page.page_payload``):
the unit table its headings use and the time the model was trained, as the page shows them. The arithmetic
the page repeats is compared with ``predict --json`` in tests/report/test_whatif_page.py (browser)."""

from __future__ import annotations

from importlib import resources

from linkage.report.page import page_payload


def test_the_page_takes_its_unit_table_from_python(scenario):
    """The page kept its own copy of the report's unit table ('um' -> 'µm'); it now reads the one Python table
    (linkage.report.figures.PRETTY_UNITS), embedded by page_payload, and the script holds no copy. Regression
    test of one source for a label (no outside source)."""
    from linkage.report.figures import PRETTY_UNITS, shown_unit

    _, chain, spec, _ = scenario
    payload = page_payload(chain, spec, n_draws=50)
    assert payload["pretty_units"] == PRETTY_UNITS and PRETTY_UNITS["um"] == shown_unit("granule_d50_um") == "µm"
    script = resources.files("linkage.report").joinpath("whatif_page.js").read_text(encoding="utf-8")
    assert "M.pretty_units" in script
    assert not any(shown in script for shown in PRETTY_UNITS.values()), "the script keeps a copy of the table"


def test_the_page_shows_when_the_model_was_trained_to_the_second_in_utc(scenario):
    """The page showed the training time as recorded, to the microsecond ('2026-12-05T13:40:01.123456+00:00').
    It now shows it to the second, converted to UTC and marked so. The reference is ISO 8601 (an offset of
    +01:00 is one hour ahead of UTC) as Python's datetime reads it. Regression test of a label."""
    from datetime import datetime, timezone

    from linkage.report.page import trained_text

    assert trained_text("2026-12-05T14:40:01.123456+01:00") == "2026-12-05 13:40:01 UTC"
    assert trained_text("2026-12-05T13:40:01.999999") == "2026-12-05 13:40:01 UTC"  # the registry's zone: UTC
    _, chain, spec, _ = scenario
    payload = page_payload(chain, spec, n_draws=50)
    recorded = datetime.fromisoformat(chain.created_at).astimezone(timezone.utc)
    assert payload["created_at"] == chain.created_at  # the recorded time is still embedded as it is
    assert payload["trained"] == recorded.strftime("%Y-%m-%d %H:%M:%S") + " UTC"
    script = resources.files("linkage.report").joinpath("whatif_page.js").read_text(encoding="utf-8")
    assert "(trained ${M.trained})" in script and "M.created_at" not in script
