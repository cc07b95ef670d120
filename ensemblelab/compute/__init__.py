"""Layer 3: computations on Ensembles (numpy, scipy, pandas, scikit-learn; never widgets,
never io: readers hand data in).

One domain package per job; each declares its public names in its ``__all__``, which
this package re-exports (imported on first use, see :mod:`ensemblelab._exports`):

- :mod:`~ensemblelab.compute.spectroscopy`: pulses, cross sections, photoelectron maps,
  contributions, diabatic decomposition, map comparison;
- :mod:`~ensemblelab.compute.kinetics`: populations, kinetic fits, global fits;
- :mod:`~ensemblelab.compute.structures`: alignment, descriptors, clustering,
  representatives, quality flags;
- :mod:`~ensemblelab.compute.dynamics`: initial conditions, model Hamiltonians,
  surface hopping;
- :mod:`~ensemblelab.compute.bands`: what makes a band of a map (strongest snapshots,
  groups, shares);
- :mod:`~ensemblelab.compute.observables`: time-resolved scattering and transient
  absorption.
- :mod:`~ensemblelab.compute.uncertainty`: trajectory-bootstrap intervals on shares,
  decomposition fractions, cluster fractions and lifetimes; convergence with N.
"""

from __future__ import annotations

from .._exports import lazy_exports

DOMAINS = (
    "ensemblelab.compute.spectroscopy",
    "ensemblelab.compute.kinetics",
    "ensemblelab.compute.structures",
    "ensemblelab.compute.dynamics",
    "ensemblelab.compute.bands",
    "ensemblelab.compute.observables",
    "ensemblelab.compute.uncertainty",
)

__all__, __getattr__, __dir__ = lazy_exports("ensemblelab.compute", DOMAINS, globals())
