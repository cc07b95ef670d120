"""Further observables from the same ensemble: time-resolved scattering (X-ray and
electron, independent-atom model) and transient absorption (doorway-window picture).

Modules: :mod:`.form_factors` (atomic scattering factors), :mod:`.scattering`
(:func:`compute_scattering`, :func:`debye_intensity`), :mod:`.absorption`
(:func:`compute_transient_absorption`, :func:`absorption_spectrum`); the Debye kernels are in
``_kernels_scattering`` with the naive twin in ``_reference_scattering``.
"""

from __future__ import annotations

from .absorption import absorption_spectrum, compute_transient_absorption
from .contributions import observable_contributions
from .form_factors import electron_form_factor, xray_form_factor
from .scattering import compute_scattering, debye_intensity

__all__ = [
    "compute_scattering",
    "debye_intensity",
    "xray_form_factor",
    "electron_form_factor",
    "compute_transient_absorption",
    "absorption_spectrum",
    "observable_contributions",
]
