"""The input template and the assembled table: names, units and rules.

This module is the contract labs script against. Column names carry their
unit (``roll_gap_mm``, ``envelope_density_g_cm3``). Add columns freely;
never rename one without a note in the README's change list.

Each input table is one file in the ingest folder, named after the table
(``process.csv`` or ``process.xlsx``). Bounds are the physically possible
or plausible range; a value outside them is refused with the rule named.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

# kinds of a column's values
TEXT = "text"
NUMBER = "number"
DATETIME = "datetime"


@dataclass(frozen=True)
class Column:
    name: str
    kind: str = NUMBER
    unit: str = "-"
    description: str = ""
    #: the header must be present in the file
    required: bool = False
    #: every row must carry a value (keys are always non-empty)
    nonempty: bool = False
    low: float | None = None
    high: float | None = None
    low_inclusive: bool = True
    high_inclusive: bool = True

    def bound_text(self) -> str:
        lo = "" if self.low is None else f"{self.low} {'<=' if self.low_inclusive else '<'} "
        hi = "" if self.high is None else f" {'<=' if self.high_inclusive else '<'} {self.high}"
        return f"{lo}{self.name}{hi}"


@dataclass(frozen=True)
class Table:
    name: str
    description: str
    columns: tuple[Column, ...]
    #: columns that identify a row; duplicates of the key are refused
    key: tuple[str, ...]
    #: the table must be present in an ingest folder for the first ingest
    required: bool = False
    #: notes on row-level rules (checked in linkage.read)
    rules: tuple[str, ...] = field(default_factory=tuple)

    def column(self, name: str) -> Column:
        for c in self.columns:
            if c.name == name:
                return c
        raise KeyError(name)

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(c.name for c in self.columns)


LOT = Column("lot", TEXT, description="lot identifier, the key that joins every table",
             required=True, nonempty=True)

PROCESS = Table(
    "process",
    "Roller-compaction settings, one row per lot.",
    (
        LOT,
        Column("product", TEXT, description="product name; lets one store hold several products"),
        Column("compactor", TEXT, description="which compactor (scale or unit) made the lot"),
        Column("manufactured_at", DATETIME, description="start of the compaction run (ISO 8601); orders lots in time"),
        Column("roll_force_kn_per_cm", unit="kN/cm", description="specific roll force (per cm of roll width)",
               required=True, low=0, low_inclusive=False, high=60),
        Column("roll_gap_mm", unit="mm", description="roll gap", required=True,
               low=0, low_inclusive=False, high=15),
        Column("roll_speed_rpm", unit="rpm", description="roll speed", required=True,
               low=0, low_inclusive=False, high=100),
        Column("screw_speed_rpm", unit="rpm", description="feed screw speed", required=True,
               low=0, low_inclusive=False, high=500),
        Column("mill_screen_mm", unit="mm", description="mill screen aperture", required=True,
               low=0, low_inclusive=False, high=10),
        Column("roll_width_mm", unit="mm", description="roll width (optional)", low=0, low_inclusive=False, high=1000),
        Column("roll_diameter_mm", unit="mm", description="roll diameter (optional)", low=0, low_inclusive=False,
               high=2000),
    ),
    key=("lot",),
    required=True,
)

RIBBON = Table(
    "ribbon",
    "Ribbon density replicates, one row per sample; optional three-point bend per sample.",
    (
        LOT,
        Column("sample", TEXT, description="replicate identifier within the lot", required=True, nonempty=True),
        Column("envelope_density_g_cm3", unit="g/cm3", description="envelope density (powder displacement)",
               required=True, low=0, low_inclusive=False, high=5),
        Column("skeletal_density_g_cm3", unit="g/cm3", description="skeletal density (gas pycnometry)",
               required=True, low=0, low_inclusive=False, high=5),
        Column("sampled_at", DATETIME, description="when the sample was taken during the run (ISO 8601)"),
        Column("ribbon_break_force_n", unit="N", description="three-point bend breaking force",
               low=0, low_inclusive=False, high=1000),
        Column("ribbon_span_mm", unit="mm", description="three-point bend support span",
               low=0, low_inclusive=False, high=500),
        Column("ribbon_width_mm", unit="mm", description="ribbon specimen width",
               low=0, low_inclusive=False, high=500),
        Column("ribbon_thickness_mm", unit="mm", description="ribbon specimen thickness",
               low=0, low_inclusive=False, high=50),
    ),
    key=("lot", "sample"),
    required=True,
    rules=("envelope_density_g_cm3 <= skeletal_density_g_cm3",),
)

GRANULES = Table(
    "granules",
    "Sieve analysis in long form: mass retained on each aperture, 0 = pan.",
    (
        LOT,
        Column("sieve_um", unit="um", description="aperture the mass was retained on; 0 is the pan",
               required=True, nonempty=True, low=0, high=100_000),
        Column("retained_g", unit="g", description="mass retained", required=True, low=0, high=100_000),
    ),
    key=("lot", "sieve_um"),
    rules=("each lot's retained masses sum to more than 0 g",),
)

GRANULES_LASER = Table(
    "granules_laser",
    "Lot-level particle size from laser diffraction (volume basis).",
    (
        LOT,
        Column("d10_um", unit="um", required=True, low=0, low_inclusive=False, high=100_000),
        Column("d50_um", unit="um", required=True, low=0, low_inclusive=False, high=100_000),
        Column("d90_um", unit="um", required=True, low=0, low_inclusive=False, high=100_000),
    ),
    key=("lot",),
    rules=("d10_um <= d50_um <= d90_um",),
)

TABLETS = Table(
    "tablets",
    "Tablet test results, one row per lot.",
    (
        LOT,
        Column("compression_force_kn", unit="kN", description="main compression force", required=True,
               low=0, low_inclusive=False, high=100),
        Column("breaking_force_n", unit="N", description="mean diametral breaking force",
               low=0, low_inclusive=False, high=2000),
        Column("thickness_mm", unit="mm", description="overall tablet thickness", low=0, low_inclusive=False, high=30),
        Column("diameter_mm", unit="mm", description="tablet diameter", low=0, low_inclusive=False, high=30),
        Column("cup_depth_mm", unit="mm", description="depth of each convex face (0 or empty = flat-faced)",
               low=0, high=10),
        Column("weight_rsd_pct", unit="%", description="relative standard deviation of tablet weight",
               low=0, high=100),
        Column("friability_pct", unit="%", description="friability weight loss", low=0, high=100),
        Column("dissolution_pct", unit="%", description="mean released at the spec time point (% label claim)",
               low=0, high=150),
    ),
    key=("lot",),
    rules=("2 * cup_depth_mm < thickness_mm",),
)

TABLET_WEIGHTS = Table(
    "tablet_weights",
    "Individual tablet weights.",
    (
        LOT,
        Column("unit", TEXT, description="tablet identifier within the lot", required=True, nonempty=True),
        Column("weight_mg", unit="mg", required=True, nonempty=True, low=0, low_inclusive=False, high=100_000),
    ),
    key=("lot", "unit"),
)

DISSOLUTION = Table(
    "dissolution",
    "Dissolution by vessel and time point (% of label claim released).",
    (
        LOT,
        Column("vessel", TEXT, required=True, nonempty=True),
        Column("time_min", unit="min", required=True, nonempty=True, low=0, high=10_000),
        Column("released_pct", unit="%", required=True, low=0, high=150),
    ),
    key=("lot", "vessel", "time_min"),
)

TABLES: dict[str, Table] = {
    t.name: t for t in (PROCESS, RIBBON, GRANULES, GRANULES_LASER, TABLETS, TABLET_WEIGHTS, DISSOLUTION)
}

#: Columns of the assembled table (one row per lot), with units. Process
#: settings and extra numeric columns of ``process`` are carried through as
#: they are.
ASSEMBLED: dict[str, str] = {
    "lot": "-",
    "product": "-",
    "compactor": "-",
    "manufactured_at": "ISO 8601",
    "roll_force_kn_per_cm": "kN/cm",
    "roll_gap_mm": "mm",
    "roll_speed_rpm": "rpm",
    "screw_speed_rpm": "rpm",
    "mill_screen_mm": "mm",
    "compression_force_kn": "kN",
    "ribbon_porosity": "-",
    "ribbon_porosity_sd": "-",
    "ribbon_samples": "count",
    "ribbon_solid_fraction": "-",
    "ribbon_tensile_strength_mpa": "MPa",
    "granule_d10_um": "um",
    "granule_d50_um": "um",
    "granule_d90_um": "um",
    "granule_span": "-",
    "granule_size_source": "sieve | laser",
    "fines_pct": "%",
    "rrsb_x_prime_um": "um",
    "rrsb_n": "-",
    "tensile_strength_mpa": "MPa",
    "tensile_strength_method": "-",
    "breaking_force_n": "N",  # carried through from the tablets table, a target of the default chain
    "weight_rsd_pct": "%",
    "weight_units": "count",
    "weight_acceptance_value": "-",
    "friability_pct": "%",
    "dissolution_pct": "%",
    "dissolution_sd_pct": "%",
    "dissolution_vessels": "count",
    "dissolution_s1_pass": "bool",
}

#: Physical bounds of each predicted quantity (assembled unit): a prediction,
#: an interval end and a Monte Carlo draw of that quantity is projected onto
#: them before it is shown or judged (:func:`linkage.models.lean.project`).
#: (low, high, low_open, high_open); an open end means the bound itself is
#: impossible, and a value is held a hair inside it (``OPEN_MARGIN`` of the
#: range). Where the template states a bound for a measurement of the same
#: quantity (``TABLES``), that bound is used, so that no prediction is a value
#: the tool would refuse as a measurement. By definition: porosity = 1 −
#: envelope/skeletal density and solid fraction = 1 − porosity lie strictly
#: between 0 and 1 for a ribbon that holds together and has pores; fines and
#: friability are shares of a mass (0–100 %); an RSD, a size, a span, a
#: strength, a force and an acceptance value are not negative. Dissolution is
#: 0 to 150 % of label claim, the template's bound of ``tablets.dissolution_pct``
#: and ``dissolution.released_pct`` (release above 100 % happens when content
#: exceeds the label claim). Strengths and sizes have no upper bound here: the
#: template's upper ends for them (``spec.DERIVED_RANGES``, the laser table)
#: guard against a unit slip, they are not physics.
PHYSICAL_BOUNDS: dict[str, tuple[float, float, bool, bool]] = {
    "ribbon_porosity": (0.0, 1.0, True, True),
    "ribbon_solid_fraction": (0.0, 1.0, True, True),
    "ribbon_porosity_sd": (0.0, math.inf, False, False),
    "ribbon_tensile_strength_mpa": (0.0, math.inf, False, False),
    "granule_d10_um": (0.0, math.inf, False, False),
    "granule_d50_um": (0.0, math.inf, False, False),
    "granule_d90_um": (0.0, math.inf, False, False),
    "granule_span": (0.0, math.inf, False, False),
    "fines_pct": (0.0, 100.0, False, False),
    "rrsb_x_prime_um": (0.0, math.inf, False, False),
    "rrsb_n": (0.0, math.inf, False, False),
    "tensile_strength_mpa": (0.0, math.inf, False, False),
    "breaking_force_n": (0.0, math.inf, False, False),
    "weight_rsd_pct": (TABLETS.column("weight_rsd_pct").low, TABLETS.column("weight_rsd_pct").high, False, False),
    "weight_acceptance_value": (0.0, math.inf, False, False),
    "friability_pct": (TABLETS.column("friability_pct").low, TABLETS.column("friability_pct").high, False, False),
    "dissolution_pct": (TABLETS.column("dissolution_pct").low, TABLETS.column("dissolution_pct").high, False, False),
    "dissolution_sd_pct": (0.0, math.inf, False, False),
}

#: how far inside an open physical bound a projected value is held, as a share of the range (common practice, no
#: source: small against any measured porosity, large enough that ln or logit of it stays finite)
OPEN_MARGIN = 1e-6


#: Quality attributes a spec file may name (the assembled columns that are
#: measured results).
QUALITY_ATTRIBUTES: tuple[str, ...] = (
    "ribbon_porosity",
    "ribbon_solid_fraction",
    "ribbon_tensile_strength_mpa",
    "granule_d10_um",
    "granule_d50_um",
    "granule_d90_um",
    "granule_span",
    "fines_pct",
    "tensile_strength_mpa",
    "breaking_force_n",
    "weight_rsd_pct",
    "weight_acceptance_value",
    "friability_pct",
    "dissolution_pct",
)

#: For a lot-mean target, where the assembled table keeps the within-lot
#: replicate SD and count: the measurement noise floor is estimated from them.
NOISE_COLUMNS: dict[str, tuple[str, str]] = {
    "ribbon_porosity": ("ribbon_porosity_sd", "ribbon_samples"),
    "dissolution_pct": ("dissolution_sd_pct", "dissolution_vessels"),
}

#: Missing-value spellings accepted in input files (case-insensitive, trimmed).
MISSING_TOKENS: frozenset[str] = frozenset({"", "na", "n/a", "nan", "null", "none", "-", "#n/a"})

DEFAULT_FINES_CUTOFF_UM = 125.0
DEFAULT_DISSOLUTION_TIME_MIN = 30.0
