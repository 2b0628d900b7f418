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
from figure_data import full_folder, track_only_folder  # noqa: F401  (fixtures)

from dihedra.cli import main
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
    coupl = json.load(open(os.path.join(full_folder, "couplings.json")))
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
    assert "Figures not made" in text and "no profiles.csv" in text
    assert len(re.findall(r"<img ", text)) == 4  # series, raster, populations, convergence


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
  console.log('dihedra-check: images ' + document.images.length + ', broken ' + bad.length);
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
    assert summary and "images 9, broken 0" in summary[0], stderr[-2000:]
    pixels = np.asarray(Image.open(shot).convert("L"))
    assert pixels.std() > 10  # something was drawn, not a blank page
    # prints to PDF
    pdf = tmp_path / "report.pdf"
    run_chromium(path, f"--print-to-pdf={pdf}", "--no-pdf-header-footer")
    data = pdf.read_bytes()
    assert data.startswith(b"%PDF") and data.count(b"/Type /Page") + data.count(b"/Type/Page") > 2
    # the check can fail: a page with a broken image and a script error is caught
    bad = tmp_path / "bad.html"
    bad.write_text("<html><body><img src='data:image/svg+xml;base64,bm90IGFuIGltYWdl'>"
                   "<script>undefined_function()</script>" + CHECK_SCRIPT + "</body></html>")
    console, _ = run_chromium(str(bad))
    errors = " ".join(console_errors(console))
    assert "broken images: 1" in errors and "undefined_function" in errors


def test_report_shows_the_reference_populations_and_their_verdict(full_folder, full_report):  # noqa: F811
    _, text = full_report
    table = pd.read_csv(os.path.join(full_folder, "comparison.csv"))
    assert "Reference populations" in text
    for verdict, reason in zip(table["reference_verdict"], table["reference_verdict_reason"]):
        assert f">{verdict}</span>" in text and html.escape(reason) in text
    assert "0.400 ± 0.030" in text and "gauche+|gauche-" in text
