"""Bootstrap replicate maps and the intervals of averages over a map (cuts).

The percentile interval of a cut (the map averaged over a delay or an energy range) is
not the average of the pixels' intervals: the quantile of a mean is not the mean of
the quantiles. :func:`trpes_with_replicates` returns the map of
``compute_trpes(..., interval="bootstrap")`` together with its replicate maps, and
:func:`cut_interval` averages each replicate over the cut's range first and takes the
percentiles of those averages (the percentile bootstrap of the cut; Stat. Sci. 1986,
"Bootstrap methods for standard errors, confidence intervals, and other measures of
statistical accuracy").
"""

from __future__ import annotations

import inspect
from typing import Any

import numpy as np
import numpy.typing as npt

from ...data.ensemble import Ensemble
from ...data.spectrum import TRPESMap
from ...errors import SchemaError
from ._checks import check_grid
from .bootstrap import bootstrap_map, check_interval
from .maps import TRPES_FIELDS, compute_trpes
from .sampling import excluded_ids

__all__ = ["trpes_with_replicates", "cut_interval"]


def trpes_with_replicates(
    ens: Ensemble,
    *,
    exclude: npt.ArrayLike | None = None,
    ci: float = 0.95,
    n_boot: int = 200,
    random_state: int | np.random.Generator | None = 0,
    **kwargs: Any,
) -> tuple[TRPESMap, np.ndarray]:
    """The map with its bootstrap interval, and the replicate maps behind it.

    Same map, interval and seed as ``compute_trpes(ens, exclude=exclude,
    interval="bootstrap", ci=ci, n_boot=n_boot, random_state=random_state, **kwargs)``.

    Parameters
    ----------
    ens : Ensemble
        An in-memory ensemble.
    exclude : array_like of int, optional
        Trajectory ids left out of the map and of the resampling.
    ci, n_boot, random_state
        As in :func:`~.maps.compute_trpes`.
    **kwargs
        Further arguments of :func:`~.maps.compute_trpes` (``probe``, ``pump``,
        ``kinetic_energies``, ``delays``, ``resolution``, ...; not ``interval`` nor
        ``return_model``).

    Returns
    -------
    trpes : TRPESMap
        The map with ``lower``, ``upper`` and ``rel_se``.
    replicates : ndarray, shape (n_boot, n_delays, n_energies)
        The map of every resample (eV^-1).
    """
    if not isinstance(ens, Ensemble):
        raise SchemaError("trpes_with_replicates needs an in-memory Ensemble (the replicate "
                          "maps are held in memory). Hint: compute_trpes(..., "
                          "interval='bootstrap') for a chunked store.")
    for bad in ("interval", "return_model", "return_replicates"):
        if bad in kwargs:
            raise SchemaError(f"trpes_with_replicates sets {bad!r} itself; do not pass it.")
    check_interval("bootstrap", ci, n_boot)
    ids = excluded_ids(exclude)
    if len(ids):  # as compute_trpes does: resample only the kept trajectories
        ens = ens.without(ids.tolist())
    defaults = {name: p.default for name, p in inspect.signature(compute_trpes).parameters
                .items() if p.default is not inspect.Parameter.empty}
    opts = defaults | dict(kwargs)
    trpes, model = compute_trpes(ens, return_model=True, **kwargs)
    fields = [*TRPES_FIELDS, *(("adt", "adt_cation") if opts["decompose"] == "diabatic"
                               else ())]
    out = bootstrap_map(
        ens, model, trpes, probe=opts["probe"], pump=opts["pump"],
        kinetic_energies=check_grid(opts["kinetic_energies"], "kinetic_energies"),
        delays=check_grid(opts["delays"], "delays"), resolution=opts["resolution"],
        convolve=opts["convolve"], normalise=opts["normalise"],
        cross_section=opts["cross_section"], weights=opts["weights"],
        ionisation_shifts=opts["ionisation_shifts"], absorbing=opts["absorbing"],
        fields=fields, ci=ci, n_boot=n_boot, random_state=random_state,
        client=opts["client"], scheduler=opts["scheduler"], progress=bool(opts["progress"]),
        return_replicates=True)
    assert isinstance(out, tuple)
    boot, reps, _ = out
    if len(ids):
        boot = boot.replace(params=dict(boot.params) | {"excluded": ids.tolist()})
    return boot, reps


def cut_interval(replicates: np.ndarray, mask: np.ndarray, *, axis: str, ci: float = 0.95
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Percentile interval of a cut: each replicate averaged over the range, then quantiles.

    Parameters
    ----------
    replicates : ndarray, shape (n_boot, n_delays, n_energies)
    mask : ndarray of bool
        The delays (``axis="delay"``, shape (n_delays,)) or energies (``axis="energy"``,
        shape (n_energies,)) averaged over.
    axis : {"delay", "energy"}
        ``"delay"``: a spectrum averaged over delays; ``"energy"``: a trace averaged
        over energies.
    ci : float
        Confidence level.

    Returns
    -------
    lower, upper : ndarray, shape (n_energies,) or (n_delays,)
        The ``(1 - ci) / 2`` and ``(1 + ci) / 2`` quantiles of the replicate cuts.
    """
    reps = np.asarray(replicates, float)
    mask = np.asarray(mask, bool)
    if reps.ndim != 3:
        raise SchemaError(f"replicates must have shape (n_boot, n_delays, n_energies); got "
                          f"{reps.shape}.")
    if axis == "delay":
        cuts = reps[:, mask, :].mean(axis=1)
    elif axis == "energy":
        cuts = reps[:, :, mask].mean(axis=2)
    else:
        raise SchemaError(f"axis must be 'delay' or 'energy'; got {axis!r}.")
    check_interval("bootstrap", ci, reps.shape[0])
    alpha = (1.0 - ci) / 2.0
    lower, upper = np.quantile(cuts, [alpha, 1.0 - alpha], axis=0)
    return lower, upper
