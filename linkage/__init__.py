"""linkage: roller-compaction settings, ribbon porosity, granules and tablet
quality, linked lot by lot.

Predictions are decision support, not release testing: batches are released
on pharmacopeial tests under the site's quality system, and a qualified person
decides.
"""

__version__ = "0.1.0"

CAUTION = (
    "Decision support only, not release testing. Batches are released on "
    "pharmacopeial tests under the site's quality system and local regulations, "
    "and a qualified person decides."
)

__all__ = ["__version__", "CAUTION"]
