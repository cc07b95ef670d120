"""signal_extent: the kinetic-energy (or delay) range where a map holds signal."""

from __future__ import annotations

import numpy as np
import pytest

from ensemblelab.compute.spectroscopy.extent import signal_extent
from ensemblelab.data.spectrum import TRPESMap
from ensemblelab.errors import SchemaError


def _gauss_map(centre: float, width: float, *, e_max: float = 5.8, n: int = 581) -> TRPESMap:
    """exp(-((E - centre)/width)^2) at every delay; grid step 0.01 eV (invented)."""
    e = np.linspace(0.0, e_max, n)
    d = np.linspace(-50.0, 300.0, 8)
    decay = np.exp(-np.clip(d, 0, None) / 100.0)[:, None]
    return TRPESMap(kinetic_energies=e, delays=d,
                    intensity=decay * np.exp(-((e - centre) / width) ** 2))


def test_signal_extent_matches_the_gaussian_threshold():
    m = _gauss_map(2.0, 0.3)
    for fraction in (0.01, 0.1, 0.5):
        lo, hi = signal_extent(m, fraction=fraction, pad=0.0)
        # exp(-x^2/w^2) = f at x = w sqrt(ln(1/f)) (computed independently (not published));
        # the result is the outermost grid points above it plus one grid step (0.01 eV)
        half = 0.3 * np.sqrt(np.log(1.0 / fraction))
        assert lo == pytest.approx(2.0 - half - 0.01, abs=0.011)
        assert hi == pytest.approx(2.0 + half + 0.01, abs=0.011)


def test_signal_extent_pad_is_a_fraction_of_the_width_and_clipped_to_the_grid():
    m = _gauss_map(2.0, 0.3)
    lo0, hi0 = signal_extent(m, fraction=0.01, pad=0.0)
    lo, hi = signal_extent(m, fraction=0.01, pad=0.25)
    width = (hi0 - 0.01) - (lo0 + 0.01)  # without the one-step minimum margin
    assert lo == pytest.approx(lo0 + 0.01 - 0.25 * width, abs=1e-9)
    assert hi == pytest.approx(hi0 - 0.01 + 0.25 * width, abs=1e-9)
    edge = _gauss_map(0.1, 0.3)  # signal at the grid's start: clipped at 0 eV
    assert signal_extent(edge, pad=0.5)[0] == 0.0


def test_signal_extent_ends_before_the_photon_energy_and_follows_delays():
    m = _gauss_map(1.5, 0.4)
    assert signal_extent(m)[1] < 3.0 < float(m.kinetic_energies[-1])
    lo, hi = signal_extent(m, axis="delay", fraction=0.2, pad=0.0)
    # decay exp(-d/100) > 0.2 up to d = 100 ln 5 = 161 fs; delay grid step 50 fs
    # (computed independently (not published))
    assert lo == pytest.approx(-50.0) and hi == pytest.approx(200.0)


def test_signal_extent_without_signal_returns_the_whole_grid():
    m = _gauss_map(2.0, 0.3)
    for data in (np.zeros(m.shape), np.full(m.shape, np.nan)):
        assert signal_extent(m.replace(intensity=data)) == (0.0, 5.8)


def test_signal_extent_counts_negative_signal():
    m = _gauss_map(2.0, 0.3)
    lo, hi = signal_extent(m.replace(intensity=-m.intensity), pad=0.0)
    assert lo == pytest.approx(signal_extent(m, pad=0.0)[0])
    assert hi == pytest.approx(signal_extent(m, pad=0.0)[1])


@pytest.mark.parametrize("kw, match", [
    ({"fraction": 1.0}, "'fraction' parameter"),
    ({"fraction": -0.1}, "'fraction' parameter"),
    ({"pad": -1.0}, "'pad' parameter"),
    ({"axis": "time"}, "'axis' parameter"),
])
def test_signal_extent_rejects_bad_arguments(kw, match):
    with pytest.raises(SchemaError, match=match):
        signal_extent(_gauss_map(2.0, 0.3), **kw)


def test_signal_extent_is_exported_at_the_top_level():
    import ensemblelab

    assert ensemblelab.signal_extent is signal_extent
