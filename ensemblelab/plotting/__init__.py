"""Static matplotlib figures for papers (outside the compute layer; never widgets).

Submodules: ``spectra`` (TRPES maps and decompositions), ``observables`` (scattering
and transient-absorption maps), ``populations``
(populations, fits, decay-associated spectra), ``structures`` (clusters,
flagged trajectories).
"""

__all__: list[str] = []
