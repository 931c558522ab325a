"""Units as a reader sees them, the same in every place the report, the what-if sheet and the what-if page write
them (user test: the report's notes wrote "63 um" where its tables write µm). Regression tests of labels: they
need no outside source (the units themselves are the template's, linkage.schema)."""

from __future__ import annotations

from tests.report.test_set_aside_figures import lab  # noqa: F401  (the trained store, a fixture)


def test_a_unit_after_a_number_is_written_as_the_tables_write_it():
    from linkage.report.figures import shown_unit, shown_units_text

    note = "lot A: d10 lies outside the sieve stack (undersize 10.7% at 63 um, 99.8% at 1400 um)"
    assert shown_units_text(note) == ("lot A: d10 lies outside the sieve stack (undersize 10.7% at 63 µm, "
                                      "99.8% at 1400 µm)")
    assert shown_unit("granule_d50_um") == "µm"  # the tables' unit of the same quantity
    # a column name that ends in a unit, and a unit inside a longer one, stay as they are
    assert shown_units_text("granule_d50_um 3 um/s, 2.1 g/cm3") == "granule_d50_um 3 um/s, 2.1 g/cm³"


def test_the_reports_assembly_notes_use_the_shown_unit(lab):
    from linkage.report.html import _Builder, _data_section

    store, chain, before, _ = lab
    table = before.copy()
    table.attrs["notes"] = ["lot X: d10 lies outside the sieve stack (undersize 10.7% at 63 um, 99.8% at 1400 um)"]
    b = _Builder(parallel=False)
    try:
        _data_section(b, chain, table, None)
    finally:
        b.close()
    text = "".join(b.parts)
    assert "at 63 µm, 99.8% at 1400 µm" in text and "63 um" not in text
