"""The state raster keeps a rare state visible: a single row (a cis omega) among thousands, a short
visit inside a column of many frames, a row left out by thinning; and the common case (no rare
state) is drawn as before, the most frequent state of every cell."""

import json

import matplotlib
import numpy as np
import pandas as pd
import pytest
from matplotlib.collections import LineCollection
from matplotlib.colors import to_rgb
from matplotlib.figure import Figure

matplotlib.use("Agg")

from dihedra.presentation import figures  # noqa: E402
from dihedra.presentation.figures import rarestates  # noqa: E402
from dihedra.presentation.figures.raster import _thin  # noqa: E402
from dihedra.selection.schemes import get_scheme  # noqa: E402

CIS_TRANS = get_scheme("cis-trans")
TRANS, CIS = CIS_TRANS.labels.index("trans"), CIS_TRANS.labels.index("cis")


def plain_mode(codes_block, n_states):
    """The most frequent state of a block of frames, ties to the lower code (numpy is the reference)."""
    return int(np.argmax(np.bincount(codes_block, minlength=n_states)))


def write_folder(path, codes, types, scheme=CIS_TRANS, dt_ps=1.0, populations=True):
    """A results folder of ``states.parquet`` (frames x torsions), torsions.csv and summary.json (and
    populations.csv from the codes) for one replica, as track writes them."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    n_frames, n_tors = codes.shape
    labels = [f"T{k}" for k in range(n_tors)]
    table = pa.table({"replica": np.zeros(n_frames, np.int64), "frame": np.arange(n_frames),
                      "time_ps": np.arange(n_frames, dtype=float) * dt_ps,
                      **{lab: codes[:, k].astype(np.int8) for k, lab in enumerate(labels)}})
    pq.write_table(table, path / "states.parquet", row_group_size=100)
    pd.DataFrame({"torsion": labels, "type": types}).to_csv(path / "torsions.csv", index=False)
    (path / "summary.json").write_text(json.dumps({
        "scheme": scheme.to_dict(),
        "replicas": [{"frames_analysed": n_frames, "time_between_analysed_frames_ps": dt_ps,
                      "time_step_known": True}]}))
    if populations:
        rows = [(lab, s, float(np.mean(codes[:, k] == c)))
                for k, lab in enumerate(labels) for c, s in enumerate(scheme.labels)]
        pd.DataFrame(rows, columns=["torsion", "state", "population"]).to_csv(path / "populations.csv", index=False)
    return labels


def rendered_rgb(ax, dpi, rows=None):
    """The pixels of the axes (the legend shows every state's colour), or of its rows ``(first, last)``."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    ax.figure.set_dpi(dpi)
    canvas = FigureCanvasAgg(ax.figure)
    canvas.draw()
    rgb = np.asarray(canvas.buffer_rgba())[:, :, :3].astype(float) / 255.0
    box = ax.get_window_extent()
    y0, y1 = box.y0, box.y1
    if rows is not None:
        y1, y0 = sorted(ax.transData.transform([(0, rows[0] - 0.5), (0, rows[1] + 0.5)])[:, 1])[::-1]
    height = rgb.shape[0]
    return rgb[int(height - y1) + 1:int(height - y0) - 1, int(box.x0) + 1:int(box.x1) - 1]


def pixels_of(rgb, colour, tol=0.02):
    return int((np.abs(rgb - np.array(to_rgb(colour))).max(axis=2) < tol).sum())


def test_one_cis_row_among_two_thousand_survives_into_the_drawn_figure(tmp_path):
    # One cis peptide among ~2000 omegas: non-proline cis bonds are ~0.03 % and X-Pro ~5 % of
    # peptide bonds in crystal structures (Jabs, Weiss & Hilgenfeld, J. Mol. Biol. 286 (1999) 291;
    # from memory), so a protein raster typically holds one or a few cis rows among hundreds.
    n_frames, n_tors, cis_row = 240, 2000, 1234
    codes = np.full((n_frames, n_tors), TRANS, np.int8)
    codes[:, cis_row] = CIS
    write_folder(tmp_path, codes, ["X:omega"] * n_tors)
    raster = figures.read_state_raster(str(tmp_path), max_columns=60)
    assert raster.codes.shape == (2000, 60) and raster.frames_per_column == 4
    assert (raster.codes[cis_row] == CIS).all()
    assert np.flatnonzero(raster.rare_cells().any(axis=1)).tolist() == [cis_row]
    assert raster.rare_found() == [("X:omega", "cis")]
    assert "cis (X:omega) in 1 row" in raster.description and "enlarged to at least 1 pt" in raster.description

    fig = Figure(figsize=(figures.WIDTHS["single"], 2.9), layout="constrained")
    ax = figures.plot_state_raster(raster, CIS_TRANS, ax=fig.add_subplot())
    # the array the figure draws: the image holds the row, the overlay draws it at least 1 pt thick
    image = ax.get_images()[0].get_array()
    assert (np.asarray(image)[cis_row] == CIS + 1).all() and (np.asarray(image) == CIS + 1).sum() == 60
    overlays = [c for c in ax.collections if isinstance(c, LineCollection)]
    assert len(overlays) == 1
    (seg,) = overlays[0].get_segments()
    assert seg[:, 1].tolist() == [cis_row, cis_row] and seg[0, 0] == 0.0 and seg[1, 0] == pytest.approx(240.0)
    assert overlays[0].get_linewidths()[0] >= rarestates.RARE_MIN_PT
    # and it reaches the pixels: 2000 rows in about 150 pixels (a row is < 0.1 pixel at 72 dpi)
    cis_colour = figures.state_colours(CIS_TRANS)["cis"]
    assert pixels_of(rendered_rgb(ax, 72), cis_colour) > 100


def test_a_short_rare_visit_takes_its_column_from_a_quarter_of_the_frames(tmp_path):
    n_frames, n_tors = 120, 300   # 10 columns of 12 frames
    rng = np.random.default_rng(1)
    codes = np.full((n_frames, n_tors), TRANS, np.int8)
    codes[0:3, 5] = CIS          # 3 of 12 frames of column 0: a quarter, shown
    codes[36:38, 5] = CIS        # 2 of 12 frames of column 3: a sixth, the majority (trans) shown
    codes[rng.random((n_frames, n_tors)) < 0.001] = CIS   # scattered single frames elsewhere
    write_folder(tmp_path, codes, ["X:omega"] * n_tors)
    raster = figures.read_state_raster(str(tmp_path), max_columns=10)
    assert raster.frames_per_column == 12
    for r in range(n_tors):
        for c in range(10):
            block = codes[12 * c:12 * (c + 1), r].astype(int)
            share = np.mean(block == CIS)
            expected = CIS if share >= 0.25 else plain_mode(block, 2)
            assert raster.codes[r, c] == expected, (r, c)
    assert raster.codes[5, 0] == CIS and raster.codes[5, 3] == TRANS
    assert "shown from 25 % of a column's frames" in raster.description


def test_common_states_are_the_most_frequent_state_as_before(tmp_path):
    # three states of comparable shares (liquid alkane torsions: gauche ~ 0.3-0.4, from memory):
    # no state is rare, the cells are the plain most frequent state and nothing is drawn over them
    scheme = get_scheme("anti-gauche")
    n_frames, n_tors = 300, 500
    rng = np.random.default_rng(2)
    codes = rng.choice(3, size=(n_frames, n_tors), p=[0.6, 0.2, 0.2]).astype(np.int8)
    write_folder(tmp_path, codes, ["a"] * 250 + ["b"] * 250, scheme=scheme)
    raster = figures.read_state_raster(str(tmp_path), max_columns=30)
    expected = np.array([[plain_mode(codes[10 * c:10 * (c + 1), r].astype(int), 3) for c in range(30)]
                         for r in range(n_tors)])
    np.testing.assert_array_equal(raster.codes, expected)
    assert not raster.rare.any() and not raster.rare_cells().any() and "rare" not in raster.description
    ax = figures.plot_state_raster(raster, scheme, ax=Figure().add_subplot())
    assert not [c for c in ax.collections if isinstance(c, LineCollection)]


def test_a_state_of_a_minority_type_is_compared_with_its_own_type_only():
    # a chi2 group of 200 rows: 198 take two states (a, b), 2 prolines take their own (endo, exo)
    # and sit in endo; endo is 1 % of the group's frames but all of the prolines': not rare
    counts = np.zeros((200, 1, 5), np.int64)
    counts[:198, 0, 1] = 50
    counts[:198:2, 0, 2] = 50
    counts[198:, 0, 3] = 100
    allowed = np.zeros((200, 4), bool)
    allowed[:198, :2] = True
    allowed[198:, 2:] = True
    assert not rarestates.rare_states(counts, ["chi2"] * 200, allowed).any()
    assert rarestates.rare_states(counts, ["chi2"] * 200)[198:, 2].all()  # compared with all: rare


def test_thinning_keeps_the_row_in_a_rare_state(tmp_path):
    n_frames, n_tors = 50, 3000
    even = _thin(["X:omega"] * n_tors, 2000)
    cis_row = int(np.setdiff1d(np.arange(n_tors), even)[700])   # a row that even thinning leaves out
    codes = np.full((n_frames, n_tors), TRANS, np.int8)
    codes[:, cis_row] = CIS
    write_folder(tmp_path, codes, ["X:omega"] * n_tors)
    raster = figures.read_state_raster(str(tmp_path), max_rows=2000, max_columns=50)
    assert len(raster.rows) <= 2000 and f"T{cis_row}" in raster.rows
    row = raster.rows.index(f"T{cis_row}")
    assert (raster.codes[row] == CIS).all() and raster.rare_cells()[row].all()
    assert raster.rows == sorted(raster.rows, key=lambda x: int(x[1:]))   # still in order
    assert f"{len(raster.rows)} of 3000 torsions (evenly spaced in every group, and 1 that visits a rare state)" in \
        raster.description
    # without populations.csv nothing tells which rows are rare before reading: even thinning only
    (tmp_path / "populations.csv").unlink()
    assert f"T{cis_row}" not in figures.read_state_raster(str(tmp_path), max_rows=2000, max_columns=50).rows


def test_the_cis_omega_of_adenylate_kinase_is_drawn(tmp_path):
    # MDAnalysisTests' CHARMM adenylate kinase (PSF/DCD, from E. coli AdK, PDB 4AKE): its one cis
    # peptide bond is Phe86-Pro87 (torsion PHE86:omega; the cis Pro87 of AdK, from memory)
    data = pytest.importorskip("MDAnalysisTests.datafiles")
    from dihedra import track

    track(data.PSF, [data.DCD], torsions=["protein-backbone", "protein-sidechains"], stop=20,
          out=str(tmp_path / "adk"))
    raster = figures.read_state_raster(str(tmp_path / "adk"))
    mask = raster.rare_cells()
    cis_rows = [raster.rows[r] for r in np.flatnonzero(mask.any(axis=1))
                if raster.state_labels[raster.codes[r][mask[r]][0]] == "cis"]
    assert cis_rows == ["PHE86:omega"]
    assert len(raster.rows) == 1060
    from dihedra.io.resultsdir import load_results

    scheme = load_results(str(tmp_path / "adk")).scheme
    fig = Figure(figsize=(figures.WIDTHS["single"], 2.9), layout="constrained")
    ax = figures.plot_state_raster(raster, scheme, ax=fig.add_subplot())
    omega = [(a, b) for g, a, b in raster.groups if g == "omega"][0]
    # the omega rows, 213 in about 60 pixels: the cis row is a line across the figure 1 pt (4 pixels
    # at 300 dpi) thick, about 2800 pixels; the image alone draws a sampled row at most one pixel
    # high (about 700 pixels here), or not at all (the figure of 'dihedra figures' before)
    assert pixels_of(rendered_rgb(ax, 300, omega), figures.state_colours(scheme)["cis"]) > 2000
