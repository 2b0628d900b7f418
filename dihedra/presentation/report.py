"""One self-contained HTML report of a results folder, readable offline and printable to PDF.

:func:`write_report` (``dihedra report DIR [--out FILE]``) gathers what a results folder holds
into ``report.html``:

* first, whether the sampling is converged: the verdict of every torsion type from
  ``convergence.csv`` with its reasons in plain words, and the forward/backward figures;
* inputs and provenance from ``summary.json`` (topology and trajectories with SHA-256, frame
  ranges, time step and its source, parameters, package versions, the analysis file of
  ``dihedra run`` when there is one);
* the notices of every step, and the cautions each step wrote beside its results;
* the torsions per type (the full table linked) and the state scheme;
* populations per type and the most populated conformers;
* the Ramachandran regions per residue type (``dihedra ramachandran``), in a folder of protein
  backbone torsions;
* profiles (minima, barriers, state free energies) and the comparison with a static scan, with
  its verdicts and their reasons;
* kinetics (rates, dwell times, implied timescales) with the transition-state-theory caution;
* couplings and their comparison with experiment;
* a torsion correction fitted by reweighting (``dihedra refit``): whether the reweighting can be
  trusted, the fit against the target, the terms, the populations before and after, and the
  forms to apply it;
* every figure of :func:`dihedra.presentation.figures.figure_set`, embedded as an SVG data URI (text as paths,
  so no font is fetched), and a list of the figures the folder could not make and why.

A folder of many types (a protein has sixty) gives a report of a few pages: its tables show the
chosen types (``types``), or, without a choice, the most informative ones (those of
:func:`~dihedra.presentation.figures.informative_types`, the same the figures show), and a
one-line-per-type summary of the rest (verdicts, main states); every such table links its full CSV
in the results folder. Values are rounded to their errors (:mod:`~dihedra.presentation.rounding`).

The page has no script and makes no request: every style is inline in one ``<style>`` element,
every image a ``data:`` URI, links jump within the page or open a table of the results folder. A print style sheet (A4, figures and
table rows kept whole, no navigation) makes "Print to PDF" give a clean document. The report only
reads the folder; it recomputes nothing.

This module assembles the page and writes it; the sections are built in
:mod:`~dihedra.presentation.report_sections`, from the style sheet and HTML helpers of
:mod:`~dihedra.presentation.report_html`.
"""

from __future__ import annotations

import os
import time

from ..errors import OutputExistsError
from ..io.outputs import check_replaceable_in, check_single_file, file_head_contains, is_inside, write_text
from ..io.tables import read_optional_json
from .figures import CHOICE_RULE, informative_types
from .figures.figureset import check_types
from .report_dynamics import _convergence, _couplings, _kinetics, coupling_files
from .report_html import _CSS, MAX_ROWS, Page, _e, _kelvin
from .report_ramachandran import _ramachandran
from .report_refit import _refit
from .report_sections import _comparison, _populations, _profiles, _provenance, _time_series, _torsions

#: The sections in the page's navigation: (id, name).
_NAVIGATION = [("convergence", "Convergence"), ("inputs", "Inputs"), ("torsions", "Torsions"), ("populations", "Populations"),
               ("series", "Time series"), ("ramachandran", "Ramachandran"), ("profiles", "Profiles"),
               ("comparison", "Comparison"), ("kinetics", "Kinetics"), ("couplings", "Couplings"), ("refit", "Correction"),
               ("notes", "Figures not made")]


def build_report(folder, width="single", figures=True, types=None, log=None, base=""):
    """The report of a results folder as one HTML string (see the module notes).

    Parameters
    ----------
    folder : str
        A results folder.
    width : {"single", "double"}
        Journal width the figures are drawn at (the page shows them 1.45 times larger on screen).
    figures : bool
        Embed the figures (off for a quick text-only report).
    types : list of str, optional
        Torsion types the tables and per-type figures show (default: all types when there are
        at most 24, else the four most informative; the figures always the informative four).
    log : callable, optional
        Receives one-line notes on what the folder lacks.
    base : str
        The folder as seen from the report ("" when the report is inside it), for the links to
        its tables.
    """
    from ..io.resultsdir import load_results

    say = log or (lambda msg: None)
    result = load_results(folder)
    folder = result.folder
    page = _page(result, types, base, say)
    figs, skipped = _figures_by_kind(folder, width, types, log) if figures else ({}, [])
    series, ramachandran = _time_series(figs), _ramachandran(page, figs, result)
    # a section the folder cannot have (time series without figures, Ramachandran regions without
    # a protein backbone) is left out, and so is its link
    absent = {k for k, text in (("series", series), ("ramachandran", ramachandran)) if not text}
    nav = "<nav>" + "".join(f"<a href='#{k}'>{_e(v)}</a>" for k, v in _NAVIGATION if k not in absent) + "</nav>"
    body = [_provenance(page), _torsions(page), _populations(page, figs), series, ramachandran,
            _profiles(page, figs), _comparison(page), _kinetics(page, figs), _couplings(page, figs),
            _refit(page, figs)]
    notices = _notices(folder, result.summary)
    if notices:
        body.insert(0, notices)
    body.insert(0, _convergence(page, figs))
    foot = ("<footer>Self-contained report: no scripts, no external requests; figures are embedded SVG. "
            "Values are rounded to their standard errors; tables of many types show some of them and link "
            "the full CSV files of the results folder.</footer>")
    return ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>" + REPORT_SIGNATURE +
            "<meta name='viewport' content='width=device-width, initial-scale=1'>"
            f"<title>dihedra report: {_e(os.path.basename(folder))}</title><style>{_CSS}</style></head><body>"
            + _header(result, page) + nav + "<main>" + "".join(body) + _not_made(skipped, figures) + foot
            + "</main></body></html>\n")


def _page(result, types, base, say):
    """The types the tables show: the chosen ones, all of a folder of few types, else the informative ones."""
    all_types = list(dict.fromkeys(result.torsion_set.types))
    type_of = dict(zip(result.torsion_set.labels, result.torsion_set.types))
    types = [types] if isinstance(types, str) else list(types or [])
    check_types([t for t in types if t not in type_of], all_types, result.folder, list(type_of))
    types = [type_of.get(t, t) if t not in set(all_types) else t for t in types]   # a torsion: its type
    if types:
        shown = [t for t in all_types if t in set(types)]
    elif len(all_types) <= MAX_ROWS:
        shown = all_types
    else:
        shown = informative_types(result.populations_by_type, 4) or all_types[:4]
        say(f"note: the report's tables show {len(shown)} of {len(all_types)} types, {CHOICE_RULE} (choose with "
            "--types; types = [...] in an analysis file); every table links its full CSV")
    return Page(folder=result.folder, summary=result.summary, scheme=result.scheme, types=shown,
                all_types=all_types, chosen=bool(types), base=base)


def _figures_by_kind(folder, width, types, log):
    """The figures of the folder grouped by kind, and the notes on those it could not make."""
    from .figures import figure_set, style

    figs = {}
    with style():
        fset = figure_set(folder, width=width, types=types, log=log)
    for item in fset.items:
        figs.setdefault(item.kind, []).append(item)
    return figs, fset.skipped


def _header(result, page):
    """The page header: the system in one line, the types shown, where the folder is, when and by
    what it was written."""
    from .._version import __version__

    folder, summary = result.folder, result.summary
    temp = summary.get("temperature_k")
    n_types = len(page.all_types)
    shown = ""
    if page.summarised:
        why = "chosen" if page.chosen else "the most informative: " + CHOICE_RULE
        shown = f"<p>Types shown in the tables and per-type figures ({_e(why)}): {_e(', '.join(page.types))}</p>"
    return (f"<header class='top'><h1>dihedra report: {_e(os.path.basename(folder))}</h1>"
            f"<p>{summary.get('n_torsions')} torsions of {n_types} type(s), {summary.get('n_frames_analysed')} "
            f"frames from {len(summary.get('replicas', []))} replica(s), scheme {_e(result.scheme.name)}"
            + (f", {_kelvin(temp)} K" if temp is not None else ", no temperature recorded") + "</p>" + shown +
            f"<p>{_e(folder)} · report written {time.strftime('%Y-%m-%d %H:%M')} by dihedra {_e(__version__)}</p>"
            "</header>")


def _notices(folder, summary):
    """The notices every step left (tracking, profiles, kinetics, couplings) in one callout, or ""."""
    notices = [("track", n) for n in summary.get("notices", [])]
    for name, step in (("profiles.json", "profile"), ("kinetics.json", "kinetics")):
        doc = read_optional_json(folder, name) or {}
        notices += [(step, n) for n in doc.get("notices", [])]
    for doc in coupling_files(folder)[2]:
        notices += [("couplings", n) for n in doc.get("notices", []) if ("couplings", n) not in notices]
    if not notices:
        return ""
    return ("<section id='notices'><div class='callout caution'><h4>Notices from the analysis steps</h4>"
            "<ul class='note-list'>" + "".join(f"<li><b>{_e(s)}:</b> {_e(n)}</li>" for s, n in notices)
            + "</ul></div></section>")


def _not_made(skipped, figures):
    """The section on the figures the folder could not make, and why."""
    notes = "<section id='notes'><h2>Figures not made</h2>"
    if skipped:
        notes += "<p class='lead'>What this folder lacks for the remaining figures:</p><ul class='note-list'>" + \
            "".join(f"<li>{_e(s)}</li>" for s in skipped) + "</ul>"
    elif figures:
        notes += "<p class='missing'>Every figure could be made.</p>"
    else:
        notes += "<p class='missing'>Figures were left out (--no-figures).</p>"
    return notes + "</section>"


#: The mark of a report in its head (a report replaces only a file that carries it).
REPORT_SIGNATURE = "<meta name='generator' content='dihedra report'>"


def write_report(folder, out=None, width="single", figures=True, types=None, log=None):
    """Write ``report.html`` (or ``out``) for a results folder; returns its path.

    ``types``: the torsion types the tables and per-type figures show (see :func:`build_report`).
    The report replaces only an earlier report (a file in the folder that dihedra wrote, or an
    HTML file that carries dihedra's report signature); any other existing file is refused."""
    from ..io.resultsdir import load_results

    folder = os.fspath(folder)
    if not os.path.isdir(folder):
        load_results(folder)  # raises the one message for a missing results folder
    out = os.path.abspath(out or os.path.join(folder, "report.html"))
    inside = is_inside(os.path.dirname(out), folder)
    if inside:
        name = os.path.normpath(os.path.join(os.path.relpath(os.path.realpath(os.path.dirname(out)),
                                                             os.path.realpath(folder)), os.path.basename(out)))
        check_replaceable_in(folder, name)
        if os.path.lexists(out) and not file_head_contains(out, REPORT_SIGNATURE):   # (summary.json, a table...)
            raise OutputExistsError(f"{out} is one of the results folder's own files, not a report; it is left "
                                    "untouched: give the report another name.")
    else:
        out = check_single_file(out, ours=lambda p: file_head_contains(p, REPORT_SIGNATURE), kind="dihedra report")
    base = os.path.relpath(os.path.realpath(folder), os.path.realpath(os.path.dirname(out)))
    base = "" if base == "." else base.replace(os.sep, "/") + "/"
    text = build_report(folder, width=width, figures=figures, types=types, log=log, base=base)
    if inside:
        return write_text(folder, name, text)
    return write_text(os.path.dirname(out), os.path.basename(out), text, marked=False)
