"""Physical constants in the units the pipeline uses (meV, nm, T, ohm).

Everything derives from :mod:`scipy.constants` (CODATA; h and e exact since SI 2019), so the
quantised values drawn on figures and the transport code share one source.
"""

from __future__ import annotations

import scipy.constants as sc

__all__ = [
    "H_OVER_E2_OHM",
    "E2_OVER_H_SIEMENS",
    "MU_B_MEV_PER_T",
    "FLUX_QUANTA_PER_T_NM2",
    "K_B_MEV_PER_K",
    "HBAR_MEV_S",
]

#: von Klitzing constant h/e^2 in ohm (exact in SI 2019).
H_OVER_E2_OHM: float = sc.h / sc.e**2
#: conductance quantum per spin e^2/h in siemens.
E2_OVER_H_SIEMENS: float = sc.e**2 / sc.h
#: Bohr magneton in meV/T.
MU_B_MEV_PER_T: float = sc.physical_constants["Bohr magneton in eV/T"][0] * 1e3
#: e/h in 1/(T nm^2): magnetic flux quanta (h/e) per tesla and square nanometre, the unit
#: ``kwant.physics.magnetic_gauge`` takes fields in when lengths are in nm.
FLUX_QUANTA_PER_T_NM2: float = sc.e / sc.h * 1e-18
#: Boltzmann constant in meV/K.
K_B_MEV_PER_K: float = sc.physical_constants["Boltzmann constant in eV/K"][0] * 1e3
#: reduced Planck constant in meV s.
HBAR_MEV_S: float = sc.hbar / sc.e * 1e3
