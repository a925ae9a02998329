"""Energy terms, the periodic box, neighbour lists and model assembly.

Pure JAX functions of positions and parameters (:mod:`bonded`, :mod:`nonbonded`,
:mod:`restraints`, :mod:`fields`), fixed-shape pair lists (:mod:`neighbours`), and
:func:`assemble` to combine terms into one :class:`EnergyModel` with alchemical knobs
``lj_coupling`` and ``coulomb_scale``.
"""
from fe_tool.energy.bonded import (
    bond_angles,
    bond_lengths,
    dihedral_angles,
    harmonic_angle_energy,
    harmonic_bond_energy,
    periodic_torsion_energy,
    periodic_torsion_potential,
    ryckaert_bellemans_energy,
    ryckaert_bellemans_potential,
)
from fe_tool.energy.box import (
    as_box,
    box_volume,
    check_cutoff,
    displacement,
    minimum_image,
    pair_displacements,
    safe_norm,
    wrap_positions,
)
from fe_tool.energy.fields import (
    MUELLER_BROWN_PARAMETERS,
    double_well_energy,
    harmonic_well_energy,
    mueller_brown_energy,
)
from fe_tool.energy.model import (
    ALL_PAIRS_LIMIT,
    DistanceRestraints,
    EnergyModel,
    ExternalField,
    HarmonicAngles,
    HarmonicBonds,
    Nonbonded,
    PeriodicTorsions,
    PositionRestraints,
    RyckaertBellemansTorsions,
    ScaledPairs,
    Term,
    alchemical_energy_function,
    assemble,
    energy_function,
    nonbonded_term,
)
from fe_tool.energy.neighbours import (
    NeighbourList,
    NeighbourListBuilder,
    NeighbourListOverflowError,
    all_pairs,
    check_neighbour_list,
    count_pairs_within,
    make_neighbour_list,
    neighbour_list_builder,
)
from fe_tool.energy.nonbonded import (
    DEFAULT_SOFT_CORE_ALPHA,
    LennardJonesParameters,
    bonded_exclusions,
    coulomb_energy,
    lennard_jones_energy,
    lennard_jones_mixture_tail_chemical_potential,
    lennard_jones_mixture_tail_energy,
    lennard_jones_pair_energy,
    lennard_jones_parameters,
    lennard_jones_tail_chemical_potential,
    lennard_jones_tail_energy_per_particle,
    lennard_jones_tail_integral,
    lennard_jones_tail_pressure,
    lennard_jones_tail_virial_integral,
    lennard_jones_type_parameters,
    nonbonded_energy,
    nonbonded_energy_parts,
    reaction_field_constants,
    scaled_pair_energy,
    scaled_pair_parameters,
    soft_core_lennard_jones_pair_energy,
)
from fe_tool.energy.restraints import (
    distance_restraint_energy,
    flat_bottom_distance_restraint_energy,
    flat_bottom_position_restraint_energy,
    harmonic_position_restraint_energy,
)

__all__ = [
    # box
    "as_box", "box_volume", "check_cutoff", "displacement", "minimum_image", "pair_displacements",
    "safe_norm", "wrap_positions",
    # bonded
    "bond_angles", "bond_lengths", "dihedral_angles", "harmonic_angle_energy",
    "harmonic_bond_energy", "periodic_torsion_energy", "periodic_torsion_potential",
    "ryckaert_bellemans_energy", "ryckaert_bellemans_potential",
    # nonbonded
    "DEFAULT_SOFT_CORE_ALPHA", "LennardJonesParameters", "bonded_exclusions", "coulomb_energy",
    "lennard_jones_energy", "lennard_jones_mixture_tail_chemical_potential",
    "lennard_jones_mixture_tail_energy", "lennard_jones_pair_energy", "lennard_jones_parameters",
    "lennard_jones_tail_chemical_potential", "lennard_jones_tail_energy_per_particle",
    "lennard_jones_tail_integral", "lennard_jones_tail_pressure",
    "lennard_jones_tail_virial_integral", "lennard_jones_type_parameters", "nonbonded_energy",
    "nonbonded_energy_parts", "reaction_field_constants", "scaled_pair_energy",
    "scaled_pair_parameters", "soft_core_lennard_jones_pair_energy",
    # neighbours
    "NeighbourList", "NeighbourListBuilder", "NeighbourListOverflowError", "all_pairs",
    "check_neighbour_list", "count_pairs_within", "make_neighbour_list",
    "neighbour_list_builder",
    # restraints
    "distance_restraint_energy", "flat_bottom_distance_restraint_energy",
    "flat_bottom_position_restraint_energy", "harmonic_position_restraint_energy",
    # fields
    "MUELLER_BROWN_PARAMETERS", "double_well_energy", "harmonic_well_energy",
    "mueller_brown_energy",
    # model
    "ALL_PAIRS_LIMIT", "DistanceRestraints", "EnergyModel", "ExternalField", "HarmonicAngles",
    "HarmonicBonds", "Nonbonded", "PeriodicTorsions", "PositionRestraints",
    "RyckaertBellemansTorsions", "ScaledPairs", "Term", "alchemical_energy_function", "assemble",
    "energy_function", "nonbonded_term",
]
