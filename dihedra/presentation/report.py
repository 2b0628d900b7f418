"""One self-contained HTML report of a results folder, readable offline and printable to PDF.

:func:`write_report` (``dihedra report DIR [--out FILE]``) gathers what a results folder holds
into ``report.html``:

* first, whether the sampling is converged: the verdict of every torsion type from
  ``convergence.csv`` with its reasons in plain words, and the forward/backward figures;
* inputs and provenance from ``summary.json`` (topology and trajectories with SHA-256, frame
  ranges, time step and its source, parameters, package versions, the analysis file of
  ``dihedra run`` when there is one);
* the notices of every step, and the cautions each step wrote beside its results;
* the torsion table and the state scheme;
* populations per type and the most populated conformers;
* profiles (minima, barriers, state free energies) and the comparison with a static scan, with
  its verdicts and their reasons;
* kinetics (rates, dwell times, implied timescales) with the transition-state-theory caution;
* couplings and their comparison with experiment;
* every figure of :func:`dihedra.presentation.figures.figure_set`, embedded as an SVG data URI (text as paths,
  so no font is fetched), and a list of the figures the folder could not make and why.

The page has no script and makes no request: every style is inline in one ``<style>`` element,
every image a ``data:`` URI, links only jump within the page. A print style sheet (A4, figures and
table rows kept whole, no navigation) makes "Print to PDF" give a clean document. The report only
reads the folder; it recomputes nothing.

This module assembles the page and writes it; the sections are built in
:mod:`~dihedra.presentation.report_sections`, from the style sheet and HTML helpers of
:mod:`~dihedra.presentation.report_html`.
"""

from __future__ import annotations

import os
import time

from ..io.outputs import check_replaceable_in, check_single_file, file_head_contains, is_inside, write_text
from ..io.tables import read_optional_json
from .report_html import _CSS, _e, _fmt
from .report_sections import (_comparison, _convergence, _couplings, _kinetics, _populations, _profiles,
                              _provenance, _time_series, _torsions)

#: The sections in the page's navigation: (id, name).
_NAVIGATION = [("convergence", "Convergence"), ("inputs", "Inputs"), ("torsions", "Torsions"), ("populations", "Populations"),
               ("series", "Time series"), ("profiles", "Profiles"), ("comparison", "Comparison"),
               ("kinetics", "Kinetics"), ("couplings", "Couplings"), ("notes", "Figures not made")]


def build_report(folder, width="single", figures=True, log=None):
    """The report of a results folder as one HTML string (see the module notes).

    Parameters
    ----------
    folder : str
        A results folder.
    width : {"single", "double"}
        Journal width the figures are drawn at (the page shows them 1.45 times larger on screen).
    figures : bool
        Embed the figures (off for a quick text-only report).
    log : callable, optional
        Receives one-line notes on what the folder lacks.
    """
    from ..io.resultsdir import load_results

    result = load_results(folder)
    folder = result.folder
    summary = result.summary
    scheme = result.scheme
    figs, skipped = _figures_by_kind(folder, width, log) if figures else ({}, [])
    sections = _NAVIGATION
    if not (figs.get("series") or figs.get("raster")):
        sections = [s for s in sections if s[0] != "series"]
    nav = "<nav>" + "".join(f"<a href='#{k}'>{_e(v)}</a>" for k, v in sections) + "</nav>"
    body = [_provenance(folder, summary), _torsions(folder, scheme), _populations(folder, scheme, figs),
            _time_series(figs), _profiles(folder, figs), _comparison(folder), _kinetics(folder, figs),
            _couplings(folder, figs)]
    notices = _notices(folder, summary)
    if notices:
        body.insert(0, notices)
    body.insert(0, _convergence(folder, summary, figs))
    foot = ("<footer>Self-contained report: no scripts, no external requests; figures are embedded SVG. "
            "Tables show the first rows; the folder holds the full CSV files.</footer>")
    return ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>" + REPORT_SIGNATURE +
            "<meta name='viewport' content='width=device-width, initial-scale=1'>"
            f"<title>dihedra report: {_e(os.path.basename(folder))}</title><style>{_CSS}</style></head><body>"
            + _header(result) + nav + "<main>" + "".join(body) + _not_made(skipped, figures) + foot
            + "</main></body></html>\n")


def _figures_by_kind(folder, width, log):
    """The figures of the folder grouped by kind, and the notes on those it could not make."""
    from .figures import figure_set, style

    figs = {}
    with style():
        fset = figure_set(folder, width=width, log=log)
    for item in fset.items:
        figs.setdefault(item.kind, []).append(item)
    return figs, fset.skipped


def _header(result):
    """The page header: the system in one line, where the folder is, when and by what it was written."""
    from .._version import __version__

    folder, summary = result.folder, result.summary
    temp = summary.get("temperature_k")
    n_types = len(set(result.torsion_set.types))
    return (f"<header class='top'><h1>dihedra report: {_e(os.path.basename(folder))}</h1>"
            f"<p>{summary.get('n_torsions')} torsions of {n_types} type(s), {summary.get('n_frames_analysed')} "
            f"frames from {len(summary.get('replicas', []))} replica(s), scheme {_e(result.scheme.name)}"
            + (f", {_fmt(temp)} K" if temp is not None else ", no temperature recorded") + "</p>"
            f"<p>{_e(folder)} · report written {time.strftime('%Y-%m-%d %H:%M')} by dihedra {_e(__version__)}</p>"
            "</header>")


def _notices(folder, summary):
    """The notices every step left (tracking, profiles, kinetics, couplings) in one callout, or ""."""
    notices = [("track", n) for n in summary.get("notices", [])]
    for name, step in (("profiles.json", "profile"), ("kinetics.json", "kinetics"), ("couplings.json", "couplings")):
        doc = read_optional_json(folder, name) or {}
        notices += [(step, n) for n in doc.get("notices", [])]
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


def write_report(folder, out=None, width="single", figures=True, log=None):
    """Write ``report.html`` (or ``out``) for a results folder; returns its path.

    The report replaces only an earlier report (a file in the folder that dihedra wrote, or an
    HTML file that carries dihedra's report signature); any other existing file is refused."""
    from ..io.resultsdir import load_results

    folder = os.fspath(folder)
    if not os.path.isdir(folder):
        load_results(folder)  # raises the one message for a missing results folder
    out = os.path.abspath(out or os.path.join(folder, "report.html"))
    inside = is_inside(os.path.dirname(out), folder)
    if inside:
        name = os.path.join(os.path.relpath(os.path.realpath(os.path.dirname(out)), os.path.realpath(folder)),
                            os.path.basename(out))
        check_replaceable_in(folder, name)
    else:
        out = check_single_file(out, ours=lambda p: file_head_contains(p, REPORT_SIGNATURE), kind="dihedra report")
    text = build_report(folder, width=width, figures=figures, log=log)
    if inside:
        return write_text(folder, name, text)
    return write_text(os.path.dirname(out), os.path.basename(out), text, marked=False)
