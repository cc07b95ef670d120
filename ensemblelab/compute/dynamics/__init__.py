"""Model photodynamics: diabatic model Hamiltonians and vectorised surface hopping.

Public names
------------
run_fssh, FSSHResult
    The vectorised fewest-switches surface-hopping engine.
DiabaticModel, check_model
    The model protocol (plug in your own model) and its validator.
SingleAvoidedCrossing, DualAvoidedCrossing, ExtendedCoupling
    The three 1-D two-state models of J. Chem. Phys. 93, 1061 (1990).
LinearVibronicModel, TorsionVibronicModel
    Multi-mode vibronic coupling models (the second with a torsion coordinate).
"""

from __future__ import annotations

from .fssh import FSSHResult, run_fssh
from .models import (
    DiabaticModel,
    DualAvoidedCrossing,
    ExtendedCoupling,
    LinearVibronicModel,
    SingleAvoidedCrossing,
    TorsionVibronicModel,
    check_model,
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
]
