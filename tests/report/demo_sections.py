"""The demo report cut into sections, for the comparison test of issue 20.

:func:`sections` splits a rendered report at its ``<h2 id=...>`` headings
and gives, per section, its visible text (tags stripped, an image's alt text
kept, whitespace collapsed) and its number of figures; what varies from run
to run (model ids, timestamps, SHA-256 digests, paths) is replaced by a
placeholder. The stored fixture (``data/demo_sections.json``) was made with
``python -m tests.report.demo_sections`` from the report code before issue
20 changed it (main at 6827478, with this module copied in): a regression
fixture, not an outside reference. A change to the report's text elsewhere
(a section's wording, the demo's model) regenerates it the same way, from
the code before the change.
"""

from __future__ import annotations

import json
import re
from html.parser import HTMLParser
from pathlib import Path

FIXTURE = Path(__file__).with_name("data") / "demo_sections.json"

#: (pattern, placeholder): what differs between two runs on the same data and seed
VARIABLE = [
    (re.compile(r"m-\d{8}T\d{6}Z-[0-9a-f]{8}"), "<model id>"),
    (re.compile(r"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}(:\d{2}(\.\d+)?)?(Z|[+-]\d{2}:\d{2})?"), "<time>"),
    # the heading's times as the report writes them (page.trained_text): to the second, in UTC, said
    (re.compile(r"\d{4}-\d{2}-\d{2} \d{2}:\d{2}:\d{2} UTC"), "<time>"),
    (re.compile(r"\b[0-9a-f]{64}\b"), "<sha256>"),
    (re.compile(r"(/[\w.-]+)+/(demo-lots\.db|models|spec\.toml|report\.html)\b"), r"<path>/\2"),
    # the model card's library versions: the same report at the floors' pins (ci/constraints-floors.txt)
    (re.compile(r"\b(joblib|linkage|numpy|pandas|python|scikit-learn|scipy|shap|matplotlib|jinja2) "
                r"\d+(\.\d+)+[\w.+-]*"), r"\1 <version>"),
]


class _Cutter(HTMLParser):
    """Text and figure count per section; the part before the first h2 is "head"."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.order: list[str] = ["head"]
        self.text: dict[str, list[str]] = {"head": []}
        self.figures: dict[str, int] = {"head": 0}
        self._skip = 0  # inside <style>, <script> or <title>
        #: section id -> the sentences saying a result was reused (left out of the text, kept here)
        self.reused: dict[str, list[str]] = {}
        self._reused: list[str] | None = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "h2" and a.get("id"):
            key = a["id"]
            self.order.append(key)
            self.text[key], self.figures[key] = [], 0
        elif tag in ("style", "script", "title"):
            self._skip += 1
        elif tag == "p" and a.get("class") == "reused":
            self._reused = []
        elif tag == "img":
            self.text[self.order[-1]].append(f" [image: {a.get('alt', '')}] ")
        elif tag == "figure":
            self.figures[self.order[-1]] += 1
        if tag in ("p", "li", "tr", "td", "th", "br", "div", "figcaption", "h2", "h3", "summary"):
            self.text[self.order[-1]].append(" ")

    def handle_endtag(self, tag):
        if tag == "p" and self._reused is not None:
            self.reused.setdefault(self.order[-1], []).append(normalise("".join(self._reused)))
            self._reused = None
        elif tag in ("style", "script", "title"):
            self._skip -= 1
        elif tag in ("p", "li", "td", "th", "div", "h2", "h3"):
            self.text[self.order[-1]].append(" ")

    def handle_data(self, data):
        if self._reused is not None:
            self._reused.append(data)
        elif not self._skip:
            self.text[self.order[-1]].append(data)


def normalise(text: str) -> str:
    for pattern, placeholder in VARIABLE:
        text = pattern.sub(placeholder, text)
    return " ".join(text.split())


def _cut(html_text: str) -> _Cutter:
    cut = _Cutter()
    cut.feed(html_text)
    cut.close()
    return cut


def sections(html_text: str) -> dict[str, dict]:
    """{section id: {"text": normalised text, "figures": number of figures}}, in the report's order. A
    sentence saying that a result was reused from an earlier command is left out (see :func:`reused`)."""
    cut = _cut(html_text)
    return {k: {"text": normalise("".join(cut.text[k])), "figures": cut.figures[k]} for k in cut.order}


def reused(html_text: str) -> dict[str, list[str]]:
    """{section id: the sentences saying which result was reused rather than computed}."""
    return _cut(html_text).reused


def render_demo(folder: Path, outputs=None, name: str = "report-cli.html") -> str:
    """Render the demo's report as ``linkage report --spec`` does (window found in the report, or reused
    when stored), running the demo into ``folder`` first unless its ``outputs`` are given. Returns the HTML."""
    from linkage.api import report
    from linkage.demo import DEMO_DATA, run_demo
    from linkage.spec import read_spec

    out = outputs if outputs is not None else run_demo(Path(folder))
    path = report(Path(folder) / name, store=out.store, models_dir=out.models_dir, model=out.model_id,
                  spec=read_spec(DEMO_DATA / "lots" / "spec.toml"))
    return Path(path).read_text(encoding="utf-8")


if __name__ == "__main__":  # regenerate the fixture (only when a change of the report is intended)
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        found = sections(render_demo(Path(tmp)))
    FIXTURE.write_text(json.dumps(found, indent=1, ensure_ascii=False) + "\n", encoding="utf-8")
    print(f"{FIXTURE}: {len(found)} sections, {sum(s['figures'] for s in found.values())} figures")
