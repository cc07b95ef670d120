"""A headless HTML report of an ensemble: the counterpart of the explorer for scripts.

``build_report(ens, out)`` writes into the folder `out` (atomically: built in a
temporary sibling folder, then moved into place)::

    index.html                      the page (relative links to everything below)
    figures/trpes_map.png           the total map
    figures/trpes_by_state.png      its decomposition by neutral state (shared colour scale)
    figures/populations.png         populations with intervals and the kinetic fit
    tables/trpes_map.csv            tidy map (delay, energy, intensity, components)
    tables/populations.csv, tables/kinetics.csv, tables/flags.csv,
    tables/clusters.csv, tables/representatives.csv
    structures/representatives.xyz  one aligned medoid per cluster (cluster and weight in
                                    each comment line)

Uses matplotlib without pyplot (no display needed) and never imports the widget stack.
"""

from __future__ import annotations

import html
import os
import shutil
import tempfile
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .data.ensemble import Ensemble
from .errors import StoreError
from .plotting.spectra import plot_components, plot_map

__all__ = ["build_report"]


def _png(fig: Any, path: Path) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, format="png", dpi=110)
    return path


def _csv(table: pd.DataFrame, path: Path) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    table.to_csv(path, index=False)
    return path


def _table_html(table: pd.DataFrame, *, max_rows: int = 30) -> str:
    shown = table.head(max_rows)
    text = shown.to_html(index=False, float_format=lambda x: f"{x:.4g}", border=0,
                         classes="table", na_rep="-", escape=True)
    if len(table) > max_rows:
        text += f"<p><i>{len(table) - max_rows} more rows in the CSV file.</i></p>"
    return text


def build_report(
    ens: Ensemble,
    out: str | os.PathLike[str],
    *,
    photon_energy: float = 5.0,
    probe_fwhm: float = 30.0,
    pump_fwhm: float = 30.0,
    energies: Any = None,
    delays: Any = None,
    n_clusters: int = 3,
    exclude_flagged: bool = True,
    title: str = "ensemblelab report",
    source: str | None = None,
    overwrite: bool = False,
) -> Path:
    """Write an HTML report (map, decompositions, populations and fit, flags, clusters,
    representative structures) into the folder `out`.

    Parameters
    ----------
    ens : Ensemble
        The ensemble (never modified).
    out : path
        Output folder; it must not exist unless `overwrite`.
    photon_energy, probe_fwhm, pump_fwhm : float
        Probe photon energy (eV) and intensity FWHM of probe and pump (fs).
    energies, delays : array_like, optional
        Map grids (eV, fs); default 0 .. photon_energy and the trajectory times.
    n_clusters : int
        Clusters per active state.
    exclude_flagged : bool
        Compute map, populations and clusters without the flagged trajectories.
    title : str
        Page title.
    source : str, optional
        Where the data came from (shown on the page).
    overwrite : bool
        Replace an existing `out` folder.

    Returns
    -------
    Path
        ``out/index.html``.
    """
    from .compute.kinetics.populations import populations
    from .compute.kinetics.rates import fit_kinetics
    from .compute.spectroscopy.pulses import GaussianPulse
    from .compute.spectroscopy.spectra import compute_trpes
    from .compute.structures.clustering import cluster_snapshots
    from .compute.structures.outliers import flag_trajectories
    from .compute.structures.representatives import cluster_representatives

    out = Path(out)
    if out.exists() and not overwrite:
        raise StoreError(f"{out} exists; pass overwrite=True (--overwrite) to replace it.")
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.", dir=out.parent))
    notes: list[str] = []
    try:
        sections: list[str] = []
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            # ---------------------------------------------------------- quality
            flags = flag_trajectories(ens)
            _csv(flags, tmp / "tables" / "flags.csv")
            flagged = flags.loc[flags["flagged"].astype(bool)] if "flagged" in flags else flags
            clean = ens.without(flagged["traj"].tolist()) if exclude_flagged and len(
                flagged) else ens
            used = (f"{clean.n_trajectories} of {ens.n_trajectories} trajectories"
                    + (" (flagged ones left out)" if clean is not ens else ""))

            # ---------------------------------------------------------- map
            probe = GaussianPulse(photon_energy=photon_energy, fwhm=probe_fwhm)
            pump = GaussianPulse(photon_energy=photon_energy, fwhm=pump_fwhm) \
                if pump_fwhm > 0 else None
            t = clean.snapshots["time"].to_numpy()
            t = t[np.isfinite(t)]
            e_grid = (np.linspace(0.0, photon_energy, 251) if energies is None
                      else np.asarray(energies, float))
            d_grid = (np.linspace(float(t.min()) - 1.5 * np.hypot(probe_fwhm, pump_fwhm),
                                  float(t.max()), 161) if delays is None
                      else np.asarray(delays, float))
            trpes = compute_trpes(clean, probe=probe, pump=pump, energies=e_grid,
                                  delays=d_grid, by="neutral", progress=False)
            _png(plot_map(trpes, title="TRPES map (total)"),
                 tmp / "figures" / "trpes_map.png")
            _png(plot_components(trpes, include_total=False),
                 tmp / "figures" / "trpes_by_state.png")
            _csv(trpes.to_frame(), tmp / "tables" / "trpes_map.csv")
            sections.append(
                "<h2>Time-resolved photoelectron spectrum</h2>"
                f"<p>Probe {photon_energy:g} eV, probe FWHM {probe_fwhm:g} fs, pump FWHM "
                f"{pump_fwhm:g} fs; {used}.</p>"
                "<img src='figures/trpes_map.png' alt='TRPES map'>"
                "<h3>Decomposition by neutral state</h3>"
                "<img src='figures/trpes_by_state.png' alt='decomposition by state'>"
                "<p><a href='tables/trpes_map.csv'>tables/trpes_map.csv</a></p>")

            # ---------------------------------------------------------- populations
            from .plotting.populations import plot_populations

            pop = populations(clean)
            _csv(pop, tmp / "tables" / "populations.csv")
            fit = None
            try:
                fit = fit_kinetics(pop, scheme="single", interval="covariance")
            except Exception as exc:  # noqa: BLE001 - reported on the page
                notes.append(f"kinetic fit failed: {exc}")
            fig = plot_populations(pop, fit=fit, title="populations")
            _png(fig, tmp / "figures" / "populations.png")
            text = ("<h2>Populations</h2><img src='figures/populations.png' "
                    "alt='populations'><p><a href='tables/populations.csv'>"
                    "tables/populations.csv</a></p>")
            if fit is not None:
                _csv(fit.summary, tmp / "tables" / "kinetics.csv")
                text += ("<h3>Kinetic fit</h3>" + f"<p>{html.escape(fit.interval_method)}</p>"
                         + _table_html(fit.summary))
            sections.append(text)

            # ---------------------------------------------------------- flags
            cols = [c for c in ("traj", "reason", "first_bad_time", "score") if c in flags]
            sections.append(
                f"<h2>Flagged trajectories</h2><p>{len(flagged)} of {ens.n_trajectories} "
                "flagged.</p>" + (_table_html(flagged[cols]) if len(flagged) else "")
                + "<p><a href='tables/flags.csv'>tables/flags.csv</a></p>")

            # ---------------------------------------------------------- clusters
            clusters = cluster_snapshots(clean, n_clusters=n_clusters)
            _csv(clusters.summary, tmp / "tables" / "clusters.csv")
            keep = [c for c in ("cluster", "size", "fraction", "lower", "upper",
                                "n_trajectories", "time_median", "silhouette")
                    if c in clusters.summary]
            reps = cluster_representatives(clean, clusters)
            _, rep_csv = reps.write(tmp / "structures" / "representatives.xyz",
                                      format="xyz", overwrite=True)
            rep_csv_target = tmp / "tables" / "representatives.csv"
            shutil.move(str(rep_csv), rep_csv_target)
            rkeep = [c for c in ("group", "snapshot", "traj", "time", "active", "weight",
                                 "rmsd_to_reference") if c in reps.table]
            sections.append(
                "<h2>Clusters (by structure within each active state)</h2>"
                + _table_html(clusters.summary[keep])
                + "<p><a href='tables/clusters.csv'>tables/clusters.csv</a></p>"
                "<h2>Representative structures</h2><p>The medoid of every cluster, aligned "
                "to a common frame: <a href='structures/representatives.xyz'>"
                "structures/representatives.xyz</a>.</p>" + _table_html(reps.table[rkeep]))
        notes += sorted({f"{w.category.__name__}: {w.message}" for w in caught})

        head = (f"<h1>{html.escape(title)}</h1>"
                + (f"<p>Data: {html.escape(source)}</p>" if source else "")
                + _table_html(pd.DataFrame(ens._summary_rows(), columns=["", "value"])))
        if notes:
            head += "<h3>Notes</h3><ul>" + "".join(
                f"<li>{html.escape(n)}</li>" for n in notes) + "</ul>"
        style = ("body{font-family:sans-serif;max-width:1100px;margin:auto} "
                 "img{max-width:100%} table{border-collapse:collapse;font-size:13px} "
                 "td,th{padding:2px 8px;border-bottom:1px solid #ddd}")
        page = ("<!DOCTYPE html><html><head><meta charset='utf-8'>"
                f"<title>{html.escape(title)}</title><style>{style}</style></head><body>"
                + head + "".join(sections) + "</body></html>")
        (tmp / "index.html").write_text(page, encoding="utf-8")
        # move into place
        if out.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{out.name}.old.", dir=out.parent))
            os.replace(out, old / out.name)
            os.replace(tmp, out)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return out / "index.html"
