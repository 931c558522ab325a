"""Property tests of the lot store (hypothesis): random valid tables go through
CSV and the store unchanged, and a change to one cell revises exactly that lot.

The reference is the table as linkage.read reads it from the CSV file that
Python's csv module wrote (RFC 4180), with floats written by ``repr``, which
round-trips every finite double (Python 3.1+ shortest float repr).
"""

from __future__ import annotations

import csv
import tempfile
from pathlib import Path

import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from linkage.read import read_folder
from linkage.schema import MISSING_TOKENS
from linkage.store import LotStore

SETTINGS = settings(max_examples=20, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])

names = st.text(st.characters(categories=("L", "N"), max_codepoint=0x24F) | st.sampled_from(list("-_.;,\"")),
                min_size=1, max_size=6).filter(lambda s: s.strip().lower() not in MISSING_TOKENS)
positive = st.floats(min_value=1e-9, max_value=1.0, exclude_min=True)
any_float = st.floats(allow_nan=False, allow_infinity=False)
free_text = st.text(st.characters(codec="utf-8", exclude_categories=("Cs", "Cc")), max_size=10)


@st.composite
def folders(draw):
    lots = draw(st.lists(names, min_size=1, max_size=4, unique_by=lambda s: s.strip()))
    process = [["lot", "roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm", "screw_speed_rpm",
                "mill_screen_mm", "api_d50_um", "supplier"]]
    ribbon = [["lot", "sample", "envelope_density_g_cm3", "skeletal_density_g_cm3", "ribbon_thickness_mm"]]
    for lot in lots:
        process.append([lot, 60 * draw(positive), 15 * draw(positive), 100 * draw(positive),
                        500 * draw(positive), 10 * draw(positive),
                        draw(any_float | st.none()), draw(free_text)])
        for sample in draw(st.lists(names, min_size=1, max_size=3, unique_by=lambda s: s.strip())):
            a, b = 5 * draw(positive), 5 * draw(positive)
            ribbon.append([lot, sample, min(a, b), max(a, b), draw(st.none() | st.just(50 * draw(positive)))])
    return {"process": process, "ribbon": ribbon}


def write(folder: Path, tables: dict[str, list[list]]) -> None:
    folder.mkdir(exist_ok=True)
    for name, rows in tables.items():
        with open(folder / f"{name}.csv", "w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)
            for r in rows:
                w.writerow(["" if v is None else repr(v) if isinstance(v, float) else v for v in r])


@SETTINGS
@given(tables=folders())
def test_random_tables_round_trip_through_the_store(tables):
    with tempfile.TemporaryDirectory() as d:
        src = Path(d) / "in"
        write(src, tables)
        ingest = read_folder(src)
        with LotStore(Path(d) / "s.db") as store:
            result = store.ingest(ingest, reason="a test revision")
            assert len(result.lots_new) == len(tables["process"]) - 1
            stored = store.current_tables()
            for name, df in ingest.tables.items():
                pd.testing.assert_frame_equal(stored[name], df, check_exact=True)
            again = store.ingest(read_folder(src), reason="a test revision")
            assert not again.changed and len(again.lots_unchanged) == len(result.lots_new)


@SETTINGS
@given(tables=folders(), pick=st.integers(0, 1000), value=st.floats(min_value=0.01, max_value=4.0))
def test_one_changed_cell_revises_exactly_its_lot(tables, pick, value):
    with tempfile.TemporaryDirectory() as d:
        src = Path(d) / "in"
        write(src, tables)
        with LotStore(Path(d) / "s.db") as store:
            store.ingest(read_folder(src), reason="a test revision")
            k = 1 + pick % (len(tables["ribbon"]) - 1)
            row = tables["ribbon"][k]
            old = row[3]
            new = old + value  # skeletal density goes up: still >= envelope density, still <= 5 + 4
            if new > 5:
                new = max(row[2], old / 2)
            if new == old:
                return
            row[3] = new
            write(src, {"ribbon": tables["ribbon"]})
            lot = read_folder(src).tables["ribbon"]["lot"].iloc[k - 1]
            result = store.ingest(read_folder(src), reason="a test revision")
            assert result.lots_revised == [lot]
            (change,) = store.history(lot)[-1]["changes"]
            assert (change["column"], change["old"], change["new"]) == ("skeletal_density_g_cm3", old, new)
