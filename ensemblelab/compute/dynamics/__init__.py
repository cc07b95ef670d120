"""Model photodynamics: diabatic model Hamiltonians and vectorised surface hopping.

Public names
------------
run_fssh, FSSHResult
    The vectorised fewest-switches surface-hopping engine.
DiabaticModel, check_model
    The model protocol (plug in your own model) and its validator.
SingleAvoidedCrossing, DualAvoidedCrossing, ExtendedCoupling
    The three 1-D two-state models of J. Chem. Phys. 93, 1061 (1990).
sample_wigner, sample_normal_modes, select_initial_conditions, ...
    Initial conditions: Wigner sampling of normal modes and doorway selection.
LinearVibronicModel, TorsionVibronicModel
    Multi-mode vibronic coupling models (the second with a torsion coordinate).
"""

from __future__ import annotations

from .fssh import FSSHResult, run_fssh
from .initial import select_initial_conditions, write_initial_conditions
from .models import (
    DiabaticModel,
    DualAvoidedCrossing,
    ExtendedCoupling,
    LinearVibronicModel,
    SingleAvoidedCrossing,
    TorsionVibronicModel,
    check_model,
)
from .wigner import (
    WignerSample,
    normal_modes_from_hessian,
    sample_normal_modes,
    sample_wigner,
    sample_wigner_from_hessian,
    thermal_factor,
)

__all__ = [
    "run_fssh",
    "FSSHResult",
    "DiabaticModel",
    "check_model",
    "SingleAvoidedCrossing",
    "DualAvoidedCrossing",
    "ExtendedCoupling",
    "LinearVibronicModel",
    "TorsionVibronicModel",
    "WignerSample",
    "sample_wigner",
    "sample_normal_modes",
    "normal_modes_from_hessian",
    "sample_wigner_from_hessian",
    "thermal_factor",
    "select_initial_conditions",
    "write_initial_conditions",
]
