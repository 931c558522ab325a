"""Units as a reader sees them, the same in every place the report, the what-if sheet and the what-if page write
them (user test: the report's notes wrote "63 um" where its tables write µm). Regression tests of labels: they
need no outside source (the units themselves are the template's, linkage.schema)."""

from __future__ import annotations

import re

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


def test_the_terminal_texts_write_um_as_the_report_does(lab, tmp_path):
    """A user test read "granule_d50_um = 189.1 um is below the training range" in predict's text and "fines below
    125 um" in assemble's, where the report writes µm. The terminal texts (and the sheet's domain reasons) write a
    unit after a number as the report does; --json keeps the recorded texts, and a column name stays as it is.
    Python 3 writes stdout as UTF-8 here (the texts write –, ≥ and ² too)."""
    from click.testing import CliRunner

    from linkage.cli.main import cli
    from linkage.decide.whatif import predict_whatif
    from linkage.report.sheet import whatif_html
    from linkage.results import WhatIfResult

    store, chain, before, _ = lab
    low = float(before["granule_d50_um"].min()) / 2  # below every training lot's: outside the domain
    w = predict_whatif(chain, {"granule_d50_um": low}, n_draws=200, seed=0)
    recorded = [r for r in w.to_dict()["domain_reasons"] if r.startswith("tablets stage: granule_d50_um")]
    assert recorded and all(" um is below" in r for r in recorded), w.to_dict()["domain_reasons"]  # JSON: as recorded
    text = WhatIfResult(result=w).text()
    assert "granule_d50_um = " in text and " µm is below the training range" in text, text
    assert not re.search(r"\d um\b", text), text
    page = whatif_html(w)
    assert " µm is below the training range" in page and not re.search(r"\d um\b", page)
    r = CliRunner().invoke(cli, ["assemble", "--store", str(store)], env={"LINKAGE_STORE": None})
    assert r.exit_code == 0, r.output
    assert "(fines below 125 µm, dissolution at" in r.stdout and not re.search(r"\d um\b", r.stdout), r.stdout
    assert "[µm]" in CliRunner().invoke(cli, ["assemble", "--help"]).stdout
