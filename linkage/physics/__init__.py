"""Published formulas as pure functions of numbers and arrays.

Inputs and outputs carry their unit in their names. No DataFrames here.

Topic modules: :mod:`~linkage.physics.porosity` (densities, solid fraction),
:mod:`~linkage.physics.psd` (sieve analysis, RRSB),
:mod:`~linkage.physics.tablet` (tensile strength from breaking force),
:mod:`~linkage.physics.strength` (Ryshkewitch-Duckworth),
:mod:`~linkage.physics.pharmacopeia` (uniformity, dissolution, friability,
flow, f2), :mod:`~linkage.physics.compaction` (Johanson rolling theory: nip
angle) and :mod:`~linkage.physics.rolling` (roll force, peak pressure, ribbon
solid fraction, scale-up).

Their functions are re-exported here, except the function
``porosity.porosity``: the name ``linkage.physics.porosity`` stays the
module. Import it as ``from linkage.physics.porosity import porosity``.
"""

from linkage.physics import compaction, pharmacopeia, porosity, psd, rolling, strength, tablet
from linkage.physics.compaction import (
    johanson_density_ratio,
    johanson_gradient_difference,
    johanson_nip_angle_deg,
    johanson_nu_deg,
    johanson_pressure_ratio,
    ribbon_solid_fraction_from_at_gap,
)
from linkage.physics.pharmacopeia import (
    acceptance_value,
    acceptance_value_from_summary,
    carr_index_pct,
    dissolution_s1_pass,
    dissolution_stage,
    f1_difference,
    f2_similarity,
    flow_character,
    friability_pct,
    hausner_ratio,
    reference_value_pct,
    relative_sd_pct,
    stage2_unit_range_pct,
    uniformity_stage,
    weight_variation_contents_pct,
)
from linkage.physics.porosity import (
    at_gap_density_kg_m3,
    envelope_density_g_cm3,
    solid_fraction,
    true_density_of_mixture_g_cm3,
)
from linkage.physics.psd import (
    cumulative_undersize_pct,
    fines_pct,
    fit_rrsb,
    percentile_size_um,
    rrsb_size_um,
    rrsb_undersize,
    span,
    undersize_at_size_pct,
)
from linkage.physics.strength import (
    fit_ryshkewitch_duckworth,
    porosity_for_strength,
    ryshkewitch_duckworth,
)
from linkage.physics.tablet import (
    breaking_force_flat_n,
    ribbon_tensile_strength_mpa,
    tensile_strength_convex_mpa,
    tensile_strength_flat_mpa,
    tensile_strength_method,
    tensile_strength_mpa,
)

__all__ = [
    # modules
    "compaction", "pharmacopeia", "porosity", "psd", "rolling", "strength", "tablet",
    # porosity
    "solid_fraction", "envelope_density_g_cm3", "true_density_of_mixture_g_cm3", "at_gap_density_kg_m3",
    # psd
    "cumulative_undersize_pct", "percentile_size_um", "undersize_at_size_pct", "span", "fines_pct",
    "rrsb_undersize", "rrsb_size_um", "fit_rrsb",
    # tablet
    "tensile_strength_flat_mpa", "tensile_strength_convex_mpa", "tensile_strength_mpa",
    "tensile_strength_method", "breaking_force_flat_n", "ribbon_tensile_strength_mpa",
    # strength
    "ryshkewitch_duckworth", "fit_ryshkewitch_duckworth", "porosity_for_strength",
    # pharmacopeia
    "reference_value_pct", "acceptance_value_from_summary", "acceptance_value", "stage2_unit_range_pct",
    "weight_variation_contents_pct", "uniformity_stage", "relative_sd_pct", "dissolution_stage",
    "dissolution_s1_pass", "friability_pct", "f2_similarity", "f1_difference", "carr_index_pct",
    "hausner_ratio", "flow_character",
    # compaction
    "johanson_nu_deg", "johanson_gradient_difference", "johanson_nip_angle_deg", "johanson_density_ratio",
    "johanson_pressure_ratio", "ribbon_solid_fraction_from_at_gap",
]
