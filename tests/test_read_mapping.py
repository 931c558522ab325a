"""The mapping file columns.toml: the lab's headers and units, converted on read.

Conversion factors are checked against their definitions, not against the
module's own table: SI Brochure, 9th ed. (BIPM 2019), Table 7 prefixes
(milli = 1e-3, kilo = 1e3, centi = 1e-2) give 1 kg/m3 = 1000 g / 1e6 cm3 =
1e-3 g/cm3 and 1 mg = 1e-3 g; the kilogram-force is 9.80665 N (standard
acceleration of gravity, 3rd CGPM 1901, quoted in the SI Brochure, sec. 2.3.1
note). Specific roll force is the total roll force divided by the roll width
(kN/cm), as roll forces are quoted in studies (references.md sec. 10:
"2-16 kN/cm specific compaction force").
"""

from __future__ import annotations

from pathlib import Path

import pytest

from linkage.exceptions import InputError
from linkage.read import Mapping, read_folder, read_mapping, read_table

PROCESS_REST = "roll_gap_mm,roll_speed_rpm,screw_speed_rpm,mill_screen_mm"


def write(folder: Path, name: str, text: str) -> Path:
    path = folder / name
    path.write_text(text, encoding="utf-8")
    return path


def test_density_in_kg_per_m3(tmp_path):
    mapping = Mapping.from_dict({"ribbon": {"columns": {
        "Envelope density (kg/m³)": {"column": "envelope_density_g_cm3", "unit": "kg/m³"},
        "Skeletal density [kg/m3]": {"column": "skeletal_density_g_cm3", "unit": "kg/m3"},
        "Sample No.": "sample", "Batch": "lot"}}})
    path = write(tmp_path, "ribbon.csv", "Batch,Sample No.,Envelope density (kg/m³),Skeletal density [kg/m3]\n"
                                         "A,1,1200,1500\n")
    df = read_table(path, mapping=mapping)
    assert df["envelope_density_g_cm3"].iloc[0] == pytest.approx(1.2, rel=1e-15)   # 1200 kg/m3 = 1.2 g/cm3
    assert df["skeletal_density_g_cm3"].iloc[0] == pytest.approx(1.5, rel=1e-15)


def test_total_roll_force_per_roll_width(tmp_path):
    write(tmp_path, "columns.toml", '[process.columns]\n'
                                    '"Roll force (kN)" = { column = "roll_force_kn_per_cm", unit = "kN", '
                                    'roll_width_cm = 4 }\n')
    write(tmp_path, "process.csv", f"lot,Roll force (kN),{PROCESS_REST}\nA,40,2,5,20,1\nB,36,2,5,20,1\n")
    write(tmp_path, "ribbon.csv", "lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3\nA,1,1,1.5\n")
    ingest = read_folder(tmp_path)
    # 40 kN over a 4 cm roll = 10 kN/cm; 36 kN -> 9 kN/cm
    assert ingest.tables["process"]["roll_force_kn_per_cm"].tolist() == pytest.approx([10.0, 9.0], rel=1e-15)
    assert ingest.other_sources["columns.toml"]["sha256"]


def test_total_roll_force_with_width_from_rows(tmp_path):
    mapping = Mapping.from_dict({"process": {"columns": {
        "Force total": {"column": "roll_force_kn_per_cm", "unit": "N"},
        "Roll width (cm)": {"column": "roll_width_mm", "unit": "cm"}}}})
    path = write(tmp_path, "process.csv", f"lot,Force total,Roll width (cm),{PROCESS_REST}\n"
                                          f"A,40000,4,2,5,20,1\nB,25000,2.5,2,5,20,1\nC,25000,,2,5,20,1\n")
    with pytest.raises(InputError) as exc:
        read_table(path, mapping=mapping)
    (p,) = exc.value.problems
    assert (p.row, p.column, p.value) == (4, "Force total", "25000") and "needs the roll width" in p.rule
    path.write_text(path.read_text().replace("C,25000,,", "C,25000,5,"))
    df = read_table(path, mapping=mapping)
    assert df["roll_width_mm"].tolist() == [40.0, 25.0, 50.0]   # cm -> mm, x10
    # 40000 N = 40 kN on 4 cm -> 10 kN/cm; 25 kN on 2.5 cm -> 10 kN/cm; 25 kN on 5 cm -> 5 kN/cm
    assert df["roll_force_kn_per_cm"].tolist() == pytest.approx([10.0, 10.0, 5.0], rel=1e-15)


def test_mapping_width_disagreeing_with_row_refused(tmp_path):
    mapping = Mapping.from_dict({"process": {"columns": {
        "F": {"column": "roll_force_kn_per_cm", "unit": "kN", "roll_width_mm": 40}}}})
    path = write(tmp_path, "process.csv", f"lot,F,roll_width_mm,{PROCESS_REST}\nA,40,40,2,5,20,1\nB,40,50,2,5,20,1\n")
    with pytest.raises(InputError) as exc:
        read_table(path, mapping=mapping)
    (p,) = exc.value.problems
    assert (p.row, p.column, p.value) == (3, "roll_width_mm", 50.0) and "differs from 40 mm" in p.rule


def test_mass_force_time_conversions(tmp_path):
    mapping = Mapping.from_dict({
        "granules": {"columns": {"Retained (mg)": {"column": "retained_g", "unit": "mg"}}},
        "tablets": {"columns": {"Hardness (kp)": {"column": "breaking_force_n", "unit": "kp"}}},
        "dissolution": {"columns": {"t (h)": {"column": "time_min", "unit": "h"},
                                    "released": {"column": "released_pct", "unit": "fraction"}}},
    })
    g = read_table(write(tmp_path, "granules.csv", "lot,sieve_um,Retained (mg)\nA,500,2500\nA,0,125\n"),
                   mapping=mapping)
    assert g["retained_g"].tolist() == pytest.approx([2.5, 0.125], rel=1e-15)   # mg x 1e-3 = g
    t = read_table(write(tmp_path, "tablets.csv", "lot,compression_force_kn,Hardness (kp)\nA,10,8\n"),
                   mapping=mapping)
    assert t["breaking_force_n"].iloc[0] == pytest.approx(8 * 9.80665, rel=1e-15)   # 1 kp = 9.80665 N
    d = read_table(write(tmp_path, "dissolution.csv", "lot,vessel,t (h),released\nA,1,0.5,0.85\n"),
                   mapping=mapping)
    assert d["time_min"].iloc[0] == pytest.approx(30.0) and d["released_pct"].iloc[0] == pytest.approx(85.0)


def test_bounds_checked_after_conversion(tmp_path):
    mapping = Mapping.from_dict({"ribbon": {"columns": {"rho (kg/m3)": {"column": "envelope_density_g_cm3",
                                                                        "unit": "kg/m3"}}}})
    path = write(tmp_path, "ribbon.csv", "lot,sample,rho (kg/m3),skeletal_density_g_cm3\nA,1,6000,1.5\n")
    with pytest.raises(InputError) as exc:
        read_table(path, mapping=mapping)
    (p,) = exc.value.problems
    assert (p.row, p.column, p.value) == (2, "rho (kg/m3)", "6000")
    assert "envelope_density_g_cm3 <= 5" in p.rule and "converted to 6 g/cm3" in p.rule


def test_extra_column_rename(tmp_path):
    mapping = Mapping.from_dict({"process": {"columns": {"Blend moisture (%)": {"column": "blend_moisture_pct",
                                                                               "extra": True}}}})
    path = write(tmp_path, "process.csv", f"lot,roll_force_kn_per_cm,{PROCESS_REST},Blend moisture (%)\n"
                                          "A,9,2,5,20,1,2.5\n")
    assert read_table(path, mapping=mapping)["blend_moisture_pct"].tolist() == [2.5]


@pytest.mark.parametrize("data, expected", [
    ({"tablet": {"columns": {}}}, "unknown table [tablet] (did you mean 'tablets'?)"),
    ({"ribbon": {"columns": {"x": "envelope_density"}}}, "unknown target column 'envelope_density'"),
    ({"ribbon": {"columns": {"x": {"column": "envelope_density_g_cm3", "unit": "lb/ft3"}}}},
     "unknown unit 'lb/ft3' for envelope_density_g_cm3 [g/cm3]; accepted: g/cm3, g/mL, g/ml, kg/L, kg/l, kg/m3"),
    ({"process": {"columns": {"x": {"column": "roll_gap_mm", "unit": "kN"}}}}, "unknown unit 'kN'"),
    ({"process": {"columns": {"x": {"column": "lot", "unit": "mm"}}}}, "takes no unit conversion"),
    ({"process": {"columns": {"x": {"column": "roll_gap_mm", "unit": "cm", "roll_width_mm": 40}}}},
     "only goes with a total roll force"),
    ({"process": {"columns": {"x": {"column": "roll_force_kn_per_cm", "unit": "kN", "roll_width_mm": 0}}}},
     "roll_width_mm must be a number > 0"),
    ({"process": {"columns": {"x": "roll_gap_mm", "y": "roll_gap_mm"}}}, "already the target of \"x\""),
    ({"process": {"columns": {"x": {"column": "roll_gap_mm", "scale": 2}}}}, "unknown key(s) scale"),
    ({"process": {"units": {}}}, "may only hold a [process.columns] table"),
    ({"process": {"columns": {"x": {"column": "roll_gap_mm", "extra": True}}}}, "an extra column takes only"),
])
def test_bad_mapping_is_a_clear_error(data, expected):
    with pytest.raises(InputError) as exc:
        Mapping.from_dict(data)
    (p,) = exc.value.problems
    assert p.file == "columns.toml" and expected in p.rule


def test_mapping_file_errors_stop_the_folder(tmp_path):
    write(tmp_path, "columns.toml", "[process.columns\n")
    write(tmp_path, "process.csv", "lot\nA\n")
    with pytest.raises(InputError) as exc:
        read_folder(tmp_path)
    (p,) = exc.value.problems
    assert p.file == "columns.toml" and p.row == 1 and "not valid TOML" in p.rule
    write(tmp_path, "columns.toml", '[ribbon.columns]\n"a" = "nope"\n"b" = { column = "sample", unit = "mm" }\n')
    with pytest.raises(InputError) as exc:
        read_mapping(tmp_path / "columns.toml")
    assert [p.column for p in exc.value.problems] == ["a", "b"]  # every problem of the file at once
