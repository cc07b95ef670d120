"""Feed our geometry arrays to the nglview 3-D viewer (no third-party trajectory object)."""

from __future__ import annotations

from collections.abc import Sequence

import nglview
import numpy as np
import numpy.typing as npt

__all__ = ["EnsembleStructure", "pdb_block", "CHAINS"]

_CHAINS = "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789"
#: chain name of each overlaid copy (copy ``c`` is chain ``CHAINS[c % len(CHAINS)]``)
CHAINS = _CHAINS


def pdb_block(
    symbols: Sequence[str],
    coordinates: npt.ArrayLike,
    *,
    copies: int = 1,
) -> str:
    """PDB text of one or more copies of a molecule (HETATM records, one chain per copy).

    Parameters
    ----------
    symbols : sequence of str, length n_atoms
        Element symbols.
    coordinates : array_like, shape (copies * n_atoms, 3)
        Cartesian coordinates in Angstrom.
    copies : int
        Number of molecules stacked in `coordinates` (each gets its own chain
        and residue number, so the viewer can colour them apart).

    Returns
    -------
    str
        The PDB text, ending with ``END``.
    """
    xyz = np.asarray(coordinates, dtype=np.float64).reshape(-1, 3)
    n_atoms = len(symbols)
    if xyz.shape[0] != copies * n_atoms:
        raise ValueError(
            f"coordinates must have copies * n_atoms = {copies * n_atoms} rows; got {xyz.shape[0]}."
        )
    lines = []
    serial = 0
    for c in range(copies):
        chain = _CHAINS[c % len(_CHAINS)]
        for a, sym in enumerate(symbols):
            serial += 1
            x, y, z = xyz[c * n_atoms + a]
            name = f"{sym}{a + 1}"[:4]
            element = sym.strip()[:2].upper()
            lines.append(
                f"HETATM{serial % 100000:5d} {name:<4s} MOL {chain}{(c + 1) % 10000:4d}    "
                f"{x:8.3f}{y:8.3f}{z:8.3f}{1.0:6.2f}{0.0:6.2f}          {element:>2s}"
            )
    lines.append("END")
    return "\n".join(lines) + "\n"


class EnsembleStructure(nglview.Structure, nglview.Trajectory):
    """A molecule and a sequence of its geometries, read by nglview.

    Frame ``i`` of the viewer shows ``frames[i]``; with ``copies > 1`` each frame
    holds that many molecules side by side (an overlay).

    Parameters
    ----------
    symbols : sequence of str, length n_atoms
        Element symbols.
    frames : array_like, shape (n_frames, copies * n_atoms, 3)
        Coordinates in Angstrom (the unit the viewer expects).
    copies : int
        Molecules per frame.
    """

    def __init__(self, symbols: Sequence[str], frames: npt.ArrayLike, *, copies: int = 1) -> None:
        nglview.Structure.__init__(self)
        nglview.Trajectory.__init__(self)
        self.symbols = tuple(symbols)
        arr = np.asarray(frames, dtype=np.float32)
        if arr.ndim == 2:
            arr = arr[None]
        if arr.ndim != 3 or arr.shape[2] != 3 or arr.shape[1] != copies * len(self.symbols):
            raise ValueError(
                f"frames must have shape (n_frames, {copies * len(self.symbols)}, 3); got "
                f"{arr.shape}."
            )
        self.frames = arr
        self.copies = int(copies)
        self.ext = "pdb"
        self.params: dict = {}

    def get_structure_string(self) -> str:
        """PDB text of frame 0."""
        return pdb_block(self.symbols, self.frames[0], copies=self.copies)

    def get_coordinates(self, index: int) -> np.ndarray:
        """Coordinates of frame `index`, shape (copies * n_atoms, 3), Angstrom, float32."""
        return self.frames[int(index)]

    @property
    def n_frames(self) -> int:
        """Number of frames."""
        return int(self.frames.shape[0])
