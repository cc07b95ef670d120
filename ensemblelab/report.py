"""A headless HTML report of an ensemble: the counterpart of the explorer for scripts.

``build_report(ens, out)`` writes into the folder `out` (atomically: built in a
temporary sibling folder, then moved into place)::

    index.html                      the page (relative links to everything below)
    figures/trpes_map.png           the total map (single column, 300 dpi)
    figures/trpes_by_state.png      its decomposition by neutral state (shared colour scale)
    figures/populations.png         populations with intervals and the kinetic fit
    figures/{scattering,transient_absorption,convergence}.png (tables/*.csv beside):
                                    further observables; error against trajectory count
    tables/trpes_map.csv            tidy map (delay, energy, intensity, components)
    tables/populations.csv, tables/kinetics.csv, tables/flags.csv,
    tables/clusters.csv, tables/representatives.csv, tables/convergence.csv
    structures/representatives.xyz  one aligned medoid per cluster (cluster and
                                    cluster_fraction in each comment line)

The map starts from the same pulses as the explorer: the ensemble's suggested
probe and pump (``metadata["suggested_probe"]``, ``["suggested_pump"]``) unless
given, and the page states them. Every number with an interval carries the
interval's method and level. A section that cannot be computed (for example every
trajectory is flagged, or the map's grid is empty) is replaced by a note saying
why; the rest of the report is still written.

Uses matplotlib without pyplot (no display needed) and never imports the widget stack;
matplotlib, scipy.stats and scikit-learn are imported when a report is built, not
with this module.
"""

from __future__ import annotations

import html
import json
import os
import shutil
import tempfile
import time
import warnings
from collections.abc import Callable
from pathlib import Path
from typing import Any, cast

import numpy as np
import pandas as pd
from tqdm.auto import tqdm

from ._atomic import atomic_write_text, replace_folder
from ._csv import neutralise_csv_text, to_csv_text
from .compute._threads import few_threads
from .data.ensemble import Ensemble
from .errors import SchemaError, StoreError
from .report_convergence import convergence_section
from .report_inputs import hill_formula, report_pulses
from .report_observables import OBSERVABLE_SECTIONS

__all__ = ["build_report", "hill_formula", "report_pulses"]

#: Bootstrap resamples of the kinetic fits (percentile intervals over trajectories).
N_BOOT = 1000
#: Interval level of every interval on the page.
CI = 0.95
#: Width (CSS pixels) at which single- and double-column figures are shown.
_IMG_WIDTH = {"single": 495, "double": 1050}


class _Missing(Exception):
    """A section cannot be computed; the message says why (shown on the page)."""


def _default_energies(photon_energy: float) -> np.ndarray:
    # the explorer's default grid (widgets map view): 0 .. h nu, 241 points
    return np.linspace(0.0, float(photon_energy), 241)


def _default_delays(ens: Ensemble, fwhm_cc: float) -> np.ndarray:
    # the explorer's default grid: 1.5 cross-correlation FWHM before the first time
    t = ens.snapshots["time"].to_numpy()
    t = t[np.isfinite(t)]
    if t.size == 0:
        raise _Missing("the ensemble has no finite snapshot times, so the delay grid is "
                       "empty.")
    return np.linspace(float(t.min()) - 1.5 * fwhm_cc, float(t.max()), 161)


def _png(fig: Any, path: Path) -> Path:
    from .plotting.populations import savefig

    path.parent.mkdir(parents=True, exist_ok=True)
    return savefig(fig, path)  # 300 dpi (common practice for print)


def _img(rel: str, alt: str, width: str = "single") -> str:
    return (f"<img src='{rel}' alt='{html.escape(alt)}' "
            f"style='width:{_IMG_WIDTH[width]}px'>")


def _csv(table: pd.DataFrame, path: Path) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(to_csv_text(table), encoding="utf-8")  # formula-like cells neutralised
    return path


#: marker file inside a report folder: what ensemblelab wrote there (JSON list of files)
REPORT_MARKER = ".ensemblelab-report.json"


def _files_below(folder: Path) -> list[str]:
    out = []
    for dirpath, dirnames, filenames in os.walk(folder, followlinks=False):
        d = Path(dirpath)
        out += [str((d / n).relative_to(folder)) for n in filenames]
        out += [str((d / n).relative_to(folder)) for n in dirnames if (d / n).is_symlink()]
    return sorted(out)


def _check_replaceable(out: Path, ens: Ensemble, source: str | None) -> None:
    """Refuse to replace anything but a report folder that ensemblelab wrote.

    Never the input (or a folder holding or inside it), never a folder without the
    report marker, never one holding files the marker does not list.
    """
    real = out.resolve()
    inputs = [Path(s["path"]) for s in ens.metadata.get("sources", [])
              if isinstance(s, dict) and isinstance(s.get("path"), str)]
    if source:
        inputs.append(Path(source))
    for src in inputs:
        try:
            r = src.resolve()
        except (OSError, RuntimeError):
            continue
        if r == real or real in r.parents or r in real.parents:
            raise StoreError(f"{out}: refusing to write the report there: it is, holds or lies "
                             f"inside the input data ({src}). Hint: choose another --out folder.")
    if not out.exists():
        return
    if not out.is_dir() or out.is_symlink():
        raise StoreError(f"{out}: exists and is not a report folder. Hint: choose another path.")
    marker = out / REPORT_MARKER
    try:
        listed = json.loads(marker.read_text(encoding="utf-8"))["files"]
        if not isinstance(listed, list):
            raise TypeError
    except (OSError, ValueError, KeyError, TypeError):
        raise StoreError(f"{out}: refusing to overwrite a folder that ensemblelab did not write "
                         f"as a report (no valid {REPORT_MARKER}). Hint: choose a new --out "
                         "folder or remove this one yourself.") from None
    foreign = sorted(set(_files_below(out)) - set(listed) - {REPORT_MARKER})
    if foreign:
        raise StoreError(f"{out}: refusing to overwrite: the report folder holds "
                         f"{len(foreign)} file(s) ensemblelab did not write ({foreign[:5]}). "
                         "Hint: move them out, or choose another --out folder.")


def _table_html(table: pd.DataFrame, *, max_rows: int = 30) -> str:
    shown = table.head(max_rows)
    text = shown.to_html(index=False, float_format=lambda x: f"{x:.4g}", border=0,
                         classes="table", na_rep="-", escape=True)
    if len(table) > max_rows:
        text += f"<p><i>{len(table) - max_rows} more rows in the CSV file.</i></p>"
    return text


def _missing(title: str, reason: str) -> str:
    return (f"<h2>{html.escape(title)}</h2><p class='missing'><b>Section missing:</b> "
            f"{html.escape(reason)}</p>")


def _section(title: str, build: Callable[[], str], notes: list[str],
             timings: dict[str, float] | None = None, bar: Any = None) -> str:
    """Run a section builder (timed into `timings`, advancing `bar`); on a data problem,
    a note saying why it is missing."""
    if bar is not None:
        bar.set_postfix_str(title, refresh=True)
    t0 = time.perf_counter()
    try:
        return build()
    except _Missing as exc:
        reason = str(exc)
    except (ValueError, ArithmeticError, RuntimeError) as exc:
        reason = f"it could not be computed ({type(exc).__name__}: {exc})"
    finally:
        if timings is not None:
            timings[title] = time.perf_counter() - t0
        if bar is not None:
            bar.update(1)
    notes.append(f"{title}: section missing; {reason}")
    return _missing(title, reason)


def _interval_text(ci: float, method: str) -> str:
    return f"{int(round(ci * 100))} % {method}"


def _fit_table(fits: list[Any], names: dict[int, str]) -> pd.DataFrame:
    """One row per fitted parameter: scheme, value, interval and how it was obtained."""
    from .plotting.populations import scheme_name

    rows = []
    for fit in fits:
        for r in fit.summary.itertuples():
            rows.append({
                "scheme": scheme_name(fit, names), "parameter": r.parameter,
                "value": r.value, "lower": r.lower, "upper": r.upper, "unit": r.unit,
                "fixed": bool(r.fixed), "rms_residual": float(fit.rmse),
                "interval": "fixed" if r.fixed else _interval_text(fit.ci,
                                                                  fit.interval_method),
            })
    return pd.DataFrame(rows)


def _fit_html(table: pd.DataFrame) -> str:
    shown = []
    for r in table.itertuples():
        if r.fixed:
            value = f"{r.value:.4g} {r.unit} (fixed)"
        elif np.isfinite(cast(float, r.lower)) and np.isfinite(cast(float, r.upper)):
            value = f"{r.value:.4g} {r.unit} [{r.lower:.4g}, {r.upper:.4g}]"
        else:
            value = f"{r.value:.4g} {r.unit} (no interval)"
        shown.append({"scheme": r.scheme, "parameter": r.parameter,
                      "value [interval]": value, "interval": r.interval,
                      "rms residual": r.rms_residual})
    return _table_html(pd.DataFrame(shown))


def _sequential_states(pop: pd.DataFrame) -> list[int] | None:
    """A -> B -> C for a sequential fit: the state populated first, then the others by
    the time their population peaks (None with fewer than three states)."""
    states = sorted(int(s) for s in pop["state"].unique())
    if len(states) < 3:
        return None
    first_t = pop["time"].min()
    start = pop[pop["time"] == first_t].set_index("state")["population"]
    a = int(start.idxmax())
    peaks = {s: float(pop.loc[pop["state"] == s].sort_values("population")["time"].iloc[-1])
             for s in states if s != a}
    rest = sorted(peaks, key=lambda s: (peaks[s], -s))
    return [a, *rest[:2]]


def build_report(
    ens: Ensemble,
    out: str | os.PathLike[str],
    *,
    photon_energy: float | None = None,
    probe_fwhm: float | None = None,
    pump_fwhm: float | None = None,
    energies: Any = None,
    delays: Any = None,
    energy_range: Any = "signal",
    n_clusters: int = 3,
    exclude_flagged: bool = True,
    n_boot: int = N_BOOT,
    title: str = "ensemblelab report",
    source: str | None = None,
    overwrite: bool = False,
    progress: bool = True,
    timings: dict[str, float] | None = None,
) -> Path:
    """Write an HTML report (map, decompositions, populations and fits, flags, clusters,
    representative structures) into the folder `out`.

    Parameters
    ----------
    ens : Ensemble
        The ensemble (never modified).
    out : path
        Output folder; it must not exist unless `overwrite`.
    photon_energy, probe_fwhm, pump_fwhm : float, optional
        Probe photon energy (eV) and intensity FWHM of probe and pump (fs); default
        the ensemble's suggested pulses, as in the explorer (see :func:`report_pulses`).
    energies, delays : array_like, optional
        Map grids (eV, fs); default as in the explorer: 0 .. photon energy (241
        points) and 1.5 cross-correlation FWHM before the first time to the last
        (161 points).
    energy_range : "signal", "full" or (float, float)
        Kinetic-energy range of the map figures: where the map exceeds 1 % of its
        maximum (padded), the whole grid, or explicit limits in eV.
    n_clusters : int
        Clusters per active state.
    exclude_flagged : bool
        Compute map, populations and clusters without the flagged trajectories.
    n_boot : int
        Bootstrap resamples of the kinetic fits (0: covariance intervals, stated).
    title : str
        Page title.
    source : str, optional
        Where the data came from (shown on the page).
    overwrite : bool
        Replace an existing `out` folder.
    progress : bool
        Show a progress bar (tqdm.auto) over the sections.
    timings : dict, optional
        Filled with the wall time in seconds of every section (keys: the section
        titles) and of writing the page ("Page").

    Returns
    -------
    Path
        ``out/index.html``.
    """
    from .compute.kinetics.populations import populations
    from .compute.kinetics.rates import fit_kinetics
    from .compute.spectroscopy import compute_trpes
    from .compute.spectroscopy.pulses import GaussianPulse
    from .compute.structures.clustering import cluster_snapshots
    from .compute.structures.outliers import flag_trajectories
    from .compute.structures.representatives import cluster_representatives
    from .io.structures import write_structures
    from .plotting.populations import plot_populations, scheme_name
    from .plotting.spectra import plot_components, plot_map, resolve_energy_range

    out = Path(out)
    _check_replaceable(out, ens, source)
    if out.exists() and not overwrite:
        raise StoreError(f"{out} exists; pass overwrite=True (--overwrite) to replace it.")
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.", dir=out.parent))
    notes: list[str] = []
    pulses = report_pulses(ens, photon_energy=photon_energy, probe_fwhm=probe_fwhm,
                           pump_fwhm=pump_fwhm)
    names = {i: str(lab) for i, lab in enumerate(ens.state_labels)}
    bar = tqdm(total=7, desc="report", unit="section", disable=not progress, leave=False)
    try:
        sections: list[str] = []
        # small ensembles: one OpenMP/BLAS thread (pools cost more than the work there)
        with bar, few_threads(ens.n_snapshots), warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            # ---------------------------------------------------------- quality
            state: dict[str, Any] = {"clean": ens, "flagged": pd.DataFrame(),
                                     "used": f"all {ens.n_trajectories} trajectories"}

            def quality() -> str:
                flags = flag_trajectories(ens)
                _csv(flags, tmp / "tables" / "flags.csv")
                flagged = flags.loc[flags["flagged"].astype(bool)] if "flagged" in flags \
                    else flags
                state["flagged"] = flagged
                if exclude_flagged and len(flagged):
                    clean = ens.without(flagged["traj"].tolist())
                    state["clean"] = clean
                    state["used"] = (f"{clean.n_trajectories} of {ens.n_trajectories} "
                                     "trajectories (flagged ones left out)")
                cols = [c for c in ("traj", "reason", "first_bad_time", "score") if c in flags]
                return (f"<h2>Flagged trajectories</h2><p>{len(flagged)} of "
                        f"{ens.n_trajectories} flagged.</p>"
                        + (_table_html(flagged[cols]) if len(flagged) else "")
                        + "<p><a href='tables/flags.csv'>tables/flags.csv</a></p>")

            quality_html = _section("Flagged trajectories", quality, notes, timings, bar)

            def need_trajectories() -> Ensemble:
                clean = state["clean"]
                if clean.n_trajectories == 0:
                    raise _Missing(
                        f"every trajectory is flagged ({len(state['flagged'])} of "
                        f"{ens.n_trajectories}), so none is left to compute it from; see "
                        "'Flagged trajectories', or build the report with "
                        "exclude_flagged=False to include them.")
                return clean

            # ---------------------------------------------------------- map
            def trpes_section() -> str:
                clean = need_trajectories()
                hv, p_fwhm, q_fwhm = (pulses["photon_energy"], pulses["probe_fwhm"],
                                      pulses["pump_fwhm"])
                probe = GaussianPulse(photon_energy=hv, fwhm=p_fwhm)
                pump = GaussianPulse(photon_energy=pulses["pump_photon_energy"],
                                     fwhm=q_fwhm) if q_fwhm > 0 else None
                e_grid = (_default_energies(hv) if energies is None
                          else np.asarray(energies, float))
                d_grid = (_default_delays(clean, float(np.hypot(p_fwhm, q_fwhm)))
                          if delays is None else np.asarray(delays, float))
                if e_grid.size == 0 or d_grid.size == 0:
                    raise _Missing(f"the map's grid is empty ({e_grid.size} kinetic energies "
                                   f"x {d_grid.size} delays); pass non-empty energies and "
                                   "delays.")
                weighting: dict[str, Any] = {} if pump is not None else {"weights": "uniform"}
                kw = dict(probe=probe, pump=pump, kinetic_energies=e_grid, delays=d_grid,
                          decompose="neutral", progress=False, **weighting)
                try:  # 100 resamples of whole trajectories: the map's uncertainty (of the
                    # total only: the page shows no component intervals, and the total's
                    # replicates do not depend on the decomposition)
                    rse = compute_trpes(clean, interval="bootstrap", n_boot=100,
                                        **(kw | {"decompose": None})).median_rel_se()
                    unc = ("" if rse is None else f"Median relative standard error over the "
                           f"pixels above 5 % of the peak: {100 * rse:.1f} % (percentile "
                           "bootstrap, 100 resamples of whole trajectories, seed 0).")
                except SchemaError as exc:
                    unc = f"No uncertainty: {exc}"
                trpes = compute_trpes(clean, **kw)
                if not np.any(np.isfinite(trpes.intensity) & (trpes.intensity != 0)):
                    raise _Missing("the map has no signal on its grid (every cell is zero or "
                                   "undefined); check the photon energy and the grids.")
                _png(plot_map(trpes, energy_range=energy_range),
                     tmp / "figures" / "trpes_map.png")
                _png(plot_components(trpes, include_total=False, energy_range=energy_range),
                     tmp / "figures" / "trpes_by_state.png")
                _csv(trpes.to_frame(), tmp / "tables" / "trpes_map.csv")
                lo, hi = resolve_energy_range(trpes, energy_range)
                shown = ("where the map exceeds 1 % of its maximum (padded)"
                         if isinstance(energy_range, str) and energy_range == "signal"
                         else "as chosen")
                pump_text = (f"pump {pulses['pump_photon_energy']:g} eV, FWHM {q_fwhm:g} fs"
                             if pump is not None else "no pump (uniform weights)")
                ess = trpes.effective_sample_size
                pump_text += html.escape(
                    f"; trajectory weights '{trpes.params.get('weights')}' (sampling: "
                    f"{trpes.params.get('sampling') or 'not recorded'}), Kish effective "
                    f"sample size {ess:.1f} of {trpes.params.get('n_trajectories')}"
                    if ess is not None else "")
                return (
                    "<h2>Time-resolved photoelectron spectrum</h2>"
                    f"<p>Probe {hv:g} eV, FWHM {p_fwhm:g} fs; {pump_text}: "
                    f"{html.escape(pulses['source'])}. Computed from "
                    f"{html.escape(state['used'])}. The figures show kinetic energies "
                    f"{max(lo, float(e_grid[0])):.2g}-{min(hi, float(e_grid[-1])):.2g} eV "
                    f"({shown}); the grid runs {e_grid[0]:g}-{e_grid[-1]:g} eV (CSV).</p>"
                    + _img("figures/trpes_map.png", "TRPES map")
                    + "<h3>Decomposition by neutral state</h3>"
                    + _img("figures/trpes_by_state.png", "decomposition by state", "double")
                    + f"<p>{html.escape(unc)}</p>"
                    + "<p><a href='tables/trpes_map.csv'>tables/trpes_map.csv</a></p>")

            sections.append(_section("Time-resolved photoelectron spectrum", trpes_section,
                                     notes, timings, bar))
            for obs_title, obs_build in OBSERVABLE_SECTIONS:  # scattering, absorption
                def run(build: Callable[..., str] = obs_build) -> str:
                    clean, pw = need_trajectories(), pulses["pump_fwhm"]
                    pump = GaussianPulse(photon_energy=pulses["pump_photon_energy"],
                                         fwhm=pw) if pw > 0 else None
                    d_grid = (_default_delays(clean, float(np.hypot(pulses["probe_fwhm"], pw)))
                              if delays is None else np.asarray(delays, float))
                    return build(clean, tmp, probe=GaussianPulse(
                        photon_energy=pulses["photon_energy"], fwhm=pulses["probe_fwhm"]),
                        pump=pump, delays=d_grid)
                sections.append(_section(obs_title, run, notes, timings, bar))

            # ---------------------------------------------------------- populations
            def population_section() -> str:
                clean = need_trajectories()
                pop = populations(clean, ci=CI)
                _csv(pop, tmp / "tables" / "populations.csv")
                fits = []
                boot: dict[str, Any] = ({"interval": "bootstrap", "n_boot": n_boot}
                                        if n_boot > 0 else {"interval": "covariance"})
                try:
                    fits.append(fit_kinetics(clean, scheme="single", ci=CI, **boot))
                except (ValueError, ArithmeticError, RuntimeError) as exc:
                    notes.append(f"single-exponential fit failed: {exc}")
                seq = _sequential_states(pop)
                if seq is not None:
                    try:
                        fits.append(fit_kinetics(clean, scheme="sequential", states=seq,
                                                 ci=CI, **boot))
                    except (ValueError, ArithmeticError, RuntimeError) as exc:
                        notes.append(f"sequential fit failed: {exc}")
                shown_fit = fits[0] if fits else None  # the first scheme that fitted
                _png(plot_populations(pop, fit=shown_fit), tmp / "figures" / "populations.png")
                method = str(pop.attrs.get("interval", "wilson"))
                pop_iv = _interval_text(float(pop.attrs.get("ci", CI)),
                                        "Wilson score intervals (Kish effective size)"
                                        if method == "wilson" else f"{method} intervals")
                text = ("<h2>Populations</h2>"
                        + _img("figures/populations.png", "populations")
                        + f"<p>Computed from {html.escape(state['used'])}; bands: "
                        f"{html.escape(pop_iv)}"
                        + (f"; dashed: {html.escape(scheme_name(shown_fit, names))} fit"
                           if shown_fit is not None else "")
                        + ". <a href='tables/populations.csv'>tables/populations.csv</a></p>")
                if fits:
                    table = _fit_table(fits, names)
                    _csv(table, tmp / "tables" / "kinetics.csv")
                    text += ("<h3>Kinetic fits</h3><p>Each value with its interval; the "
                             "interval column gives its level and method.</p>"
                             + _fit_html(table)
                             + "<p><a href='tables/kinetics.csv'>tables/kinetics.csv</a></p>")
                return text

            sections.append(_section("Populations", population_section, notes, timings, bar))
            sections.append(_section(
                "Is the ensemble large enough?",  # too few trajectories: ValueError says so
                lambda: convergence_section(need_trajectories(), tmp), notes, timings, bar))
            sections.append(quality_html)

            # ---------------------------------------------------------- clusters
            def cluster_section() -> str:
                clean = need_trajectories()
                clusters = cluster_snapshots(clean, n_clusters=n_clusters)
                summary = clusters.summary.copy()
                if {"lower", "upper"} <= set(summary.columns):
                    summary["interval"] = _interval_text(
                        CI, "percentile bootstrap over whole trajectories")
                _csv(summary, tmp / "tables" / "clusters.csv")
                keep = [c for c in ("cluster", "size", "fraction", "lower", "upper", "interval",
                                    "n_trajectories", "time_median", "silhouette")
                        if c in summary]
                reps = cluster_representatives(clean, clusters)
                table = reps.table.rename(columns={"weight": "cluster_fraction"})
                info_cols = [c for c in ("group", "kind", "cluster_fraction", "snapshot", "traj",
                                         "time", "active", "size") if c in table]
                _, rep_csv = write_structures(tmp / "structures" / "representatives.xyz",
                                              reps.geometries, reps.symbols, table[info_cols],
                                              format="xyz", overwrite=True)
                rep_csv_target = tmp / "tables" / "representatives.csv"
                rep_csv_target.write_text(neutralise_csv_text(Path(rep_csv).read_text(
                    encoding="utf-8")), encoding="utf-8")
                Path(rep_csv).unlink()
                rkeep = [c for c in ("group", "snapshot", "traj", "time", "active",
                                     "cluster_fraction", "rmsd_to_reference") if c in table]
                return (
                    "<h2>Clusters (by structure within each active state)</h2>"
                    + _table_html(summary[keep])
                    + "<p><a href='tables/clusters.csv'>tables/clusters.csv</a></p>"
                    "<h2>Representative structures</h2><p>The medoid of every cluster, "
                    "aligned to a common frame: <a href='structures/representatives.xyz'>"
                    "structures/representatives.xyz</a>. cluster_fraction: the fraction of "
                    "snapshots in the medoid's cluster.</p>" + _table_html(table[rkeep]))

            sections.append(_section("Clusters", cluster_section, notes, timings, bar))
            t_page = time.perf_counter()
        notes += sorted({f"{w.category.__name__}: {w.message}" for w in caught})

        summary_rows = [(k, f"{ens.n_atoms} ({hill_formula(ens.symbols)})" if k == "atoms"
                         else v) for k, v in ens._summary_rows()]
        head = (f"<h1>{html.escape(title)}</h1>"
                + (f"<p>Data: {html.escape(source)}</p>" if source else "")
                + _table_html(pd.DataFrame(summary_rows, columns=["", "value"])))
        if notes:
            head += "<h3>Notes</h3><ul>" + "".join(
                f"<li>{html.escape(n)}</li>" for n in notes) + "</ul>"
        style = ("body{font-family:sans-serif;max-width:1100px;margin:auto} "
                 "img{max-width:100%} table{border-collapse:collapse;font-size:13px} "
                 "td,th{padding:2px 8px;border-bottom:1px solid #ddd} "
                 ".missing{background:#fff4e5;padding:6px 10px}")
        page = ("<!DOCTYPE html><html><head><meta charset='utf-8'>"
                f"<title>{html.escape(title)}</title><style>{style}</style></head><body>"
                + head + "".join(sections) + "</body></html>")
        (tmp / "index.html").write_text(page, encoding="utf-8")
        atomic_write_text(tmp / REPORT_MARKER, json.dumps(
            {"format": "ensemblelab-report", "files": _files_below(tmp)}, indent=1))
        # move into place: swapped atomically where the system can (the old report, checked
        # above to hold only what ensemblelab wrote, is deleted afterwards)
        if out.exists():
            _check_replaceable(out, ens, source)  # again, just before replacing
        old = replace_folder(tmp, out)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
        if timings is not None:
            timings["Page"] = time.perf_counter() - t_page
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return out / "index.html"
