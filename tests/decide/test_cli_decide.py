"""`linkage window` and `linkage predict` from the command line."""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

from linkage.cli.main import cli


@pytest.fixture
def run(saved_model):
    models_dir, model_id, spec_path = saved_model
    runner = CliRunner()

    def _run(*args):
        result = runner.invoke(cli, [*args, "--models-dir", str(models_dir)], catch_exceptions=False)
        return result

    return _run


def test_window_json_has_the_contract_keys(run, saved_model):
    _, model_id, spec_path = saved_model
    r = run("window", "--spec", str(spec_path), "--set", "mill_screen_mm=1.0", "--set",
            "compression_force_kn=14", "--json", "--draws", "1000")
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)
    assert d["model_id"] == model_id
    assert d["confidence"] == 0.9
    assert d["ribbon_porosity"]["low"] < d["ribbon_porosity"]["high"]
    assert d["limiting_attribute"]["low"] == "dissolution_pct"
    assert d["settings"]["compression_force_kn"] == {"value": 14.0, "source": "given"}
    assert {"low", "high"} <= set(d["roll_force_kn_per_cm"])


def test_window_text_names_edges_settings_and_caution(run, saved_model):
    _, _, spec_path = saved_model
    r = run("window", "--spec", str(spec_path), "--draws", "500")
    assert r.exit_code == 0, r.output
    assert "Porosity window:" in r.stdout
    assert "low edge: limited by dissolution_pct" in r.stdout
    assert "(held at the training mean, with no setting given to condition on)" in r.stdout
    assert "not release testing" in r.stdout


def test_predict_json_contract(run, saved_model):
    _, model_id, spec_path = saved_model
    r = run("predict", "--set", "roll_force_kn_per_cm=9", "--spec", str(spec_path), "--json")
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)
    assert d["model_id"] == model_id
    assert isinstance(d["in_domain"], bool) and isinstance(d["domain_reasons"], list)
    p = d["predictions"]["dissolution_pct"]
    assert {"value", "low", "high", "p_pass"} <= set(p)


def test_predict_far_outside_is_flagged_loudly(run):
    r = run("predict", "--set", "ribbon_porosity=0.05")
    assert r.exit_code == 0, r.output
    assert "OUT OF THE APPLICABILITY DOMAIN" in r.stdout


def test_predict_html_sheet_is_self_contained_and_escaped(run, saved_model, tmp_path):
    _, model_id, spec_path = saved_model
    out = tmp_path / "sheet" / "whatif.html"
    r = run("predict", "--set", "ribbon_porosity=0.3", "--spec", str(spec_path), "--html", str(out))
    assert r.exit_code == 0, r.output
    html = out.read_text(encoding="utf-8")
    assert model_id in html and "not release testing" in html
    assert "<script" not in html and "http://" not in html.replace('xmlns="http://www.w3.org/2000/svg"', "")
    predicted = json.loads(run("predict", "--set", "ribbon_porosity=0.3", "--spec", str(spec_path),
                               "--json").stdout)["predictions"]
    assert len(predicted) == 7  # 2 granule + 5 tablet attributes (breaking force among them)
    assert html.count("<svg") == len(predicted)  # one interval bar per predicted attribute


def test_predict_from_csv(run, tmp_path):
    planned = tmp_path / "planned.csv"
    planned.write_text("ribbon_porosity,compression_force_kn\n0.28,12\n0.33,\n", encoding="utf-8")
    r = run("predict", "--from-csv", str(planned), "--json")
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)
    assert len(d) == 2
    # a measured porosity is not a setting: nothing to condition on, the training mean (linkage.decide.held)
    assert d[1]["inputs"]["compression_force_kn"]["source"] == "held at the training mean, with no setting given to condition on"


def test_predict_from_csv_text_names_each_rows_lot(run, tmp_path):
    planned = tmp_path / "planned.csv"
    planned.write_text("lot,ribbon_porosity\nQ26-101,0.28\nQ26-102,0.33\n", encoding="utf-8")
    r = run("predict", "--from-csv", str(planned))
    assert r.exit_code == 0, r.output
    assert r.stdout.index("For lot Q26-101:") < r.stdout.index("For lot Q26-102:")
    assert r.stdout.count("Decision support only") == 2


def test_predict_lot_is_recorded_under_the_stored_spelling(run, tmp_path):
    """README, "One lot, one spelling" (Unicode NFKC, Unicode Standard Annex #15; dashes read as '-'; full case
    folding). `predict --lot ex-001` on a store holding EX-001 used to record the what-if under 'ex-001', split
    from the lot; now it is recorded and stated under the stored spelling. A lot not made yet is recorded as the
    reader would read it (spaces collapsed), and an id with an invisible character is refused, nothing recorded.
    A regression test of the store's own rule (no outside source needed beyond the standard named)."""
    from pathlib import Path

    from linkage.api import ingest
    from linkage.store import LotStore

    store = tmp_path / "lots.db"
    ingest(Path(__file__).resolve().parents[1] / "data" / "template-example", store=store)
    where = ("--set", "roll_force_kn_per_cm=9", "--store", str(store), "--json")
    for given, recorded in (("ex-001", "EX-001"), ("EX\u2013002", "EX-002"), ("  ex-901 ", "ex-901")):
        r = run("predict", "--lot", given, *where)
        assert r.exit_code == 0, r.output
        assert json.loads(r.stdout)["lot"] == recorded
    r = run("predict", "--lot", "EX-001\u200b", *where)
    assert r.exit_code == 2 and "U+200B ZERO WIDTH SPACE" in r.output
    with LotStore(store, create=False) as s:
        assert [e["lot"] for e in s.audit() if e["action"] == "predict"] == ["EX-001", "EX-002", "ex-901"]
        assert [p["lot"] for p in s.predictions()] == ["EX-001", "EX-002", "ex-901"]


@pytest.mark.parametrize("text", ["roll_force_kn_per_cm,roll_gap_mm\n9,2.5\n,\n8,2.4\n",
                                  "lot,roll_force_kn_per_cm,roll_gap_mm\nQ-1,9,2.5\nQ-2,,\nQ-3,8,2.4\n",
                                  "roll_force_kn_per_cm,roll_gap_mm\n9,2.5\nNA,n/a\n8,2.4\n"])
def test_predict_from_csv_refuses_a_row_with_no_value(run, tmp_path, text):
    """A regression test of a refusal (no outside source needed): a row of empty cells used to be dropped
    without a word when the file had no lot column (3 rows gave 2 what-ifs), and predicted with every setting
    held at the training mean when it had one. The README does not say that an empty row means "all settings
    held", so it is refused in both cases: exit 2, the file, the row (header = row 1) and the rule."""
    planned = tmp_path / "planned.csv"
    planned.write_text(text, encoding="utf-8")
    r = run("predict", "--from-csv", str(planned), "--json")
    assert r.exit_code == 2, r.output
    assert "1 problem found" in r.output
    assert "planned.csv, row 3: the row holds no value" in r.output


def test_predict_from_csv_reports_every_problem_of_the_file_at_once(run, tmp_path):
    """A regression test of a refusal (no outside source needed): the problems of a --from-csv file used to come
    in rounds (cells that are no number, then unknown columns, then range errors one at a time), without the file,
    and an unknown column was called "row 2". Now all at once, each with file, row (header = row 1), column,
    value and rule, as the ingest reader reports them."""
    planned = tmp_path / "planned.csv"
    planned.write_text("roll_force_kn_per_cm,roll_gap_mm,roll_forse\n9,wide,1\n99,2.5,\n-1,2.5,\n9,2.5\n",
                       encoding="utf-8")
    r = run("predict", "--from-csv", str(planned))
    assert r.exit_code == 2, r.output
    assert "5 problems found; nothing was written." in r.output
    for line in ("planned.csv, row 1, column 'roll_forse': unknown name; valid names are: lot, product, "
                 "roll_force_kn_per_cm",
                 "planned.csv, row 2, column 'roll_gap_mm', value 'wide': not a number",
                 "planned.csv, row 3, column 'roll_force_kn_per_cm', value '99': roll_force_kn_per_cm = 99 is "
                 "outside the possible range",
                 "planned.csv, row 4, column 'roll_force_kn_per_cm', value '-1': roll_force_kn_per_cm = -1 is "
                 "outside the possible range",
                 "planned.csv, row 5: 2 fields under a header of 3"):
        assert line in r.output


def test_predict_set_reports_every_problem_at_once(run):
    """A regression test of a refusal (no outside source needed): `--set roll_gap_mm=abc --set foo=2 --set
    ribbon_porosity=1.5` used to report the first problem only; now all three."""
    r = run("predict", "--set", "roll_gap_mm=abc", "--set", "foo=2", "--set", "ribbon_porosity=1.5")
    assert r.exit_code == 2, r.output
    for part in ("roll_gap_mm: 'abc' is not a number", "unknown name 'foo'",
                 "ribbon_porosity = 1.5 must lie between 0 and 1"):
        assert part in r.output


@pytest.mark.parametrize("args, code, message", [
    (("predict", "--set", "roll_forse=9"), 2, "unknown name 'roll_forse'"),
    (("predict", "--set", "ribbon_porosity=31"), 2, "between 0 and 1"),
    (("predict", "--set", "roll_gap_mm=abc"), 2, "'abc' is not a number"),
    (("predict",), 2, "nothing to predict from"),
    (("predict", "--set", "ribbon_porosity=0.3", "--model", "m-20990101T000000Z-00000000"), 2, "available:"),
    # a path instead of an id is bad input (exit 2, the README's exit-code line; it was 4 before the user test)
    (("predict", "--set", "ribbon_porosity=0.3", "--model", "../elsewhere"), 2, "is a path, not a model id"),
    (("window", "--spec", "SPEC", "--confidence", "1.5"), 2, "is not in the range 0<x<1"),
    (("window", "--spec", "SPEC", "--confidence", "nan"), 2, "is not a finite number"),
])
def test_errors_exit_with_a_message(run, saved_model, args, code, message):
    _, _, spec_path = saved_model
    args = [str(spec_path) if a == "SPEC" else a for a in args]
    r = run(*args)
    assert r.exit_code == code, r.output
    assert message in r.stderr
    assert "Traceback" not in r.output


def test_predict_from_csv_reads_plans_own_process_csv(run, saved_model, tmp_path):
    """A second user test: plan's process.csv (lot, product, the template's columns, some blank) could not be fed
    back to `predict --from-csv`: 'product' and the blank template columns were refused as unknown names. Now the
    product is stated on each row's result (as --product is), and template columns that are no name of the model
    are ignored when blank in every row, with a note naming them; a value in one is refused (no silent drop).
    A regression test of a refusal: no outside source."""
    from linkage.models.lean import as_lean
    from linkage.models.registry import load

    models_dir, model_id, _ = saved_model
    trained = list(getattr(as_lean(load(models_dir, model_id)), "products", None) or [])
    product = trained[0] if trained else "QZ-417 200 mg"
    head = "lot,product,compactor,manufactured_at,roll_force_kn_per_cm,roll_gap_mm,roll_diameter_mm"
    planned = tmp_path / "process.csv"
    planned.write_text(f"{head}\nPLAN-001,{product},,,9,2.5,\nPLAN-002,{product},,,8,2.4,\n", encoding="utf-8")
    r = run("predict", "--from-csv", str(planned), "--json")
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)
    assert [(x["lot"], x["product"]) for x in d] == [("PLAN-001", product), ("PLAN-002", product)]
    assert "compactor, manufactured_at, roll_diameter_mm ignored" in r.stderr
    planned.write_text(f"{head}\nPLAN-001,{product},C-7,,9,2.5,\n", encoding="utf-8")
    r = run("predict", "--from-csv", str(planned))
    assert r.exit_code == 2
    assert "process.csv, row 1, column 'compactor': unknown name; valid names are: lot, product, " in r.output


@pytest.mark.parametrize("text, message", [
    ("lot,roll_force_kn_per_cm\n", "planned.csv, row 1: no rows: the file holds a header and no what-if"),
    ("lot,roll_force_kn_per_cm\nA1,9\na1,8\n",
     "planned.csv, row 3, column 'lot', value 'a1': lot 'a1' is lot 'A1' written another way"),
    ("lot,Lot,roll_force_kn_per_cm\nA1,A1,9\n", "planned.csv, row 1, column 'lot': column appears more than once"),
])
def test_predict_from_csv_refuses_what_ingest_refuses(run, tmp_path, text, message):
    """A second user test: a header-only file exited 0 with nothing; 'A1' and 'a1' in one file were two lots
    (ingest refuses two spellings of one lot, linkage.lotid); 'Lot' and 'lot' are one column, as ingest matches
    headers in any case. A regression test of a refusal: no outside source."""
    planned = tmp_path / "planned.csv"
    planned.write_text(text, encoding="utf-8")
    r = run("predict", "--from-csv", str(planned))
    assert r.exit_code == 2, r.output
    assert message in r.output


def test_predict_from_csv_matches_headers_in_any_case(run, tmp_path):
    """A second user test: a header 'Lot' was refused as an unknown name though ingest reads it as lot; a name in
    another case ('Roll_Gap_MM') is that name, as ingest matches template headers. A regression test: no outside
    source."""
    planned = tmp_path / "planned.csv"
    planned.write_text(" Lot ,Roll_Force_kn_per_cm,Roll_Gap_MM\nQ26-101,9,2.5\n", encoding="utf-8")
    r = run("predict", "--from-csv", str(planned), "--json")
    assert r.exit_code == 0, r.output
    [d] = json.loads(r.stdout)
    assert d["lot"] == "Q26-101"
    assert d["inputs"]["roll_gap_mm"]["value"] == 2.5 and d["inputs"]["roll_gap_mm"]["source"] == "given"
