"""Physical constants and unit conversions: the only place numbers with units are typed in.

Constants are the SI 2019 exact values and CODATA 2018 recommended values (Tiesinga,
Mohr, Newell & Taylor, Rev. Mod. Phys. 93, 025010 (2021); SI Brochure, 9th ed., BIPM 2019).
Every other module takes its constants from here, so a result can always state which
constant set it used (:data:`CONSTANT_SET`).

Three unit systems are described by :class:`UnitSystem`:

* ``"kJ/mol-nm-K"``: energies in kJ/mol, lengths in nm, temperatures in K, charges in
  elementary charges; kT = R T.
* ``"kcal/mol-nm-K"``: the same with energies in kcal/mol (1 kcal = 4.184 kJ).
* ``"reduced"``: Lennard-Jones reduced units (energy ε, length σ, temperature ε/k_B);
  kT = T*, and the Coulomb constant is 1.

Example:
    >>> from fe_tool import units
    >>> round(units.thermal_energy(298.15), 6)
    2.478957
    >>> units.unit_system("kJ/mol-nm-K").kT(300.0) == units.thermal_energy(300.0)
    True
"""
from __future__ import annotations

import dataclasses
import math
from typing import Any

CONSTANT_SET = "CODATA 2018 / SI 2019"

# Exact by definition of the SI (2019).
BOLTZMANN_J_PER_K = 1.380649e-23
"""k_B in J/K (exact)."""
AVOGADRO_PER_MOL = 6.02214076e23
"""N_A in 1/mol (exact)."""
ELEMENTARY_CHARGE_C = 1.602176634e-19
"""e in C (exact)."""

# Measured; CODATA 2018 recommended value (relative uncertainty 1.5e-10).
VACUUM_PERMITTIVITY_F_PER_M = 8.8541878128e-12
"""ε0 in F/m (CODATA 2018)."""

CALORIE_J = 4.184
"""Thermochemical calorie in J (exact by definition)."""

GAS_CONSTANT_J_PER_MOL_K = BOLTZMANN_J_PER_K * AVOGADRO_PER_MOL
"""R = N_A k_B = 8.31446261815324 J/(mol K) (exact product)."""
GAS_CONSTANT_KJ_PER_MOL_K = GAS_CONSTANT_J_PER_MOL_K / 1000.0
"""R in kJ/(mol K) = 0.00831446261815324."""
GAS_CONSTANT_KCAL_PER_MOL_K = GAS_CONSTANT_J_PER_MOL_K / (1000.0 * CALORIE_J)
"""R in kcal/(mol K) = 0.001987204258640832."""

KJ_PER_KCAL = CALORIE_J
"""1 kcal = 4.184 kJ (exact)."""

COULOMB_CONSTANT_KJ_NM_PER_MOL_E2 = (
    ELEMENTARY_CHARGE_C**2 * AVOGADRO_PER_MOL / (4.0 * math.pi * VACUUM_PERMITTIVITY_F_PER_M)
    * 1e-3  # J -> kJ
    * 1e9   # m -> nm
)
"""Electric conversion factor f = N_A e² / (4π ε0) ≈ 138.935458 kJ mol⁻¹ nm e⁻².

The Coulomb energy of two charges q_i, q_j (in e) at distance r (in nm) is f q_i q_j / r in kJ/mol.
"""
COULOMB_CONSTANT_KCAL_NM_PER_MOL_E2 = COULOMB_CONSTANT_KJ_NM_PER_MOL_E2 / CALORIE_J
"""f in kcal mol⁻¹ nm e⁻² ≈ 33.2063713 (the same constant, energies in kcal/mol)."""

ENERGY_UNITS = ("kJ/mol", "kcal/mol")


def _check_energy_unit(unit: str, argument: str = "unit") -> None:
    if unit not in ENERGY_UNITS:
        raise ValueError(f"{argument}={unit!r} is not a known energy unit; use one of {ENERGY_UNITS}.")


def gas_constant(unit: str = "kJ/mol") -> float:
    """The molar gas constant R = N_A k_B in ``unit``/K (``"kJ/mol"`` or ``"kcal/mol"``)."""
    _check_energy_unit(unit)
    return GAS_CONSTANT_KJ_PER_MOL_K if unit == "kJ/mol" else GAS_CONSTANT_KCAL_PER_MOL_K


def thermal_energy(temperature_kelvin, unit: str = "kJ/mol"):
    """Molar thermal energy kT = R T.

    Args:
        temperature_kelvin: temperature in K (a float or an array; JAX arrays are fine).
        unit: ``"kJ/mol"`` or ``"kcal/mol"``.

    Returns:
        kT in ``unit``, same shape as ``temperature_kelvin``.

    Example: ``thermal_energy(298.15)`` = 2.478957029602389 kJ/mol (CODATA 2018).
    """
    return gas_constant(unit) * temperature_kelvin


def kj_to_kcal(energy_kj_per_mol):
    """Convert kJ/mol to kcal/mol (1 kcal = 4.184 kJ exactly)."""
    return energy_kj_per_mol / KJ_PER_KCAL


def kcal_to_kj(energy_kcal_per_mol):
    """Convert kcal/mol to kJ/mol (1 kcal = 4.184 kJ exactly)."""
    return energy_kcal_per_mol * KJ_PER_KCAL


def convert_energy(value, from_unit: str, to_unit: str):
    """Convert a molar energy between ``"kJ/mol"`` and ``"kcal/mol"``."""
    _check_energy_unit(from_unit, "from_unit")
    _check_energy_unit(to_unit, "to_unit")
    if from_unit == to_unit:
        return value
    return kj_to_kcal(value) if from_unit == "kJ/mol" else kcal_to_kj(value)


@dataclasses.dataclass(frozen=True)
class UnitSystem:
    """The units an energy model, a system file or a result is expressed in.

    Attributes:
        name: the JSON-able identifier (``"kJ/mol-nm-K"``, ``"kcal/mol-nm-K"`` or ``"reduced"``).
        energy: name of the energy unit.
        length: name of the length unit.
        temperature: name of the temperature unit.
        charge: name of the charge unit.
        boltzmann: k_B (or R) in energy/temperature units, so kT = boltzmann * T.
        coulomb_constant: f in energy * length / charge², so U = f q_i q_j / r.
    """

    name: str
    energy: str
    length: str
    temperature: str
    charge: str
    boltzmann: float
    coulomb_constant: float

    def kT(self, temperature):
        """Thermal energy in this system's energy unit (T in this system's temperature unit)."""
        return self.boltzmann * temperature

    def to_dict(self) -> dict[str, Any]:
        """A JSON-serialisable description (``name`` is enough to rebuild it)."""
        return dataclasses.asdict(self) | {"constants": CONSTANT_SET}


KJ_MOL_NM_K = UnitSystem(
    name="kJ/mol-nm-K",
    energy="kJ/mol",
    length="nm",
    temperature="K",
    charge="e",
    boltzmann=GAS_CONSTANT_KJ_PER_MOL_K,
    coulomb_constant=COULOMB_CONSTANT_KJ_NM_PER_MOL_E2,
)

KCAL_MOL_NM_K = UnitSystem(
    name="kcal/mol-nm-K",
    energy="kcal/mol",
    length="nm",
    temperature="K",
    charge="e",
    boltzmann=GAS_CONSTANT_KCAL_PER_MOL_K,
    coulomb_constant=COULOMB_CONSTANT_KCAL_NM_PER_MOL_E2,
)

REDUCED = UnitSystem(
    name="reduced",
    energy="epsilon",
    length="sigma",
    temperature="epsilon/k_B",
    charge="reduced charge",
    boltzmann=1.0,
    coulomb_constant=1.0,
)

UNIT_SYSTEMS = {system.name: system for system in (KJ_MOL_NM_K, KCAL_MOL_NM_K, REDUCED)}


def unit_system(name: str) -> UnitSystem:
    """Look up a :class:`UnitSystem` by its name (``"kJ/mol-nm-K"``, ``"kcal/mol-nm-K"`` or ``"reduced"``)."""
    try:
        return UNIT_SYSTEMS[name]
    except KeyError:
        raise ValueError(
            f"unknown unit system {name!r}; use one of {sorted(UNIT_SYSTEMS)}."
        ) from None


__all__ = [
    "AVOGADRO_PER_MOL", "BOLTZMANN_J_PER_K", "CALORIE_J", "CONSTANT_SET",
    "COULOMB_CONSTANT_KCAL_NM_PER_MOL_E2", "COULOMB_CONSTANT_KJ_NM_PER_MOL_E2", "ELEMENTARY_CHARGE_C", "ENERGY_UNITS",
    "GAS_CONSTANT_J_PER_MOL_K", "GAS_CONSTANT_KCAL_PER_MOL_K", "GAS_CONSTANT_KJ_PER_MOL_K",
    "KCAL_MOL_NM_K", "KJ_MOL_NM_K", "KJ_PER_KCAL", "REDUCED", "UNIT_SYSTEMS", "UnitSystem",
    "VACUUM_PERMITTIVITY_F_PER_M", "convert_energy", "gas_constant", "kcal_to_kj",
    "kj_to_kcal", "thermal_energy", "unit_system",
]
