r"""Figure 11: the populations of the Ramachandran regions per residue type (``dihedra ramachandran``).

The regions of the (phi, psi) plane take colours of their own, from the same colour-blind-safe
palette as the states (Okabe & Ito 2008), and ``other`` (outside every region) the neutral grey;
a region a residue type never visited has no bar (a bar of length 0 would only take room). The
bars are those of figure 4 (:func:`~dihedra.presentation.figures.populations.plot_group_bars`), so
tens of residue types stand in rows.
"""

from __future__ import annotations

import pandas as pd

from .populations import plot_group_bars
from .style import CYCLIC_PALETTE, NEUTRAL, OKABE_ITO

#: Colour of every region of :mod:`dihedra.analysis.ramachandran`.
REGION_COLOURS = {"alpha-R": OKABE_ITO["blue"], "beta": OKABE_ITO["orange"], "PPII": OKABE_ITO["bluish green"],
                  "alpha-L": OKABE_ITO["reddish purple"], "other": NEUTRAL}


def region_colours(regions):
    """The colour of every region name: :data:`REGION_COLOURS`, then the cyclic palette for others."""
    rest = [r for r in dict.fromkeys(regions) if r not in REGION_COLOURS]
    return {**{r: REGION_COLOURS[r] for r in regions if r in REGION_COLOURS},
            **{r: CYCLIC_PALETTE[k % len(CYCLIC_PALETTE)] for k, r in enumerate(rest)}}


def visited(regions_by_type):
    """The rows of ``ramachandran_by_type.csv`` of regions the residue type was seen in."""
    pop = pd.to_numeric(regions_by_type["population"], errors="coerce")
    return regions_by_type[pop > 0]


def plot_ramachandran_regions(regions_by_type, types=None, ax=None, legend=True, grow=None):
    """Figure 11: the population of every Ramachandran region per residue type, with standard
    errors.

    Parameters
    ----------
    regions_by_type : DataFrame
        ``ramachandran_by_type.csv`` (type, region, population, population_err).
    types : list of str, optional
        Residue types to show (default all, in table order).
    grow : bool, optional
        Let the figure take the height that types in rows need (default: when this function
        makes the figure).

    Returns
    -------
    Axes
    """
    order = list(dict.fromkeys(regions_by_type["region"]))
    return plot_group_bars(visited(regions_by_type), order, region_colours(order), groups=types, ax=ax,
                           legend=legend, grow=grow, column="region")
