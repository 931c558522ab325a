"""The whole job on the demo scenario, callable from Python and from
``linkage demo``: ingest, assemble, train, window, a what-if sheet, the report.

The demo works in a folder of its own (``reports/demo`` by default): its own
lot store and model registry, never the user's.
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable


def _demo_data() -> Path:
    """The demo scenario's folder. It is data_demo/ at the top of the repository, shipped
    inside the installed package as ``linkage.data_demo`` (pyproject.toml maps the one to the
    other); a source tree put on the path by hand has only the top-level folder."""
    import importlib.util

    spec = importlib.util.find_spec("linkage.data_demo")
    if spec is not None and spec.submodule_search_locations:
        return Path(next(iter(spec.submodule_search_locations)))
    return Path(__file__).resolve().parents[1] / "data_demo"


#: the demo scenario (see data_demo/README.md)
DEMO_DATA = _demo_data()


@dataclass
class DemoOutputs:
    folder: Path
    store: Path
    models_dir: Path
    model_id: str
    assembled: Path
    window_json: Path
    whatif_html: Path
    report: Path
    seconds: dict[str, float] = field(default_factory=dict)
    #: the demo's spec file, copied into the folder (the copy is the one used), for later commands' --spec
    spec: Path | None = None
    #: the window found, in words on one line (:meth:`linkage.results.Windowed.headline`)
    window_line: str | None = None


def run_demo(out: Path = Path("reports/demo"), *, data: Path = DEMO_DATA,
             step: Callable[[str], None] | None = None,
             progress: Callable[[str, int, int], None] | None = None) -> DemoOutputs:
    """Run every step on the demo data and return where each output went.

    Every step goes through the Python API (:mod:`linkage.api`), so the
    demo's store keeps the audit trail the commands would leave."""
    from linkage.api import Workspace
    from linkage.exceptions import UsageError
    from linkage.export import write_atomic, write_table_csv
    from linkage.report.sheet import whatif_html

    lots_dir = Path(data) / "lots"
    if not lots_dir.is_dir():
        raise UsageError(f"demo data not found at {lots_dir}; the installation of linkage is "
                         "incomplete (reinstall it), or regenerate the data with "
                         "'python data_demo/generate.py' in a checkout")
    say = step or (lambda message: None)
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    store_path = out / "demo-lots.db"
    for suffix in ("", "-wal", "-shm"):  # the demo's own store, made anew each run
        Path(f"{store_path}{suffix}").unlink(missing_ok=True)
    models_dir = out / "models"
    seconds: dict[str, float] = {}
    clock = time.perf_counter()

    def lap(name: str) -> None:
        nonlocal clock
        now = time.perf_counter()
        seconds[name] = round(now - clock, 2)
        clock = now

    lab = Workspace(store_path, models_dir=models_dir)
    say(f"ingesting {lots_dir}")
    spec = lab.ingest(lots_dir).spec
    spec_path = None
    if (lots_dir / "spec.toml").is_file():  # the spec beside the folder: a path later commands can be given
        from linkage.spec import read_spec

        spec_path = out / "spec.toml"
        write_atomic(spec_path, (lots_dir / "spec.toml").read_bytes())
        spec = read_spec(spec_path)
    remeasured = Path(data) / "remeasured"
    if remeasured.is_dir():
        say(f"ingesting the re-measured lot from {remeasured}")
        lab.ingest(remeasured, reason="demo: ribbon densities of one lot re-measured")
    lap("ingest")

    say("assembling one row per lot")
    table = lab.assemble(spec=spec)
    assembled = out / "assembled.csv"
    write_table_csv(table, assembled)
    lap("assemble")

    say("training the chain (grouped cross-validation by lot)")
    trained = lab.train(spec=spec, seed=0, progress=progress)
    model_id = trained.model_id
    lap("train")

    say("finding the porosity window")
    window = lab.window(spec, model=trained, confidence=0.9)
    window_json = out / "window.json"
    write_atomic(window_json, json.dumps(window.to_dict(), indent=2).encode("utf-8"))
    lap("window")

    say("writing a what-if sheet")
    middle = (window.low.value + window.high.value) / 2 if window.found else float(
        trained.chain.training["medians"]["ribbon_porosity"])
    whatif = lab.whatif({"ribbon_porosity": round(middle, 3)}, spec=spec, model=trained)
    sheet = out / "whatif.html"
    write_atomic(sheet, whatif_html(whatif.result).encode("utf-8"))
    lap("what-if")

    say("writing the report")
    report = lab.report(out / "report.html", spec=spec, model=trained, window=window)
    lap("report")
    return DemoOutputs(folder=out, store=store_path, models_dir=models_dir, model_id=model_id,
                       assembled=assembled, window_json=window_json, whatif_html=sheet,
                       report=Path(report), seconds=seconds, spec=spec_path,
                       window_line=window.headline(roll_force=True) + ("" if window.result.promise else
                                                                       "; not promised (outside the domain)"))
