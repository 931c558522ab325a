"""Makes tests/data/store-v2.db with linkage at main (store schema 2)."""
import shutil, sys, tempfile
from pathlib import Path
import linkage
from linkage.read import read_folder
from linkage.store import LotStore, SCHEMA_VERSION
assert SCHEMA_VERSION == 2, SCHEMA_VERSION
print(linkage.__file__)
example = Path(sys.argv[1]); out = Path(sys.argv[2])
tmp = Path(tempfile.mkdtemp())
rev = tmp / "rev"; rev.mkdir()
text = (example / "tablets.csv").read_text(encoding="utf-8").splitlines()
head, rows = text[0], text[1:]
cols = head.split(",")
j = cols.index("dissolution_pct")
first = rows[0].split(","); lot = first[0]
first[j] = str(round(float(first[j]) - 1.5, 2))
(rev / "tablets.csv").write_text("\n".join([head, ",".join(first)]) + "\n", encoding="utf-8")
if out.exists(): out.unlink()
with LotStore(out) as s:
    s.ingest(read_folder(example, known_lots=s.lot_ids()))
    s.ingest(read_folder(rev, known_lots=s.lot_ids()), reason="deviation D-1: dissolution re-tested")
    s.log("train", model_id="m-1", inputs={"lots": 4}, outputs={"ok": True})
    s.record_prediction("m-1", {"roll_gap_mm": 2.0}, {"ribbon_porosity": 0.3}, lot=lot)
    s.connection.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    print(lot, [h["revision"] for h in s.history(lot)])
# the anchor file (.seal) is kept beside the store: without it, the store is read but never upgraded or written
for ext in ("-wal", "-shm"):
    p = Path(str(out) + ext)
    if p.exists(): p.unlink()
