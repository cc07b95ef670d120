"""How an ensemble was sampled, its absorbing state, and the effective size of its weights.

Two metadata keys of an ensemble (``Ensemble.metadata``, stored in every open format:
``metadata.json`` of an extended-XYZ folder, the ``metadata`` of a native store):

``sampling``
    How the trajectories' initial conditions relate to the pump:

    * ``"doorway-selected"``: chosen in proportion to the doorway weight of the pump
      (rejection sampling); every trajectory counts once, the pump must **not** be
      applied again;
    * ``"weighted"``: the pump's doorway weight (or another importance weight) is
      already in ``trajectories["weight"]``;
    * ``"uniform"``: not selected by the pump (e.g. every Wigner point started on one
      state); a map applies the pump's doorway weight.

``absorbing_state``
    Index of the neutral state in which trajectories were stopped (int, default 0,
    the ground state); ``None`` when no state absorbs.

:func:`kish_effective_size` is the Kish effective sample size ``(sum w)^2 / sum w^2``
(Kish 1965 design effect; from memory).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt

from ...errors import SchemaError

__all__ = ["SAMPLING_KINDS", "sampling_of", "ensemble_absorbing_state", "kish_effective_size",
           "ESS_WARN_FRACTION", "excluded_ids"]

#: the values of the ``sampling`` metadata key
SAMPLING_KINDS = ("doorway-selected", "weighted", "uniform")

#: a map warns when the Kish effective size of its weights is below this fraction of the
#: number of trajectories (common practice: below one half the weights dominate)
ESS_WARN_FRACTION = 0.5


def sampling_of(ens: Any) -> str | None:
    """The ``sampling`` metadata of an ensemble (or a chunked source); None when unknown.

    Parameters
    ----------
    ens : Ensemble or BlockSource
        Anything with ``metadata``.

    Returns
    -------
    str or None
        One of :data:`SAMPLING_KINDS`.

    Raises
    ------
    SchemaError
        For a value outside :data:`SAMPLING_KINDS`.
    """
    meta = getattr(ens, "metadata", None) or {}
    value = meta.get("sampling")
    if value is None:
        return None
    if value not in SAMPLING_KINDS:
        raise SchemaError(
            f"ens.metadata['sampling'] must be one of {list(SAMPLING_KINDS)}; got {value!r}. "
            "Hint: 'doorway-selected' for initial conditions chosen by the pump (rejection), "
            "'weighted' when trajectories['weight'] holds the doorway weights, 'uniform' "
            "when the pump did not select them.")
    return str(value)


def ensemble_absorbing_state(ens: Any) -> int | None:
    """The absorbing neutral state of an ensemble: its ``absorbing_state`` property if it has
    one, else ``metadata["absorbing_state"]`` (default 0, the ground state; None: none).

    Parameters
    ----------
    ens : Ensemble or BlockSource

    Returns
    -------
    int or None
    """
    if hasattr(type(ens), "absorbing_state"):
        value = ens.absorbing_state
    else:
        meta = getattr(ens, "metadata", None) or {}
        value = meta.get("absorbing_state", 0)
    if value is None:
        return None
    n_states = getattr(ens, "n_states", None)
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or int(value) < 0 \
            or (n_states is not None and int(value) >= n_states):
        raise SchemaError(f"ens.metadata['absorbing_state'] must be a neutral state index in "
                          f"[0, {n_states}) or None; got {value!r}. Hint: None switches the "
                          "absorbing state off.")
    return int(value)


def kish_effective_size(weights: npt.ArrayLike) -> float:
    """Kish effective sample size ``(sum w)^2 / sum w^2`` of non-negative weights.

    Equal weights give their number; one dominant weight gives about 1 (from memory:
    Kish 1965, survey sampling design effect).

    Examples
    --------
    >>> kish_effective_size([1.0, 1.0, 1.0, 1.0])
    4.0
    >>> kish_effective_size([1.0, 0.0])
    1.0
    """
    w = np.asarray(weights, dtype=float)
    s2 = float(np.sum(w * w))
    return float(np.sum(w)) ** 2 / s2 if s2 > 0 else 0.0


def excluded_ids(exclude: npt.ArrayLike | None) -> np.ndarray:
    """Sorted distinct trajectory ids of an ``exclude=`` argument, int64 (empty for None)."""
    if exclude is None:
        return np.zeros(0, dtype=np.int64)
    ids = np.asarray(exclude).reshape(-1)
    if ids.size and not np.issubdtype(ids.dtype, np.integer):
        raise SchemaError("The 'exclude' parameter must hold integer trajectory ids. Got "
                          f"{ids.dtype} values instead.")
    return np.unique(ids.astype(np.int64))
