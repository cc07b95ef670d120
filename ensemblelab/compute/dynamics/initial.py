"""Initial conditions: doorway selection of (sample, state) pairs for a Gaussian pump.

In the classical doorway-window picture (J. Chem. Theory Comput. 17, 2394 (2021):
surface-hopping pump-probe signals in the classical doorway-window representation)
trajectories are sampled from a positive doorway distribution. For a Gaussian pump
the weight of sample n on excited state i is
``w_ni = |mu_0i|^2 I_pu(hbar omega_pu - dE_0i)`` with the peak-normalised spectral
intensity ``I_pu(x) = exp(-4 ln2 x^2 / Gamma^2)``, ``Gamma = 4 ln2 hbar / T`` (T the
temporal intensity FWHM; first-order perturbation theory, from memory). Given
oscillator strengths, ``|mu|^2 = 3 f / (2 dE)`` (atomic units), i.e. the weight
carries 1/dE.

An ``n_photons`` pump selects at the absorbed energy ``n h nu`` with the n-photon
width ``sqrt(n) Gamma``: the n-photon transition follows the field to the n-th power,
whose intensity ``I^n`` is a Gaussian sqrt(n) shorter in time, hence sqrt(n) wider in
energy (the n-fold convolution of the one-photon spectrum; derived here from the
Gaussian Fourier transform, from memory). ``mu2`` then stands for the n-photon
transition strength the user supplies.
"""

from __future__ import annotations

import gzip
import io
import math
import os
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..._atomic import atomic_write_bytes
from ...errors import NumericalWarning, SchemaError
from ...units import (
    FOUR_LN2,
    HARTREE_EV,
    HBAR_EV_FS,
)
from .wigner import WignerSample, rng_from

__all__ = [
    "doorway_table",
    "select_initial_conditions",
    "write_initial_conditions",
]

# ---------------------------------------------------------------------------- doorway
def _pump_parameters(pump: Any, photon_energy: float | None, fwhm: float | None,
                     n_photons: int = 1) -> tuple[float, float, int]:
    if pump is not None:
        if not (hasattr(pump, "photon_energy") and hasattr(pump, "fwhm")):
            raise SchemaError(
                "pump must have photon_energy (eV) and fwhm (fs) attributes, e.g. "
                "GaussianPulse(photon_energy=4.8, fwhm=20.0)."
            )
        photon_energy, fwhm = float(pump.photon_energy), float(pump.fwhm)
        n_photons = getattr(pump, "n_photons", 1)
    if isinstance(n_photons, bool) or not isinstance(n_photons, int | np.integer) or \
            int(n_photons) < 1:
        raise SchemaError(f"The pump's 'n_photons' must be an int >= 1; got {n_photons!r}.")
    if photon_energy is None or fwhm is None:
        raise SchemaError(
            "pass pump=GaussianPulse(...) or both photon_energy= (eV) and fwhm= (fs)."
        )
    if not (fwhm > 0 and math.isfinite(fwhm)):
        raise SchemaError(f"The pump 'fwhm' must be > 0 fs; got {fwhm}.")
    return float(photon_energy), float(fwhm), int(n_photons)


def doorway_table(
    table: pd.DataFrame,
    *,
    pump: Any = None,
    photon_energy: float | None = None,
    fwhm: float | None = None,
    n_photons: int = 1,
) -> pd.DataFrame:
    """Doorway weights of every (sample, excited state) pair for a Gaussian pump.

    Parameters
    ----------
    table : DataFrame
        Tidy table, one row per (sample, state): ``sample``, ``state``,
        ``excitation_energy`` (eV), and either ``mu2`` (|mu_0i|^2 in e^2 bohr^2) or
        ``oscillator_strength``. Rows with ``state == 0`` are ignored.
    pump : GaussianPulse-like, optional
        Any object with ``photon_energy`` (eV) and ``fwhm`` (fs, intensity FWHM), and
        optionally ``n_photons``.
    photon_energy, fwhm, n_photons : float, float, int, optional
        The same as plain numbers (``n_photons`` is ignored when `pump` is given).

    Returns
    -------
    DataFrame
        The input columns plus ``mu2`` (derived from f as ``3 f / (2 dE)`` when
        needed), ``spectral`` (peak-normalised spectrum of the absorbed energy
        ``n h nu``, FWHM ``sqrt(n) Gamma``, at the detuning) and ``weight``
        (``mu2 * spectral``). The input is not modified.

    Examples
    --------
    >>> t = pd.DataFrame({"sample": [0, 0], "state": [1, 2],
    ...                   "excitation_energy": [4.0, 4.3], "mu2": [1.0, 0.5]})
    >>> w = doorway_table(t, photon_energy=4.1, fwhm=20.0)
    >>> [round(x, 7) for x in w["weight"]]
    [0.0357934, 8e-07]
    """
    e_pu, t_pu, n_ph = _pump_parameters(pump, photon_energy, fwhm, n_photons)
    if not isinstance(table, pd.DataFrame):
        raise SchemaError(f"table must be a pandas DataFrame; got {type(table).__name__}.")
    missing = [c for c in ("sample", "state", "excitation_energy") if c not in table.columns]
    if missing:
        raise SchemaError(
            f"table is missing column(s) {missing}; found {list(table.columns)}. It needs "
            "sample, state, excitation_energy (eV) and mu2 or oscillator_strength."
        )
    out = table.loc[table["state"] != 0].copy().reset_index(drop=True)
    de = out["excitation_energy"].to_numpy(float)
    if "mu2" in out.columns:
        mu2: np.ndarray = out["mu2"].to_numpy(float)
    elif "oscillator_strength" in out.columns:
        if np.any(de <= 0):
            raise SchemaError("excitation_energy must be > 0 eV to convert oscillator strengths.")
        mu2 = 1.5 * out["oscillator_strength"].to_numpy(float) / (de / HARTREE_EV)
        out["mu2"] = mu2
    else:
        raise SchemaError(
            "table needs a 'mu2' (|mu_0i|^2, e^2 bohr^2) or an 'oscillator_strength' column; "
            f"found {list(table.columns)}."
        )
    if np.any(mu2 < 0) or not np.all(np.isfinite(mu2)) or not np.all(np.isfinite(de)):
        raise SchemaError("mu2 / oscillator strengths must be finite and >= 0, energies finite.")
    gamma2 = n_ph * (FOUR_LN2 * HBAR_EV_FS / t_pu) ** 2  # (sqrt(n) Gamma)^2
    out["spectral"] = np.exp(-FOUR_LN2 * (n_ph * e_pu - de) ** 2 / gamma2)
    out["weight"] = mu2 * out["spectral"].to_numpy()
    return out


def select_initial_conditions(
    table: pd.DataFrame,
    *,
    pump: Any = None,
    photon_energy: float | None = None,
    fwhm: float | None = None,
    n_photons: int = 1,
    method: str = "rejection",
    epsilon: float = 1e-3,
    n_select: int | None = None,
    random_state: Any = None,
) -> pd.DataFrame:
    """Choose which (sample, state) pairs to launch for a Gaussian pump.

    Parameters
    ----------
    table : DataFrame
        As for :func:`doorway_table`.
    pump, photon_energy, fwhm, n_photons
        The pump pulse (see :func:`doorway_table`).
    method : {"rejection", "weights"}
        ``"rejection"``: accept pair (n, i) if ``xi < w_ni / w_max`` (xi uniform);
        accepted pairs get weight 1. ``"weights"``: keep every pair with
        ``w_ni > epsilon * w_max`` and carry ``w_ni / w_max`` as its weight
        (epsilon = 1e-3 is common practice).
    epsilon : float
        Threshold of the weights method.
    n_select : int, optional
        Rejection only: stop after this many accepted pairs (in table order).
    random_state : int or Generator, optional

    Returns
    -------
    DataFrame
        One row per launched pair: ``sample``, ``state``, ``excitation_energy``,
        ``mu2``, ``spectral``, ``doorway`` (w_ni / w_max) and ``weight``.
        ``attrs["sampling"]`` is ``"doorway-selected"`` (rejection) or ``"weighted"``:
        the value for ``metadata["sampling"]`` of the ensemble run from them.
    """
    w = doorway_table(table, pump=pump, photon_energy=photon_energy, fwhm=fwhm,
                      n_photons=n_photons)
    w_max = float(w["weight"].max()) if len(w) else 0.0
    if not w_max > 0:
        raise SchemaError(
            "every doorway weight is zero: no state is bright within the pump bandwidth. "
            "Hint: check photon_energy, the excitation energies (eV) and the dipoles."
        )
    w["doorway"] = w["weight"] / w_max
    if method == "rejection":
        xi = rng_from(random_state).random(len(w))
        keep = xi < w["doorway"].to_numpy()
        sel = w.loc[keep].copy()
        if n_select is not None:
            if len(sel) < n_select:
                warnings.warn(
                    f"only {len(sel)} of the requested {n_select} pairs were accepted; "
                    "sample more geometries.", NumericalWarning, stacklevel=2)
            sel = sel.iloc[: int(n_select)]
        sel["weight"] = 1.0
    elif method == "weights":
        if not 0 <= epsilon < 1:
            raise SchemaError(f"epsilon must be in [0, 1); got {epsilon}.")
        sel = w.loc[w["doorway"] > epsilon].copy()
        sel["weight"] = sel["doorway"]
    else:
        raise SchemaError(f"method must be 'rejection' or 'weights'; got {method!r}.")
    out = sel.reset_index(drop=True)
    # how an ensemble launched from these pairs was sampled (its metadata "sampling")
    out.attrs["sampling"] = "doorway-selected" if method == "rejection" else "weighted"
    return out


def write_initial_conditions(
    path: str | os.PathLike,
    sample: WignerSample,
    selection: pd.DataFrame | None = None,
    *,
    overwrite: bool = False,
    precision: int = 8,
) -> Path:
    """Write initial conditions as an extended-XYZ file (atomic write).

    One frame per selected (sample, state) pair, with positions (Angstrom) and
    velocities (Angstrom/fs) as ``Properties=species:S:1:pos:R:3:vel:R:3`` and the
    pair's ``sample``, ``state``, ``weight`` and ``excitation_energy`` on the
    comment line. A name ending in ``.gz`` is gzip-compressed (mtime 0, so the
    bytes are reproducible).

    Parameters
    ----------
    path : path-like
    sample : WignerSample
    selection : DataFrame, optional
        Output of :func:`select_initial_conditions`; default every sample, state 0.
    overwrite : bool
        Replace an existing file.
    precision : int
        Decimals written.

    Returns
    -------
    Path
    """
    path = Path(path)
    if path.exists() and not overwrite:
        raise FileExistsError(f"{path} exists; pass overwrite=True to replace it.")
    if selection is None:
        selection = pd.DataFrame({"sample": np.arange(sample.n_samples), "state": 0,
                                  "weight": 1.0})
    buf = io.StringIO()
    fmt = f"{{:.{precision}f}}"
    n_atoms = len(sample.symbols)
    row: Any
    for row in selection.itertuples(index=False):
        n = int(row.sample)
        extra = [f"sample={n}", f"state={int(row.state)}",
                 f"weight={float(getattr(row, 'weight', 1.0)):.10g}"]
        if hasattr(row, "excitation_energy"):
            extra.append(f"excitation_energy={float(row.excitation_energy):.10g}")
        buf.write(f"{n_atoms}\n")
        buf.write('Properties=species:S:1:pos:R:3:vel:R:3 units="Angstrom,Angstrom/fs" '
                  + " ".join(extra) + "\n")
        for sym, x, v in zip(sample.symbols, sample.positions[n], sample.velocities[n],
                             strict=True):
            buf.write(sym + " " + " ".join(fmt.format(c) for c in (*x, *v)) + "\n")
    data = buf.getvalue().encode()
    if path.name.endswith(".gz"):
        raw = io.BytesIO()
        with gzip.GzipFile(filename="", mode="wb", fileobj=raw, mtime=0) as gz:
            gz.write(data)
        data = raw.getvalue()
    atomic_write_bytes(path, data)
    return path
