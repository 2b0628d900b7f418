r"""The figure set of a results folder: which figures its data allow, and writing them to files.

:func:`figure_set` decides which figures a folder can make (a figure appears as soon as its data
exist; what a folder lacks is skipped with a one-line note) and :func:`write_figures` saves them;
``dihedra figures`` and ``dihedra report`` use both.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ...errors import DihedraError, one_of
from ...io.outputs import earlier_outputs, file_set, remove_listed_files, write_file
from ...io.series import ParquetSeries
from ...io.tables import matching_files, read_optional_table as read_optional
from .convergence import plot_convergence
from .couplings import plot_couplings
from .kinetics import plot_lifetimes, plot_transition_diagram
from .maps import MAP_CEILING_KJ_MOL, plot_free_energy_map
from .populations import comparison_populations, plot_populations
from .profiles import has_profile_errors, plot_profile
from .ramachandran import plot_ramachandran_regions
from .refit import has_target, plot_correction, plot_refit_populations, plot_refit_profile
from .choice import CHOICE_RULE, informative_types, representative_torsion
from .common import _as_bool, single_frames
from .style import FORMATS, SINGLE_COLUMN_IN, _metadata, _width_in, style
from .raster import plot_state_raster, read_state_raster
from .timeseries import plot_angle_series, read_angle_series


#: The subfolder of a results folder that :func:`write_figures` draws into.
FIGURES_DIR = "figures/"


@dataclass
class FigureItem:
    """One figure of the set: a file stem, a caption, and the matplotlib figure."""

    name: str
    caption: str
    figure: object
    kind: str = ""


@dataclass
class FigureSet:
    """The figures a folder can make, and a one-line note for each one it cannot."""

    items: list = field(default_factory=list)
    skipped: list = field(default_factory=list)


def safe_name(name):
    """A file-name-safe version of a torsion or type label."""
    return re.sub(r"[^A-Za-z0-9+.=-]+", "_", str(name)).strip("_") or "x"


def _figure(width_in, height_in):
    from matplotlib.figure import Figure

    return Figure(figsize=(width_in, height_in), layout="constrained")


@dataclass
class _Builder:
    """What the figure families share while a set is built: the results, the width, the notes."""

    result: object
    width_in: float
    say: object
    out: FigureSet = field(default_factory=FigureSet)

    @property
    def folder(self):
        return self.result.folder

    @property
    def scheme(self):
        return self.result.scheme

    def add(self, name, caption, figure, kind):
        self.out.items.append(FigureItem(name, caption, figure, kind))

    def skip(self, what, why):
        self.out.skipped.append(f"{what}: {why}")
        self.say(f"skipped {what}: {why}")


def figure_set(folder, width="single", types=None, max_types=4, max_series=3, log=None):
    """Build every figure the results folder has data for.

    Parameters
    ----------
    folder : str
        A results folder (``dihedra track`` plus whatever later steps wrote).
    width : {"single", "double"}
        Journal width of the figures (3.35 or 7 inches); the square ones (2-D maps, couplings)
        are always one column wide.
    types : list of str, optional
        Torsion types for the per-type figures, or single torsions by their label (their type's
        figures, and their own angle series). The angle series show the torsions named, else of
        each of up to ``max_series`` types the torsion whose states change most; the raster shows
        the torsions of the chosen types; the refit figures are those of the chosen types the
        refit corrected. Default: the ``max_types`` most informative types (see
        :mod:`~dihedra.presentation.figures.choice`), every torsion in the raster and every type
        the refit corrected.
    log : callable, optional
        Receives one-line notes on what is skipped and why.

    Returns
    -------
    FigureSet
    """
    from ...io.resultsdir import load_results

    say = log or (lambda msg: None)
    result = load_results(folder)
    b = _Builder(result, _width_in(width), say)
    chosen_types, series_torsions = _choose(result, types, max_types, max_series, say)
    _add_angle_series(b, series_torsions)
    rows = ([lab for lab, t in zip(result.torsion_set.labels, result.torsion_set.types) if t in set(chosen_types)]
            if types else None)
    _add_state_raster(b, rows, _types_phrase(chosen_types))
    _add_profiles(b, chosen_types)
    _add_populations(b, chosen_types)
    _add_ramachandran(b)
    _add_maps(b)
    _add_kinetics(b, chosen_types)
    _add_convergence(b, chosen_types)
    _add_couplings(b)
    _add_refit(b, chosen_types if types else None)
    return b.out


def _choose(result, names, max_types, max_series, say):
    """The types of the per-type figures and the torsions of the time-series figures: ``names``
    are types or torsion labels (checked); without them the informative types of
    :mod:`~dihedra.presentation.figures.choice` and the torsion of each whose states change most."""
    all_types = list(dict.fromkeys(result.torsion_set.types))
    labels = list(result.torsion_set.labels)
    type_of = dict(zip(labels, result.torsion_set.types))
    names = [names] if isinstance(names, str) else list(names or [])
    check_types([n for n in names if n not in type_of], all_types, result.folder, labels)
    singles = [n for n in names if n in type_of and n not in set(all_types)]
    if names:
        wanted = {n for n in names if n in set(all_types)} | {type_of[n] for n in singles}
        chosen_types = [t for t in all_types if t in wanted]
    else:
        picked = set(informative_types(result.populations_by_type, max_types) or all_types[:max_types])
        chosen_types = [t for t in all_types if t in picked]   # in the folder's order
        if len(all_types) > max_types:
            say(f"note: per-type figures for {len(chosen_types)} of {len(all_types)} types, {CHOICE_RULE} "
                "(choose with --types; types = [...] in an analysis file)")
    by_type = {}
    for lab, t in zip(labels, result.torsion_set.types):
        by_type.setdefault(t, []).append(lab)
    typed = [t for t in chosen_types if t not in {type_of[x] for x in singles}]
    room = max(0, max_series - len(singles))
    series = singles + [representative_torsion(result.populations, t, by_type[t]) for t in typed[:room]]
    if len(typed) > room:
        say(f"note: angle time series for {len(series)} torsion(s), at most {max_series} per figure set (the torsion "
            f"whose states change most, of the first {room} of {len(typed)} chosen types); name torsion labels "
            "with --types for others")
    return chosen_types, series


def check_types(types, all_types, folder, labels=None):
    """Every chosen type must be one of the folder's (a clear error naming some of them; ``labels``:
    torsion labels are taken too)."""
    unknown = [t for t in (types or []) if t not in set(all_types)]
    if unknown:
        also = f"; torsion labels look like {', '.join(labels[:2])}" if labels else ""
        raise DihedraError(f"no torsion type {unknown[0]!r} in {folder}; its types are "
                           f"{', '.join(all_types[:6])}" + (" ..." if len(all_types) > 6 else "") + also
                           + " (see torsions.csv).")


def _add_angle_series(b, torsions):
    """1. Angle time series: one panel per torsion, stacked."""
    if not ParquetSeries(b.folder).has("angles"):
        b.skip("angle time series", "no angles.parquet (track with --keep-angles)")
        return
    series = read_angle_series(b.folder, torsions)
    n = len(series.torsions)
    fig = _figure(b.width_in, 0.55 + 1.05 * n)
    axes = fig.subplots(n, 1, sharex=True, squeeze=False)[:, 0]
    for k, (ax, lab) in enumerate(zip(axes, series.torsions)):
        plot_angle_series(series, b.scheme, lab, ax=ax, show_note=k == 0)
        if k < n - 1:
            ax.set_xlabel("")
    b.add("angle_series", f"Angle time series of {n} torsion(s) with the state sectors "
          f"as bands ({series.description}).", fig, "series")


def _types_phrase(types, max_named=3):
    """The chosen types as a note names them: each of a few, else their number."""
    if len(types) <= max_named:
        return " and ".join([", ".join(types[:-1]), types[-1]] if len(types) > 1 else types)
    return f"{len(types)} chosen types"


def _add_state_raster(b, torsions, selection=""):
    """2. State raster (``torsions``: the rows chosen, ``selection`` what they are, for the note)."""
    if not ParquetSeries(b.folder).has("states"):
        b.skip("state raster", "no states.parquet")
        return
    raster = read_state_raster(b.folder, torsions=torsions, selection=selection)
    fig = _figure(b.width_in, 2.4 if len(raster.rows) <= 12 else 2.9)
    plot_state_raster(raster, b.scheme, ax=fig.add_subplot())
    b.add("state_raster", f"States of torsions against time ({raster.description}).", fig, "raster")


def _add_profiles(b, chosen_types):
    """3. Free-energy profiles, with the scan where the folder holds a comparison."""
    profiles = read_optional(b.folder, "profiles.csv")
    scan = read_optional(b.folder, "comparison_profiles.csv")
    if profiles is None:
        b.skip("free-energy profiles", "no profiles.csv (run 'dihedra profile')")
        return
    have = set(profiles["type"])
    for t in [t for t in chosen_types if t in have]:
        fig = _figure(b.width_in, 2.2)
        plot_profile(profiles, b.scheme, t, scan=scan, ax=fig.add_subplot())
        compared = scan is not None and "type" in scan.columns and t in set(scan["type"])
        band = ("with its bootstrap error band" if has_profile_errors(profiles, t) else
                "without an error band (its samples lie in a single frame: nothing to resample)")
        b.add(f"profile_{safe_name(t)}",
              f"Free-energy profile of {t} (histogram estimate) {band}, state sectors "
              f"shaded, unsampled bins hatched" + ("; dashed: the static scan's prediction, aligned." if compared
                                                   else "."), fig, "profile")


def _add_populations(b, chosen_types):
    """4. Populations, with the scan's prediction and reference values where compared."""
    comparison = read_optional(b.folder, "comparison.csv")
    predicted, reference = comparison_populations(comparison)
    fig = _figure(b.width_in, 2.3)
    plot_populations(b.result.populations_by_type, b.scheme, types=chosen_types, predicted=predicted,
                     experiment=reference, ax=fig.add_subplot(), grow=True)
    extra = [x for x, tab in (("the scan's prediction", predicted), ("reference values", reference)) if len(tab)]
    b.add("populations", "State populations per type with standard errors (sampled"
          + (", " + " and ".join(extra) if extra else "") + ").", fig, "populations")
    if comparison is None:
        b.skip("scan-predicted populations", "no comparison.csv (run 'dihedra compare')")


def has_backbone_pairs(result):
    """Whether the folder's torsions include protein phi and psi (a Ramachandran analysis can run)."""
    names = set(result.torsions["name"].astype(str)) if "name" in result.torsions.columns else set()
    return {"phi", "psi"} <= names


def _add_ramachandran(b):
    """11. Ramachandran region populations per residue type (``dihedra ramachandran``); a folder
    without protein backbone torsions gets no note (it cannot have them)."""
    regions = read_optional(b.folder, "ramachandran_by_type.csv")
    if regions is None or not len(regions):
        if has_backbone_pairs(b.result):
            b.skip("Ramachandran regions", "no ramachandran_by_type.csv (run 'dihedra ramachandran')")
        return
    fig = _figure(b.width_in, 2.3)
    plot_ramachandran_regions(regions, ax=fig.add_subplot(), grow=True)
    b.add("ramachandran_regions", "Population of each Ramachandran region per residue type with standard errors "
          "(pooled over the residues of a type; regions a type never visited have no bar).", fig, "ramachandran")


def _add_maps(b):
    """5. 2-D free-energy maps, one per pair (square: always one column wide)."""
    maps = read_optional(b.folder, "profiles_2d.csv")
    if maps is None or not len(maps):
        b.skip("2-D free-energy maps", "no profiles_2d.csv (run 'dihedra profile --pair A B')")
        return
    for a, c in list(dict.fromkeys(zip(maps["torsion_a"], maps["torsion_b"]))):
        fig = _figure(SINGLE_COLUMN_IN, SINGLE_COLUMN_IN * 0.82 + 0.25)  # square maps: one column
        plot_free_energy_map(maps, (a, c), ax=fig.add_subplot())
        b.add(f"free_energy_map_{safe_name(a)}__{safe_name(c)}",
              f"2-D free-energy map of {a} and {c} (periodic axes): dark where the free energy is lowest; the "
              f"colour scale ends at most {MAP_CEILING_KJ_MOL:g} kJ/mol (6 kT) above the minimum, higher bins "
              "take its top colour (the ceiling is stated on the figure); unsampled bins hatched.", fig, "map")


def _add_kinetics(b, chosen_types):
    """6./7. Transition diagrams and lifetimes per type."""
    transitions = read_optional(b.folder, "transitions.csv")
    lifetimes = read_optional(b.folder, "lifetimes.csv")
    dwell = read_optional(b.folder, "dwell_survival.csv")
    if single_frames(b.result):
        b.skip("transition diagrams and lifetimes", "one frame per replica: no transition and no dwell time to draw")
        return
    if transitions is None or lifetimes is None:
        b.skip("transition diagrams and lifetimes", "no transitions.csv / lifetimes.csv (run 'dihedra kinetics')")
        return
    have = set(lifetimes.loc[lifetimes["level"] == "type", "name"])
    for t in [t for t in chosen_types if t in have]:
        n_pairs = int(((transitions["level"] == "type") & (transitions["name"] == t)).sum())
        fig = _figure(b.width_in, 2.5 + 0.105 * min(n_pairs + 1, 10))
        plot_transition_diagram(transitions, lifetimes, t, level="type", scheme=b.scheme, ax=fig.add_subplot())
        b.add(f"transitions_{safe_name(t)}",
              f"Transitions between the states of {t}: node area ~ population, arrow width ~ number of "
              "observed transitions (each arrow labelled with its count and direction); below, the rate "
              "constants per ns with their standard errors, and 95 % upper limits where no transition was "
              "seen.", fig, "transitions")
        fig = _figure(b.width_in, 2.5)
        plot_lifetimes(lifetimes, t, level="type", scheme=b.scheme, survival=dwell, ax=fig.add_subplot())
        b.add(f"lifetimes_{safe_name(t)}",
              f"Dwell times of the states of {t} on a log axis (the observed Kaplan-Meier survival) with the "
              "exponential expected from the rates; the time axis ends with the observed dwell times.", fig,
              "lifetimes")
    if dwell is None:
        b.say("note: lifetimes figures show the observed mean and median on the exponential from the rates "
              "(the folder has no dwell_survival.csv: run 'dihedra kinetics' again)")


def _add_convergence(b, chosen_types):
    """8. Convergence per type (not for umbrella windows: each window is biased)."""
    kind = str(b.result.summary.get("kind", ""))
    if "window" in kind:
        b.skip("convergence", f"a folder of {kind}: every window is biased, so its running populations are not "
                              "the unbiased ones")
        return
    if single_frames(b.result):
        b.skip("convergence", "one frame per replica: no running population to draw against time, and no error "
                              "to draw around it")
        return
    for t in chosen_types:
        fig = _figure(b.width_in, 2.2)
        plot_convergence(b.result, t, ax=fig.add_subplot())
        b.add(f"convergence_{safe_name(t)}",
              f"Convergence of the state populations of {t}: running population per "
              "replica against simulation time, with the final value ± 1 standard error, and the forward "
              "(start to t) and backward (t to end) populations ± 1 standard error.", fig, "convergence")


def _add_couplings(b):
    """9. Couplings against experiment (rows with a prediction)."""
    names = (matching_files(b.folder, "couplings_*_vs_experiment.csv")
             or matching_files(b.folder, "couplings_vs_experiment.csv"))   # per relation, or one file (older)
    frames = [f for f in (read_optional(b.folder, n) for n in names) if f is not None]
    couplings = pd.concat(frames, ignore_index=True) if frames else None
    if couplings is not None and "j_hz" in couplings.columns:
        couplings = couplings[np.isfinite(pd.to_numeric(couplings["j_hz"], errors="coerce"))]
    if couplings is None or not len(couplings):
        b.skip("couplings", "no couplings against experiment (run 'dihedra couplings --experimental FILE')")
        return
    fig = _figure(min(b.width_in, SINGLE_COLUMN_IN), 3.3)
    plot_couplings(couplings, ax=fig.add_subplot())
    b.add("couplings", "Predicted against experimental 3J couplings with error bars and "
          "the identity line.", fig, "couplings")


def _add_refit(b, chosen_types=None):
    """10. A fitted torsion correction (drawn only when the folder has the refit outputs): per type
    corrected (of ``chosen_types`` only, when types were chosen), the target against the sampled
    and reweighted profile (or populations), and the correction."""
    correction = read_optional(b.folder, "refit_correction.csv")
    if correction is None or not len(correction):
        return
    fitted = list(dict.fromkeys(correction["type"]))
    if chosen_types is not None:
        fitted = [t for t in fitted if t in set(chosen_types)]
        if not fitted:
            b.skip("refit figures", "none of the chosen types was corrected by 'dihedra refit' (its types: "
                   + ", ".join(dict.fromkeys(correction["type"])) + ")")
            return
    profiles = read_optional(b.folder, "refit_profiles.csv")
    populations = read_optional(b.folder, "refit_populations.csv")
    summary = read_optional(b.folder, "refit_summary.csv")
    untrusted = summary is not None and len(summary) and not _as_bool(summary["trustworthy"])[0]
    warn = "NOT TRUSTWORTHY (effective sample fraction too small): " if untrusted else ""
    for t in fitted:
        fig = _figure(b.width_in, 3.9)
        left, right = fig.subplots(2, 1, gridspec_kw={"height_ratios": [1.4, 1.0]})
        use_pops = (populations is not None and has_target(populations, t, "target_population")
                    and not (profiles is not None and has_target(profiles, t, "target_free_energy_kj_mol")))
        if use_pops or profiles is None:
            plot_refit_populations(populations, t, ax=left, note=warn + t)
            what = "state populations"
        else:
            plot_refit_profile(profiles, t, ax=left, note=warn + t)
            what = "free-energy profiles"
        plot_correction(correction, t, ax=right)
        b.add(f"refit_{safe_name(t)}", f"Torsion correction of {t} fitted by reweighting: target, sampled and "
              f"reweighted {what} (top) and the correction with its bootstrap band (bottom)."
              + (" The reweighting is not trustworthy: a new simulation with this correction is needed."
                 if untrusted else ""), fig, "refit")


def write_figures(folder, formats=("pdf", "png"), width="single", types=None, out_dir=None, log=None,
                  overwrite=False):
    """Write every figure the folder has data for into ``out_dir`` (default ``folder/figures``);
    ``types``: torsion types or labels (see :func:`figure_set`).

    A figure of the same name that dihedra drew there before is replaced. With ``overwrite`` the
    whole earlier set in ``folder/figures`` is: the files an earlier call wrote there (listed in the
    folder's ``dihedra-files.json``) that this call does not write again are removed, and their
    names leave the list, so the folder never mixes figures of two selections (or of data that
    have changed since). Files the list does not name (a user's own) are never touched.

    Returns
    -------
    (paths, skipped) : list of str, list of str
    """
    fmts = _formats(formats)
    # into the results folder's figures/ (replacing figures dihedra drew there before), or into
    # out_dir (never over an existing file)
    base, sub = (os.fspath(folder), FIGURES_DIR) if out_dir is None else (os.fspath(out_dir), "")
    # the earlier set is taken before drawing: a file another run adds meanwhile is not this one's to remove
    earlier = earlier_outputs(base, prefixes=(FIGURES_DIR,)) if overwrite and out_dir is None else []
    earlier = [f for f in earlier if f.rsplit(".", 1)[-1] in FORMATS]   # (figures only: not a report put there)
    names, paths = [], []
    with style():
        fset = figure_set(folder, width=width, types=types, log=log)
        os.makedirs(base, exist_ok=True)
        with file_set(base):   # (in place together: an error or Ctrl-C leaves the earlier figures as they were)
            for item in fset.items:
                for f in fmts:
                    def save(tmp, fig=item.figure, fmt=f):
                        fig.savefig(tmp, format=fmt, dpi=300 if fmt == "png" else None, metadata=_metadata(fmt))
                    names.append(f"{sub}{item.name}.{f}")
                    paths.append(write_file(base, names[-1], save))
    if earlier:   # only after the new set is in place: a failed drawing leaves the old one whole
        removed = remove_listed_files(base, set(earlier) - set(names))
        (log or (lambda msg: None))(f"removed {len(removed)} earlier figure file(s) that this run did not "
                                    "draw again")
    return paths, fset.skipped


def _formats(formats):
    """File formats from a comma-separated string or a list (checked against :data:`FORMATS`)."""
    fmts = [f.strip().lower().lstrip(".") for f in (formats.split(",") if isinstance(formats, str) else formats)]
    fmts = [f for f in fmts if f]
    for f in fmts:
        one_of("figure format", f, FORMATS)
    if not fmts:
        raise DihedraError("give at least one figure format (pdf, png or svg).")
    return fmts
