r"""Figures for a paper from a results folder: one function per figure, each only reads tables.

Every plot function takes the loaded results (a :class:`~dihedra.trajectory.result.TrackResult`)
or the tables it needs, plus ``ax=None``, draws on ``ax`` (a new figure when ``None``) and returns
the axes, so figures compose into panels. None of them recomputes a result: they read the tables
that ``track``, ``profile``, ``compare``, ``kinetics``, ``couplings`` and ``ramachandran`` wrote.

===  =========================================  ==============================================
#    function                                   reads
===  =========================================  ==============================================
1    :func:`plot_angle_series`                  ``angles.parquet`` (via :func:`read_angle_series`)
2    :func:`plot_state_raster`                  ``states.parquet`` (via :func:`read_state_raster`)
3    :func:`plot_profile`                       ``profiles.csv`` (+ ``comparison_profiles.csv``)
4    :func:`plot_populations`                   ``populations_by_type.csv`` (+ ``comparison.csv``)
5    :func:`plot_free_energy_map`               ``profiles_2d.csv``
6    :func:`plot_transition_diagram`            ``transitions.csv``, ``lifetimes.csv``
7    :func:`plot_lifetimes`                     ``lifetimes.csv`` (+ ``dwell_survival.csv``)
8    :func:`plot_convergence`                   ``blocks.npz``, ``populations*.csv``
9    :func:`plot_couplings`                     ``couplings_vs_experiment.csv``
10   :func:`plot_refit_profile` /               ``refit_profiles.csv`` / ``refit_populations.csv``,
     :func:`plot_refit_populations`,            ``refit_correction.csv`` (``dihedra refit``)
     :func:`plot_correction`
11   :func:`plot_ramachandran_regions`          ``ramachandran_by_type.csv`` (``dihedra ramachandran``)
===  =========================================  ==============================================

:func:`figure_set` decides which figures a folder can make (a figure appears as soon as its data
exist; what a folder lacks is skipped with a one-line note) and :func:`write_figures` saves them;
``dihedra figures`` and ``dihedra report`` use both.

Modules
-------
``style``
    colours (one per state, Okabe & Ito), journal widths, the :func:`style` context, file metadata
``common``
    drawing helpers the figures share (notes and legends above the axes, state sectors, the
    symbol of a torsion on its axis, time units, energy columns)
``choice``
    the informative types and torsions shown when none are chosen
``timeseries``, ``raster``
    figures 1 and 2 and the chunked readers of ``angles.parquet`` / ``states.parquet``
``rarestates``
    the rule that keeps a rare state (a cis ω, a rare rotamer) visible in the raster
``profiles``, ``populations``, ``maps``
    figures 3, 4 and 5
``kinetics``, ``convergence``, ``couplings``
    figures 6 and 7, figure 8, figure 9
``refit``
    figure 10 (a fitted torsion correction)
``ramachandran``
    figure 11 (the Ramachandran regions per residue type, drawn with the bars of figure 4)
``figureset``
    :func:`figure_set`, :func:`write_figures`, :class:`FigureItem`, :class:`FigureSet`

Example
-------
>>> from dihedra import track, example_path
>>> from dihedra.presentation.figures import plot_convergence, style
>>> res = track(example_path("hexane.pdb"), [example_path("hexane.xtc")], stop=200)  # doctest: +SKIP
>>> with style():                                                                      # doctest: +SKIP
...     ax = plot_convergence(res, res.torsion_set.types[0])
"""

from .choice import CHOICE_RULE, informative_types, representative_torsion
from .common import angle_label, energy_columns, sector_spans, time_scale, torsion_symbol
from .convergence import REPLICA_STYLES, plot_convergence
from .couplings import RELATION_MARKERS, plot_couplings
from .figureset import FigureItem, FigureSet, figure_set, safe_name, write_figures
from .kinetics import plot_lifetimes, plot_transition_diagram
from .maps import MAP_CEILING_KJ_MOL, map_colormap, plot_free_energy_map
from .populations import SOURCE_STYLES, comparison_populations, plot_populations
from .profiles import plot_profile, select_profile
from .ramachandran import REGION_COLOURS, plot_ramachandran_regions
from .refit import REFIT_STYLES, has_target, plot_correction, plot_refit_populations, plot_refit_profile
from .style import (ANGLE_LABEL, CYCLIC_PALETTE, DOUBLE_COLUMN_IN, ENERGY_UNIT_LABELS, FORMATS, INK, NEUTRAL,
                    OKABE_ITO, POPULATION_LABEL, SECTOR_ALPHA, SINGLE_COLUMN_IN, STATE_COLOURS, UNDEFINED_COLOUR,
                    UNSAMPLED_COLOUR, WIDTHS, state_colours, style)
from .raster import StateRaster, plot_state_raster, read_state_raster
from .timeseries import AngleSeries, plot_angle_series, read_angle_series

__all__ = [
    "ANGLE_LABEL", "CHOICE_RULE", "MAP_CEILING_KJ_MOL", "angle_label", "informative_types", "map_colormap",
    "representative_torsion", "torsion_symbol", "AngleSeries", "CYCLIC_PALETTE", "DOUBLE_COLUMN_IN", "ENERGY_UNIT_LABELS", "FORMATS",
    "FigureItem", "FigureSet", "INK", "NEUTRAL", "OKABE_ITO", "POPULATION_LABEL", "REFIT_STYLES", "RELATION_MARKERS",
    "REPLICA_STYLES", "SECTOR_ALPHA", "SINGLE_COLUMN_IN", "SOURCE_STYLES", "STATE_COLOURS", "StateRaster",
    "UNDEFINED_COLOUR", "UNSAMPLED_COLOUR", "WIDTHS", "comparison_populations", "energy_columns", "figure_set",
    "has_target", "plot_angle_series", "plot_convergence", "plot_correction", "plot_couplings",
    "plot_free_energy_map", "plot_lifetimes", "plot_populations", "plot_profile", "plot_ramachandran_regions",
    "plot_refit_populations", "REGION_COLOURS",
    "plot_refit_profile", "plot_state_raster", "plot_transition_diagram", "read_angle_series", "read_state_raster",
    "safe_name", "sector_spans", "select_profile", "state_colours", "style", "time_scale", "write_figures",
]
