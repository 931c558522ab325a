"""The report's HTML templates (jinja2, autoescape on).

Every section's numbers and sentences are computed in Python
(:mod:`linkage.report.html` and the section modules); the templates in
``linkage/report/templates/`` only place them. Autoescaping is on for every
template, so a lot name, product, compactor or note from a user's files is
escaped wherever it is put, without a call to remember; a fragment that is
already HTML (a table made by a template, a figure) is passed as
:class:`markupsafe.Markup`. Undefined names fail loudly (``StrictUndefined``).
Escaping is :func:`html.escape`'s (see :func:`_escaped`).
"""

from __future__ import annotations

import html
from functools import lru_cache
from pathlib import Path

from markupsafe import Markup

from linkage.numbers import percent_text

__all__ = ["Markup", "render", "macro", "environment", "TEMPLATES"]

#: the template folder, shipped as package data (pyproject.toml)
TEMPLATES = Path(__file__).with_name("templates")


def _escaped(value):
    """Every value a template prints: Markup as it is, anything else escaped
    as :func:`html.escape` escapes it (``&quot;``, ``&#x27;``: the report's
    escaping before it moved to templates, kept so that its text is the same)."""
    if isinstance(value, Markup) or hasattr(value, "__html__"):
        return value
    return Markup(html.escape(str(value), quote=True))


@lru_cache(maxsize=1)
def environment():
    """The one jinja2 environment of the report: templates from :data:`TEMPLATES`, autoescape on."""
    import jinja2

    env = jinja2.Environment(loader=jinja2.FileSystemLoader(TEMPLATES), autoescape=True, finalize=_escaped,
                             undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True)
    env.filters["percent"] = percent_text  # 0.9 -> "90%", 0.9999 -> "99.99%" (linkage.numbers.percent_text)
    return env


def render(name: str, **context) -> Markup:
    """Template ``name`` rendered with ``context``, as safe HTML for the next template."""
    return Markup(environment().get_template(name).render(**context))


def macro(name: str, which: str):
    """The macro ``which`` of template ``name`` (a function returning Markup)."""
    return getattr(environment().get_template(name).module, which)
