"""The HTML report: self-contained (no external references, every figure embedded), complete, and
opening in headless Chromium without console errors."""

import base64
import html
import json
import os
import re
import shutil
import subprocess
import tempfile

import numpy as np
import pandas as pd
import pytest
from figure_data import full_folder, protein_folder, track_only_folder  # noqa: F401  (fixtures)

from dihedra.cli import main
from dihedra.errors import DihedraError
from dihedra.presentation.figures import figure_set, style
from dihedra.presentation.report import write_report
from dihedra.presentation.rounding import format_value_error

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


def references(text):
    """Every src= and href= value of an HTML or SVG document."""
    return re.findall(r"""(?:src|href)\s*=\s*["']([^"']*)["']""", text)


@pytest.fixture(scope="module")
def full_report(full_folder, tmp_path_factory):  # noqa: F811
    path = write_report(full_folder, out=str(tmp_path_factory.mktemp("report") / "report.html"))
    with open(path, encoding="utf-8") as fh:
        return path, fh.read()


def test_report_is_self_contained_and_embeds_every_figure(full_folder, full_report):  # noqa: F811
    path, text = full_report
    refs = references(text)
    assert refs, "the report should have in-page links and images"
    # embedded data, in-page links, or links to the full tables of the results folder (which exist);
    # no network
    files = [r for r in refs if not (r.startswith("data:") or r.startswith("#"))]
    assert all(os.path.isfile(os.path.join(os.path.dirname(path), r)) for r in files), files
    assert all(os.path.realpath(os.path.join(os.path.dirname(path), r)).startswith(os.path.realpath(full_folder))
               for r in files)
    assert "http://" not in text and "https://" not in text
    assert "<script" not in text.lower() and "@import" not in text and "url(" not in text
    images = re.findall(r"<img [^>]*src='data:image/svg\+xml;base64,([^']+)'", text)
    with style():
        expected = figure_set(full_folder).items
    assert len(images) == len(expected) == 9
    for data in images:
        svg = base64.b64decode(data).decode("utf-8")
        assert svg.lstrip().startswith("<?xml") and "<svg" in svg
        # inside the SVG too, only embedded data and local fragments (rasterised parts are data: PNG)
        assert all(r.startswith("data:") or r.startswith("#") for r in references(svg))
    # every in-page link has its target
    ids = set(re.findall(r"""id=["']([^"']+)["']""", text))
    assert all(r[1:] in ids for r in refs if r.startswith("#"))


def test_report_content_comes_from_the_folder(full_folder, full_report):  # noqa: F811
    _, text = full_report
    summary = json.load(open(os.path.join(full_folder, "summary.json")))
    for rep in summary["replicas"]:
        assert rep["sha256"] in text and html.escape(rep["trajectory"]) in text
    assert summary["topology"]["sha256"] in text
    pops = pd.read_csv(os.path.join(full_folder, "populations_by_type.csv"))
    for row in pops.itertuples():  # rounded to the error (the rule is checked in test_rounding.py)
        assert format_value_error(row.population, row.population_err) in text
    comparison = pd.read_csv(os.path.join(full_folder, "comparison.csv"))
    for verdict, reason in zip(comparison["verdict"], comparison["verdict_reason"]):
        assert f">{verdict}</span>" in text and html.escape(reason) in text
    for caution in json.load(open(os.path.join(full_folder, "comparison.json")))["cautions"]:
        assert html.escape(caution) in text
    kin = json.load(open(os.path.join(full_folder, "kinetics.json")))
    assert html.escape(kin["parameters"]["caution"]) in text
    for note in summary["notices"] + kin["notices"]:
        assert html.escape(note) in text
    coupl = json.load(open(os.path.join(full_folder, "couplings_karplus-1959.json")))
    for s in coupl["experimental"]["summary"]:
        assert f">{s['verdict']}</span>" in text
    minima = pd.read_csv(os.path.join(full_folder, "minima.csv"))
    pooled = minima[minima["torsion"].isna()]
    for row in pooled.itertuples():
        assert format_value_error(row.angle_deg, row.angle_err_deg) in text
    assert "@media print" in text and "break-inside: avoid" in text


def test_report_of_a_track_only_folder_says_what_is_missing(track_only_folder, tmp_path):  # noqa: F811
    path = write_report(track_only_folder, out=str(tmp_path / "r.html"))
    text = open(path, encoding="utf-8").read()
    assert "No profiles in this folder (run <code>dihedra profile DIR</code>)" in text
    assert "No kinetics in this folder" in text and "No comparison in this folder" in text
    assert "No torsion correction fitted by reweighting in this folder" in text
    assert "Figures not made" in text and "no profiles.csv" in text
    assert len(re.findall(r"<img ", text)) == 4  # series, raster, populations, convergence


def test_report_shows_the_temperature_as_given(tmp_path):
    # 298.15 K (the bundled example's) in the header and the profiles' lead, not rounded to 298 K
    examples = os.path.join(os.path.dirname(__file__), "..", "example_trajectories")
    out = str(tmp_path / "res")
    assert main(["track", os.path.join(examples, "hexane.pdb"), os.path.join(examples, "hexane.xtc"), "--torsions",
                 "rotatable", "--stop", "50", "--temperature", "298.15", "--out", out]) == 0
    assert main(["profile", out, "--types-only", "--bootstrap", "20"]) == 0
    text = open(write_report(out, figures=False), encoding="utf-8").read()
    header = text[:text.index("</header>")]
    assert "scheme anti-gauche, 298.15 K</p>" in header and " 298 K" not in text
    assert "F(φ) = −kT ln p(φ) at 298.15 K (kT = " in section(text, "profiles")


def test_report_command(full_folder, tmp_path, capsys):  # noqa: F811
    folder = str(tmp_path / "copy")
    shutil.copytree(full_folder, folder)
    assert main(["report", folder, "--no-figures"]) == 0
    assert capsys.readouterr().out.strip() == f"report written to {os.path.join(folder, 'report.html')}"
    assert "<img" not in open(os.path.join(folder, "report.html")).read()
    assert main(["report", folder, "--out", str(tmp_path / "nowhere" / "r.html")]) == 2
    assert "does not exist" in capsys.readouterr().err


# ------------------------------------------------------------------------------------------------
# headless Chromium
# ------------------------------------------------------------------------------------------------
#: Appended to a copy of the report (the report itself has no script): images that failed to
#: decode and script errors become console errors.
CHECK_SCRIPT = """<script>
window.addEventListener('error', e => console.error('page error: ' + e.message));
window.addEventListener('load', () => {
  const bad = [...document.images].filter(i => !(i.complete && i.naturalWidth > 0));
  if (bad.length) { console.error('broken images: ' + bad.length); }
  // a table cell whose text runs over more than one line (a word or a label broken in a narrow
  // column); cells of running text, paths and hashes may wrap, headers between words
  const split = [...document.querySelectorAll('td')].filter(c => {
    if (c.matches('.wrap, .path, .hash, .kv td')) return false;
    const walk = document.createTreeWalker(c, NodeFilter.SHOW_TEXT);
    for (let n = walk.nextNode(); n; n = walk.nextNode()) {
      const r = document.createRange(); r.selectNodeContents(n);
      const tops = new Set([...r.getClientRects()].map(x => Math.round(x.top)));
      if (tops.size > 1) return true;
    }
    return false;
  });
  if (split.length) { console.error('cells on several lines: ' + split.slice(0, 3).map(c => c.textContent).join(' | ')); }
  // a table wider than the page's text column
  const main = document.querySelector('main');
  const room = main.clientWidth - parseFloat(getComputedStyle(main).paddingLeft) - parseFloat(getComputedStyle(main).paddingRight);
  const wide = [...document.querySelectorAll('table')].filter(t => t.getBoundingClientRect().width > room + 1);
  if (wide.length) { console.error('tables wider than the page: ' + wide.length + ' (' + wide.map(t => t.querySelector('th, td').textContent).join(', ') + ')'); }
  console.log('dihedra-check: images ' + document.images.length + ', broken ' + bad.length + ', split ' + split.length + ', wide ' + wide.length);
});
</script>"""


def run_chromium(page, *extra):
    """Open ``page`` in headless Chromium; return (console lines, stderr)."""
    profile = tempfile.mkdtemp()
    try:
        proc = subprocess.run(
            [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
             "--no-first-run", "--disable-component-update", "--disable-sync", f"--user-data-dir={profile}",
             "--enable-logging=stderr", "--v=0", "--host-resolver-rules=MAP * ~NOTFOUND",
             "--virtual-time-budget=10000", *extra, "file://" + page],
            capture_output=True, text=True, timeout=180)
    finally:
        shutil.rmtree(profile, ignore_errors=True)
    console = [ln for ln in proc.stderr.splitlines() if ":CONSOLE" in ln]
    return console, proc.stderr


def console_errors(console):
    return [ln for ln in console if "dihedra-check:" not in ln]


@pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed (apt-get install chromium)")
def test_report_opens_in_headless_chromium_without_console_errors(full_report, tmp_path):
    from PIL import Image

    path, text = full_report
    checked = tmp_path / "checked.html"
    checked.write_text(text.replace("</body>", CHECK_SCRIPT + "</body>"), encoding="utf-8")
    shot = tmp_path / "report.png"
    console, stderr = run_chromium(str(checked), f"--screenshot={shot}", "--window-size=1280,3000")
    assert console_errors(console) == [], console
    summary = [ln for ln in console if "dihedra-check:" in ln]
    assert summary and "images 9, broken 0, split 0, wide 0" in summary[0], stderr[-2000:]
    pixels = np.asarray(Image.open(shot).convert("L"))
    assert pixels.std() > 10  # something was drawn, not a blank page
    # prints to PDF
    pdf = tmp_path / "report.pdf"
    run_chromium(path, f"--print-to-pdf={pdf}", "--no-pdf-header-footer")
    data = pdf.read_bytes()
    assert data.startswith(b"%PDF") and data.count(b"/Type /Page") + data.count(b"/Type/Page") > 2
    # the check can fail: a page with a broken image, a script error, a label broken in a narrow
    # column and a table wider than the page is caught
    bad = tmp_path / "bad.html"
    bad.write_text("<html><head><style>main { width: 300px; }</style></head><body><main>"
                   "<img src='data:image/svg+xml;base64,bm90IGFuIGltYWdl'>"
                   "<table><tr><td style='width: 3em; overflow-wrap: anywhere'>gauche-|gauche+|anti</td></tr></table>"
                   "<table><tr><td style='white-space: nowrap'>" + "wide " * 80 + "</td></tr></table></main>"
                   "<script>undefined_function()</script>" + CHECK_SCRIPT + "</body></html>")
    console, _ = run_chromium(str(bad))
    errors = " ".join(console_errors(console))
    assert "broken images: 1" in errors and "undefined_function" in errors
    assert "cells on several lines: gauche-|gauche+|anti" in errors and "tables wider than the page: 1" in errors


def test_report_shows_the_reference_populations_and_their_verdict(full_folder, full_report):  # noqa: F811
    _, text = full_report
    table = pd.read_csv(os.path.join(full_folder, "comparison.csv"))
    assert "Reference populations" in text
    for verdict, reason in zip(table["reference_verdict"], table["reference_verdict_reason"]):
        assert f">{verdict}</span>" in text and html.escape(reason) in text
    assert "0.400 ± 0.030" in text and "gauche+|gauche-" in text


# ------------------------------------------------------------------------------------------------
# a protein: 639 backbone torsions of 57 types
# ------------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def protein_report(protein_folder, tmp_path_factory):  # noqa: F811
    path = write_report(protein_folder, out=str(tmp_path_factory.mktemp("protein-report") / "report.html"))
    with open(path, encoding="utf-8") as fh:
        return path, fh.read()


def test_protein_report_summarises_many_types_and_links_the_full_tables(protein_folder, protein_report):  # noqa: F811
    from dihedra.presentation.figures import informative_types

    path, text = protein_report
    pops = pd.read_csv(os.path.join(protein_folder, "populations_by_type.csv"))
    n_types = pops["type"].nunique()
    assert n_types == 57  # the 214 residues of adenylate kinase: phi, psi, omega of 19 residue types
    shown = informative_types(pops, 4)
    assert f"Shown: 4 of {n_types} types (the most informative types)" in text
    assert all(t in text for t in shown) and "MET:omega" not in shown  # an omega that never leaves trans
    # every type's verdict and main state in one line each, the full tables linked
    assert text.count("populations_by_type.csv</a>") >= 1 and "convergence.csv</a>" in text
    assert "Main state of every type" in text and "Not converged (" in text
    # rates: no event is an upper limit, never 0 +- 0; values rounded to their errors
    rates = text[text.index("Rate constants per type"):text.index("Dwell times per type")]
    assert "(95 %)" in rates and not re.search(r">0(\.0+)? ± 0(\.0+)?<", rates) and "0.0000 ± 0.0000" not in text
    assert not re.search(r"\d\.\d{5,}", re.sub(r"data:[^']+", "", text))  # no six-digit numbers anywhere
    # the per-type figures are those of the informative types
    names = re.findall(r"<figure id='fig-([^']+)'", text)
    assert sorted(n for n in names if n.startswith("profile_")) == sorted(
        "profile_" + t.replace(":", "_") for t in shown)


def test_report_honours_the_types_chosen(protein_folder, tmp_path):  # noqa: F811
    path = write_report(protein_folder, out=str(tmp_path / "r.html"), types=["ALA:phi", "ALA:psi"], figures=False)
    text = open(path, encoding="utf-8").read()
    assert "Shown: 2 of 57 types (the types chosen)" in text
    rates = text[text.index("Rate constants per type"):text.index("Dwell times per type")]
    assert "ALA:phi" in rates and "GLY:phi" not in rates
    with pytest.raises(DihedraError, match="no torsion type 'ALA:chi9'"):
        write_report(protein_folder, out=str(tmp_path / "r2.html"), types=["ALA:chi9"])


def section(text, name):
    """The HTML of one section of a report."""
    start = text.index(f"<section id='{name}'>")
    return text[start:text.index("</section>", start)]


def table_rows(html_text):
    """Every table of ``html_text`` as a list of dicts (header -> cell text)."""
    out = []
    for table in re.findall(r"<table>(.*?)</table>", html_text, flags=re.S):
        heads = [html.unescape(re.sub("<[^>]+>", "", h)) for h in re.findall(r"<th[^>]*>(.*?)</th>", table, re.S)]
        for row in re.findall(r"<tr>(.*?)</tr>", table.split("</thead>", 1)[-1], flags=re.S):
            cells = [html.unescape(re.sub("<[^>]+>", "", c)) for c in re.findall(r"<td[^>]*>(.*?)</td>", row, re.S)]
            out.append(dict(zip(heads, cells)))
    return out


@pytest.fixture(scope="module")
def backbone_report(protein_folder, tmp_path_factory):  # noqa: F811
    """A copy of the protein folder with Ramachandran regions and 3J(HN,HA) couplings (glycine:
    three rows per torsion), and its report."""
    folder = str(tmp_path_factory.mktemp("backbone") / "results")
    shutil.copytree(protein_folder, folder)
    assert main(["ramachandran", folder]) == 0
    assert main(["couplings", folder, "--relation", "hu-bax-1997"]) == 0
    path = write_report(folder)
    with open(path, encoding="utf-8") as fh:
        return folder, fh.read()


def test_report_shows_the_ramachandran_regions_rounded_to_their_errors(backbone_report):
    folder, text = backbone_report
    part = section(text, "ramachandran")
    assert "<a href='#ramachandran'>" in text
    by_type = pd.read_csv(os.path.join(folder, "ramachandran_by_type.csv"))
    rows = {r["type"]: r for r in table_rows(part) if "type" in r}
    assert set(rows) == set(by_type["type"])   # every residue type, one row each
    for r in by_type.itertuples():
        assert rows[r.type][r.region] == format_value_error(r.population, r.population_err), (r.type, r.region)
        assert rows[r.type]["residues"] == str(r.n_residues)
    info = json.load(open(os.path.join(folder, "ramachandran.json")))
    for note in info["notices"] + info.get("cautions", []):
        assert html.escape(note) in part
    assert html.escape(info["parameters"]["source"]) in part
    bounds = {r["region"]: r for r in table_rows(part) if "region" in r}
    assert bounds["beta"]["ψ"] == "50 to 180 and -180 to -120"   # 50 .. 240 wraps through 180
    assert "ramachandran.csv</a>" in part
    # the figure, in its section, and in the figure set of the folder
    assert "<figure id='fig-ramachandran_regions'" in part
    with style():
        kinds = [i.kind for i in figure_set(folder, types=["ALA:phi"]).items]
    assert "ramachandran" in kinds
    # more types than angle series: the figure set says how many it shows
    five = list(dict.fromkeys(pd.read_csv(os.path.join(folder, "torsions.csv"))["type"]))[:5]
    notes = []
    with style():
        series = [i for i in figure_set(folder, types=five, log=notes.append).items if i.kind == "series"]
    assert len(series) == 1 and any("angle time series for 3 torsion(s)" in n and "of 5 chosen types" in n
                                     for n in notes)


def test_report_without_ramachandran_regions_says_how_to_make_them(protein_report, full_report):
    _, text = protein_report
    assert "No Ramachandran regions in this folder (run <code>dihedra ramachandran DIR</code>)" in text
    assert "no ramachandran_by_type.csv (run &#x27;dihedra ramachandran&#x27;)" in text
    # butane has no protein backbone: neither the section nor its link
    _, text = full_report
    assert "id='ramachandran'" not in text and "#ramachandran" not in text


def test_report_couplings_name_the_coupled_atoms_of_every_row(backbone_report):
    folder, text = backbone_report
    rows = [r for r in table_rows(section(text, "couplings")) if r.get("type") == "GLY:phi"]
    table = pd.read_csv(os.path.join(folder, "couplings_hu-bax-1997.csv"))
    gly = table[(table["level"] == "type") & (table["type"] == "GLY:phi")]
    assert len(gly) == 3   # H-alpha 1, H-alpha 2 and both: three rows that only the atoms tell apart
    assert [(r["coupled atoms"], r["J (Hz)"]) for r in rows] == [
        (a, format_value_error(j, e)) for a, j, e in zip(gly["coupled_atoms"], gly["j_hz"], gly["j_err_hz"])]
    assert all("torsion" not in r for r in rows)   # the mean of a type has no torsion: no column of dashes


@pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed (apt-get install chromium)")
def test_protein_report_prints_to_a_few_pages_and_fits_an_a4_page(protein_report, tmp_path):
    path, text = protein_report
    checked = tmp_path / "checked.html"
    checked.write_text(text.replace("</body>", CHECK_SCRIPT + "</body>"), encoding="utf-8")
    # 794 px: the width of an A4 page at 96 dpi; no table wider, no label broken over two lines
    console, stderr = run_chromium(str(checked), "--window-size=794,3000")
    assert console_errors(console) == [], console
    assert any("split 0, wide 0" in ln for ln in console), stderr[-2000:]
    pdf = tmp_path / "report.pdf"
    run_chromium(path, f"--print-to-pdf={pdf}", "--no-pdf-header-footer")
    data = pdf.read_bytes()
    pages = len(re.findall(rb"/Type\s*/Page(?!s)", data))
    assert 3 <= pages <= 14, pages  # a few pages (figures of four types, tables of their rows), not 27


def test_every_csv_dihedra_writes_reads_back_with_plain_pandas(full_folder, protein_folder):  # noqa: F811
    # each table of a folder that every step wrote into: pandas.read_csv with no options gives its
    # rows (no comment lines, no index column, one header row); the csv module is the reference
    import csv

    names = []
    for folder in (full_folder, protein_folder):
        for name in sorted(os.listdir(folder)):
            if not name.endswith(".csv"):
                continue
            path = os.path.join(folder, name)
            table = pd.read_csv(path)
            with open(path, newline="") as fh:
                rows = list(csv.reader(fh))
            assert list(table.columns) == rows[0] and len(table) == len(rows) - 1, name
            assert not any(str(c).startswith(("Unnamed", "#")) for c in table.columns), name
            names.append(name)
    assert {"populations.csv", "transitions.csv", "couplings_karplus-1959.csv", "comparison.csv",
            "schemes.csv"} <= set(names)


def test_report_of_a_single_structure_claims_no_statistics(tmp_path):
    # MDAnalysisTests' RNA (PDB 1k5i): one structure. Its start is not called equilibrated, the profiles
    # claim no bootstrap, the kinetics section says a single structure has none (instead of asking for
    # 'dihedra kinetics', which refuses it), and only advice that applies is given
    from MDAnalysisTests.datafiles import RNA_PDB, RNA_PSF

    out = str(tmp_path / "rna")
    assert main(["track", RNA_PSF, RNA_PDB, "--torsions", "nucleic-backbone", "--temperature", "300",
                 "--out", out]) == 0
    assert main(["profile", out, "--types-only", "--bootstrap", "20"]) == 0
    text = open(write_report(out, figures=False), encoding="utf-8").read()
    conv = section(text, "convergence")
    starts = {r["unequilibrated until"] for r in table_rows(conv)}
    assert starts == {"not testable (too few frames)"}
    assert "--discard auto" not in conv and "a start that cannot be tested" in conv
    profiles = html.unescape(section(text, "profiles"))
    assert "no errors (the samples lie in one block of frames, a single frame" in profiles
    assert "from a block bootstrap (" not in profiles
    kinetics = section(text, "kinetics")
    assert "a single structure has no transitions or dwell times" in kinetics and "dihedra kinetics DIR" not in kinetics
