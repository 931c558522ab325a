"""linkage: roller-compaction settings, ribbon porosity, granules and tablet
quality, linked lot by lot.

Predictions are decision support, not release testing: batches are released
on pharmacopeial tests under the site's quality system, and a qualified person
decides.

From Python, the whole job is a few calls on a :class:`Workspace` (a lot
store and a model registry), each recording what the command of the same
name records; see :mod:`linkage.api` and the README's "From Python"::

    import linkage

    lab = linkage.Workspace("site.db", models_dir="models")
    lab.ingest("lab_exports/june")
    trained = lab.train()
    window = lab.window("spec.toml")

``import linkage`` stays cheap: the API is imported on first use.
"""

__version__ = "0.1.0"

CAUTION = (
    "Decision support only, not release testing. Batches are released on "
    "pharmacopeial tests under the site's quality system and local regulations, "
    "and a qualified person decides."
)

#: names imported on first use (module-level ``__getattr__``, PEP 562), so that ``import linkage`` and
#: ``linkage predict`` import neither pandas nor scikit-learn
_LAZY = {
    "Workspace": "linkage.api",
    "api": "linkage.api",
    "DEMO_DATA": "linkage.demo",
}

__all__ = ["__version__", "CAUTION", *_LAZY]


def __getattr__(name: str):
    if name in _LAZY:
        import importlib

        module = importlib.import_module(_LAZY[name])
        value = module if name == module.__name__.rsplit(".", 1)[-1] else getattr(module, name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'linkage' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted({*globals(), *_LAZY})
