"""Report section "Is the ensemble large enough?", used by
:func:`ensemblelab.report.build_report`.

The populations are recomputed on nested random subsets of the trajectories; the error
against the full ensemble is shown as a function of the trajectory count, with the
count needed for a target precision. A builder that cannot run raises ``ValueError``
with the reason (the report then shows the section as missing, with that reason).
"""

from __future__ import annotations

import html
from pathlib import Path
from typing import TYPE_CHECKING

from ._csv import to_csv_text

if TYPE_CHECKING:
    from .data.ensemble import Ensemble

__all__ = ["CONVERGENCE_TARGET", "convergence_section"]

#: Root-mean-square population error the convergence section asks for (our default
#: choice: two percentage points).
CONVERGENCE_TARGET = 0.02


def convergence_section(ens: Ensemble, folder: Path, *,
                        target: float = CONVERGENCE_TARGET) -> str:
    """Write ``figures/convergence.png`` and ``tables/convergence.csv``; return the HTML.

    Parameters
    ----------
    ens : Ensemble
        The trajectories the report uses (exclusions already applied).
    folder : Path
        The report folder being written (its ``figures/`` and ``tables/`` are created).
    target : float
        Root-mean-square population error (fraction, 0-1) to estimate the needed
        trajectory count for.

    Returns
    -------
    str
        The section's HTML.
    """
    # imported on use: importing the report stays light (no matplotlib, no scipy.stats)
    from .compute.uncertainty.convergence import convergence
    from .plotting.convergence import plot_convergence
    from .plotting.populations import savefig

    conv = convergence(ens, target=target)
    (folder / "figures").mkdir(parents=True, exist_ok=True)
    (folder / "tables").mkdir(parents=True, exist_ok=True)
    savefig(plot_convergence(conv), folder / "figures" / "convergence.png", dpi=300)
    (folder / "tables" / "convergence.csv").write_text(to_csv_text(conv.table),
                                                       encoding="utf-8")
    return ("<h2>Is the ensemble large enough?</h2>"
            "<img src='figures/convergence.png' alt='convergence' style='width:495px'>"
            f"<p>{html.escape(conv.verdict())}</p><p>Populations recomputed on "
            f"nested random subsets ({len(conv.table)} sizes x "
            f"{int(conv.errors['nesting'].nunique())} orders); error: deviation "
            "from all trajectories, corrected for the finite population. <a "
            "href='tables/convergence.csv'>tables/convergence.csv</a></p>")
