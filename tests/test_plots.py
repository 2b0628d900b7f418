"""Figures: content on small data (lines, patches, labels with units, state colours), the figure set
of a folder, file formats, and that nothing overlaps or leaves the figure at journal widths."""

import itertools
import os

import matplotlib
import numpy as np
import pandas as pd
import pytest
from figure_data import full_folder, track_only_folder  # noqa: F401  (fixtures)
from matplotlib.collections import PolyCollection, QuadMesh
from matplotlib.colors import to_hex, to_rgb
from matplotlib.figure import Figure
from matplotlib.patches import Circle, FancyArrowPatch, Rectangle
from series_reading import read_wide

matplotlib.use("Agg")

from dihedra.presentation import figures  # noqa: E402
from dihedra.errors import DihedraError  # noqa: E402
from dihedra.io.resultsdir import load_results  # noqa: E402
from dihedra.selection.schemes import get_scheme, scheme_from_mapping  # noqa: E402


def new_ax(width="single", height=2.4):
    fig = Figure(figsize=(figures.WIDTHS[width], height), layout="constrained")
    return fig.add_subplot()


def texts_of(ax):
    return [t.get_text() for t in ax.texts]


# ------------------------------------------------------------------------------------------------
# colours
# ------------------------------------------------------------------------------------------------
# Machado, Oliveira & Fernandes, IEEE TVCG 15 (2009) 1291, severity 1.0 (from memory), linear RGB.
CVD = {"protanopia": [[0.152286, 1.052583, -0.204868], [0.114503, 0.786281, 0.099216],
                      [-0.003882, -0.048116, 1.051998]],
       "deuteranopia": [[0.367322, 0.860646, -0.227968], [0.280085, 0.672501, 0.047413],
                        [-0.011820, 0.042940, 0.968881]],
       "tritanopia": [[1.255528, -0.076749, -0.178779], [-0.078411, 0.930809, 0.147602],
                      [0.004733, 0.691367, 0.303900]]}


def cie_lab(rgb):
    """sRGB (0..1) -> CIE L*a*b* (D65), standard formulas (IEC 61966-2-1, CIE 15)."""
    c = np.asarray(rgb, dtype=float)
    xyz = np.array([[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]]) @ c
    t = xyz / np.array([0.95047, 1.0, 1.08883])
    f = np.where(t > (6 / 29) ** 3, np.cbrt(t), t / (3 * (6 / 29) ** 2) + 4 / 29)
    return np.array([116 * f[1] - 16, 500 * (f[0] - f[1]), 200 * (f[1] - f[2])])


def linear(rgb):
    c = np.asarray(rgb, dtype=float)
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


@pytest.mark.parametrize("spec", ["anti-gauche", "staggered-eclipsed", "staggered-eclipsed:2", "klyne-prelog"])
def test_builtin_state_colours_are_fixed_and_distinct_under_colour_vision_deficiency(spec):
    scheme = get_scheme(spec)
    colours = figures.state_colours(scheme)
    assert list(colours) == list(scheme.labels)
    # fixed mapping, the same hue for the same role in every scheme (documented table)
    fixed = {"anti": "#0072B2", "ap": "#0072B2", "staggered": "#0072B2", "gauche+": "#E69F00", "+sc": "#E69F00",
             "gauche-": "#CC79A7", "-sc": "#CC79A7", "eclipsed": "#D55E00", "sp": "#D55E00",
             "+ac": "#56B4E9", "-ac": "#009E73"}
    assert all(to_hex(colours[s]).upper() == fixed[s] for s in scheme.labels)
    # every pair stays clearly apart (CIE76 dE > 12; about 2.3 is just noticeable -- common practice)
    # for normal vision and simulated protanopia, deuteranopia and tritanopia (Machado et al. 2009)
    for name, m in [("normal", np.eye(3))] + list(CVD.items()):
        labs = {s: cie_lab(np.clip(np.asarray(m) @ linear(to_rgb(c)), 0, 1)) for s, c in colours.items()}
        for a, b in itertools.combinations(labs, 2):
            assert np.linalg.norm(labs[a] - labs[b]) > 12.0, (spec, name, a, b)
    # undefined frames are grey, unlike every state
    assert figures.UNDEFINED_COLOUR not in colours.values()


def test_custom_scheme_takes_the_cyclic_palette_in_label_order():
    states = [{"label": f"s{k}", "from_deg": -180 + 40 * k, "to_deg": -140 + 40 * k} for k in range(9)]
    scheme = scheme_from_mapping({"name": "nine", "state": states})
    colours = figures.state_colours(scheme)
    pal = figures.CYCLIC_PALETTE
    assert [colours[f"s{k}"] for k in range(9)] == [pal[k % len(pal)] for k in range(9)]
    # a custom scheme that reuses built-in labels but is not a built-in set is cyclic too
    two = scheme_from_mapping({"state": [{"label": "anti", "from_deg": 90, "to_deg": -90},
                                         {"label": "other", "from_deg": -90, "to_deg": 90}]})
    assert figures.state_colours(two) == {"anti": pal[0], "other": pal[1]}


def test_sector_spans_cover_the_circle_once():
    for spec in ("anti-gauche", "klyne-prelog", "staggered-eclipsed"):
        scheme = get_scheme(spec)
        spans = figures.sector_spans(scheme)
        assert sum(hi - lo for _, lo, hi in spans) == pytest.approx(360.0)
        # the state of each span's midpoint is the span's state (scheme.assign is the reference)
        for state, lo, hi in spans:
            assert scheme.assign([(lo + hi) / 2])[0] == state


# ------------------------------------------------------------------------------------------------
# 1. angle series and 2. raster, read in chunks
# ------------------------------------------------------------------------------------------------
def test_angle_series_downsamples_in_chunks_and_draws_bands(full_folder):
    labels = ["BUT1:C1-C2-C3-C4", "BUT2:C1-C2-C3-C4"]
    series = figures.read_angle_series(full_folder, labels, max_points=100, batch_frames=37)
    full = read_wide(full_folder, "angles", columns=labels)
    stride = int(np.ceil(len(full) / 100))
    assert series.stride == stride and series.n_frames == len(full)
    # every stride-th frame, exactly (pandas on the whole table is the reference)
    np.testing.assert_allclose(series.frame[labels].to_numpy(), full[labels].to_numpy()[::stride])
    assert f"every {stride}th" in series.description
    scheme = load_results(full_folder).scheme
    ax = figures.plot_angle_series(series, scheme, labels[1], ax=new_ax())
    pts = [ln for ln in ax.lines if ln.get_marker() == "o"]
    assert len(pts) == 2  # one per replica
    assert sum(len(ln.get_xdata()) for ln in pts) == len(series.frame)
    np.testing.assert_allclose(np.concatenate([ln.get_ydata() for ln in pts]), series.frame[labels[1]])
    bands = [p for p in ax.patches if isinstance(p, (Rectangle, matplotlib.patches.Polygon))]
    assert len(bands) == len(figures.sector_spans(scheme)) == 4  # anti is split at +-180
    assert "deg" in ax.get_ylabel() and r"\varphi" in ax.get_ylabel()
    assert ax.get_xlabel().endswith("/ ps")
    assert set(texts_of(ax)) >= {"anti", "gauche+", "gauche-", "replica 1", "replica 2"}
    assert ax.get_ylim() == (-180, 180)


def test_state_raster_is_the_most_frequent_state_per_column(full_folder):
    scheme = load_results(full_folder).scheme
    states = read_wide(full_folder, "states")
    labels = [c for c in states.columns if c.startswith("BUT")]
    # one column per frame: the raster is the state table itself
    exact = figures.read_state_raster(full_folder, max_columns=10_000, batch_frames=50)
    assert exact.frames_per_column == 1
    np.testing.assert_array_equal(exact.codes, states[exact.rows].to_numpy().T)
    # 30 columns of 20 frames (two replicas of 300): the mode of each block of 20 frames
    agg = figures.read_state_raster(full_folder, max_rows=4, max_columns=30, batch_frames=64)
    assert len(agg.rows) == 4 and agg.n_torsions == len(labels)
    assert "4 of 6 torsions" in agg.description and "most frequent state of 20 frames" in agg.description
    for i, lab in enumerate(agg.rows):
        for rep in (0, 1):
            series = states.loc[states["replica"] == rep, lab].to_numpy()
            for c in range(15):
                block = series[20 * c:20 * (c + 1)]
                mode = np.argmax(np.bincount(block, minlength=3))  # numpy is the reference
                assert agg.codes[i, 15 * rep + c] == mode
    ax = figures.plot_state_raster(agg, scheme, ax=new_ax())
    images = ax.get_images()
    assert len(images) == 2  # one per replica
    cmap = images[0].get_cmap()
    # colour index k+1 is state k; 0 is undefined
    for k, s in enumerate(scheme.labels):
        assert to_hex(cmap(k + 1)) == to_hex(figures.state_colours(scheme)[s])
    assert to_hex(cmap(0)) == to_hex(figures.UNDEFINED_COLOUR)
    assert "4 of 6 torsions" in ax.get_title(loc="left")
    assert {h.get_label() for h in ax.get_legend().legend_handles} - {""} == set(scheme.labels)


def test_state_raster_note_says_what_was_chosen_and_thins_only_when_it_must(full_folder):
    labels = list(pd.read_csv(os.path.join(full_folder, "torsions.csv"))["torsion"])
    chosen = labels[:3]
    whole = figures.read_state_raster(full_folder, torsions=chosen, selection="the first residues")
    assert whole.rows == chosen
    assert whole.description.startswith(f"the 3 torsions of the first residues (of {len(labels)} in the folder)")
    assert "evenly spaced" not in whole.description   # nothing was left out
    thinned = figures.read_state_raster(full_folder, torsions=chosen, max_rows=2, selection="the first residues")
    assert len(thinned.rows) == 2
    assert thinned.description.startswith(f"2 of the 3 torsions of the first residues (evenly spaced in every "
                                          f"group; of {len(labels)} in the folder)")
    assert figures.read_state_raster(full_folder).description.startswith(f"all {len(labels)} torsions")


def test_state_raster_thins_thousands_of_torsions(tmp_path):
    # a synthetic states.parquet of 2000 torsions, read in chunks (in the layout of earlier
    # versions, one column per torsion, which the reader still reads)
    import json

    import pyarrow as pa
    import pyarrow.parquet as pq

    n_frames, n_tors = 500, 2000
    rng = np.random.default_rng(0)
    codes = rng.integers(0, 3, size=(n_frames, n_tors)).astype(np.int8)
    labels = [f"T{k}" for k in range(n_tors)]
    table = pa.table({"replica": np.zeros(n_frames, np.int64), "frame": np.arange(n_frames),
                      "time_ps": np.arange(n_frames, dtype=float),
                      **{lab: codes[:, k] for k, lab in enumerate(labels)}})
    pq.write_table(table, tmp_path / "states.parquet", row_group_size=100)
    pd.DataFrame({"torsion": labels, "type": ["a"] * 1000 + ["b"] * 1000}).to_csv(tmp_path / "torsions.csv",
                                                                                 index=False)
    (tmp_path / "summary.json").write_text(json.dumps({
        "scheme": get_scheme("anti-gauche").to_dict(),
        "replicas": [{"frames_analysed": n_frames, "time_between_analysed_frames_ps": 2.0, "time_step_known": True}]}))
    raster = figures.read_state_raster(str(tmp_path), max_rows=200, max_columns=100)
    assert raster.codes.shape == (200, 100)
    assert raster.rows[0] == "T0" and raster.rows[-1] == "T1999"
    assert raster.row_types.count("a") == raster.row_types.count("b") == 100
    ax = figures.plot_state_raster(raster, get_scheme("anti-gauche"), ax=new_ax())
    assert "200 of 2000 torsions" in ax.get_title(loc="left")
    assert [t.get_text() for t in ax.get_yticklabels()] == ["a", "b"]  # type names, not 200 labels
    assert ax.get_xlim()[1] == pytest.approx(1000.0)  # 500 frames of 2 ps


# ------------------------------------------------------------------------------------------------
# 3. profile
# ------------------------------------------------------------------------------------------------
def profile_table(unit="kj_mol"):
    x = np.arange(-177.5, 180, 5.0)
    f = 2.0 * (1 + np.cos(np.radians(3 * x)))
    sampled = np.ones_like(x, dtype=bool)
    sampled[(x > -10) & (x < 10)] = False  # one unsampled run of 4 bins around 0
    sampled[x > 170] = False  # and one at the edge
    return pd.DataFrame({"type": "T", "torsion": "", "estimate": "histogram", "angle_deg": x,
                         f"free_energy_{unit}": np.where(sampled, f, np.nan),
                         f"free_energy_err_{unit}": np.where(sampled, 0.1, np.nan), "sampled": sampled})


def test_profile_marks_unsampled_runs_shades_sectors_and_overlays_the_scan():
    scheme = get_scheme("anti-gauche")
    prof = profile_table()
    scan = pd.DataFrame({"type": "T", "angle_deg": prof["angle_deg"],
                         "scan_free_energy_kj_mol": 2.0 * (1 + np.cos(np.radians(3 * prof["angle_deg"])))})
    ax = figures.plot_profile(prof, scheme, "T", scan=scan, ax=new_ax())
    hatched = [p for p in ax.patches if p.get_hatch()]
    assert len(hatched) == 2  # the two unsampled runs
    spans = sorted(p.get_x() for p in hatched)
    assert spans[0] == pytest.approx(-10.0) and spans[1] == pytest.approx(170.0)
    sectors = [p for p in ax.patches if not p.get_hatch()]
    assert len(sectors) == 4
    lines = ax.get_lines()
    assert len(lines) == 2  # sampled profile and scan
    np.testing.assert_allclose(lines[1].get_ydata(), scan["scan_free_energy_kj_mol"])
    assert len([c for c in ax.collections if isinstance(c, PolyCollection)]) == 1  # the error band
    assert ax.get_ylabel() == r"$\mathit{F}$ / kJ mol$^{-1}$"
    assert {t.get_text() for t in ax.get_legend().get_texts()} - {""} == {"sampled", "± 1 s.e.", "scan (aligned)",
                                                                         "unsampled"}
    # no free energy is drawn in unsampled bins
    y = lines[0].get_ydata()
    assert np.isnan(np.asarray(y, dtype=float)[~prof["sampled"].to_numpy()]).all()


def test_profile_in_kt_converts_the_scan_with_the_temperature():
    from dihedra.units import kt_kj_mol

    prof = profile_table("kt")
    scan = pd.DataFrame({"type": "T", "angle_deg": [0.0, 90.0], "scan_free_energy_kj_mol": [0.0, 5.0]})
    ax = figures.plot_profile(prof, get_scheme("anti-gauche"), "T", scan=scan, temperature_k=300.0, ax=new_ax())
    assert ax.get_ylabel().endswith(r"$k_\mathrm{B}T$")
    # units.py converts; R T at 300 K = 2.494 kJ/mol (CODATA 2018)
    assert ax.get_lines()[1].get_ydata()[1] == pytest.approx(5.0 / kt_kj_mol(300.0))
    assert kt_kj_mol(300.0) == pytest.approx(2.4943, abs=1e-4)


def test_a_profile_without_errors_draws_no_band_and_says_so():
    # a single frame leaves every error empty (nothing to resample): no band is drawn, and the legend
    # says there is none instead of promising "± 1 s.e." (common practice: no error bar without an error)
    prof = profile_table()
    prof["free_energy_err_kj_mol"] = np.nan
    ax = figures.plot_profile(prof, get_scheme("anti-gauche"), "T", ax=new_ax())
    assert not [c for c in ax.collections if isinstance(c, PolyCollection)]
    legend = {t.get_text() for t in ax.get_legend().get_texts()} - {""}
    assert legend == {"sampled", "no error band: one frame", "unsampled"}
    assert not figures.profiles.has_profile_errors(prof, "T") and figures.profiles.has_profile_errors(profile_table(),
                                                                                                      "T")


def test_profile_of_an_unknown_name_is_a_clear_error():
    with pytest.raises(DihedraError, match="no histogram profile of 'X'"):
        figures.plot_profile(profile_table(), get_scheme("anti-gauche"), "X", ax=new_ax())


# ------------------------------------------------------------------------------------------------
# 4. populations
# ------------------------------------------------------------------------------------------------
def test_population_bars_heights_colours_and_sources():
    scheme = get_scheme("anti-gauche")
    pops = pd.DataFrame({"type": ["A"] * 3 + ["B"] * 3, "state": list(scheme.labels) * 2,
                         "population": [0.6, 0.2, 0.2, 0.5, 0.3, 0.2], "population_err": [0.01] * 6})
    comparison = pd.DataFrame({"type": ["A"], "predicted_population_anti": [0.55],
                               "predicted_population_gauche+": [0.25], "predicted_population_gauche-": [0.2],
                               "population_anti": [0.6]})
    predicted, reference = figures.comparison_populations(comparison)
    assert len(predicted) == 3 and len(reference) == 0
    ax = figures.plot_populations(pops, scheme, predicted=predicted, ax=new_ax())
    bars = [p for p in ax.patches if isinstance(p, Rectangle)]
    assert len(bars) == 6 + 3  # six sampled, three predicted (type A only)
    filled = [b for b in bars if not b.get_hatch()]
    hatched = [b for b in bars if b.get_hatch()]
    assert sorted(round(b.get_height(), 6) for b in filled) == sorted(pops["population"])
    assert sorted(round(b.get_height(), 6) for b in hatched) == [0.2, 0.25, 0.55]
    colours = figures.state_colours(scheme)
    for b in filled:
        state = [s for s, p in zip(pops["state"], pops["population"]) if abs(p - b.get_height()) < 1e-9][0]
        if list(pops["population"]).count(b.get_height()) == 1:
            assert to_hex(b.get_facecolor()) == to_hex(colours[state])
    assert [t.get_text() for t in ax.get_xticklabels()] == list(scheme.labels) * 2
    assert ax.get_ylim() == (0, 1)
    # error bars: one per sampled bar
    assert len(ax.containers) - len([c for c in ax.containers if hasattr(c, "patches")]) == 6
    assert {t.get_text() for t in ax.get_legend().get_texts()} - {""} == {"sampled", "predicted from the scan"}


#: Residue types whose chi1 a review drew as one unreadable population figure (17 types).
CHI1_TYPES = [f"{r}:chi1" for r in "ARG ASN ASP CYS GLN GLU HIS ILE LEU LYS MET PHE PRO SER THR TYR VAL".split()]


def many_type_populations(types, seed=4):
    scheme = get_scheme("anti-gauche")
    rng = np.random.default_rng(seed)
    p = rng.dirichlet(np.ones(3), size=len(types))
    return scheme, pd.DataFrame({"type": np.repeat(types, 3), "state": list(scheme.labels) * len(types),
                                 "population": p.ravel(), "population_err": 0.05 * np.ones(p.size)})


@pytest.mark.parametrize("types", [CHI1_TYPES, [f"MOL{k}:C1-C2-C3-C4" for k in range(40)]],
                         ids=["17 chi1 types", "40 long names"])
def test_population_figure_of_many_types_keeps_every_name_apart(types):
    import matplotlib.pyplot as plt

    scheme, pops = many_type_populations(types)
    with figures.style():
        ax = figures.plot_populations(pops, scheme)   # a figure of its own: it grows with the types
        fig = ax.figure
        try:
            boxes = _assert_laid_out(fig, f"{len(types)} types")
            drawn = {t.replace("\n", "") for t, _ in boxes}
            assert set(types) <= drawn   # every type named, whole
            assert fig.get_figwidth() == pytest.approx(figures.SINGLE_COLUMN_IN)
            assert fig.get_figheight() > 2.4 + 0.05 * len(types)
            # the bars still show the populations, one per type and state in the state colour
            bars = [b for b in ax.patches if isinstance(b, Rectangle)]
            lengths = sorted(round(b.get_width(), 9) for b in bars)
            np.testing.assert_allclose(lengths, np.sort(pops["population"].to_numpy()), atol=1e-9)
            colours = figures.state_colours(scheme)
            assert {to_hex(b.get_facecolor()) for b in bars} == {to_hex(c) for c in colours.values()}
            assert {t.get_text() for t in ax.get_legend().get_texts()} == set(scheme.labels)
        finally:
            plt.close(fig)
        # at the double width too, and with the scan's prediction beside every sampled bar
        fig = Figure(figsize=(figures.DOUBLE_COLUMN_IN, 2.3), layout="constrained")
        figures.plot_populations(pops, scheme, predicted=pops.assign(population_err=np.nan), ax=fig.add_subplot(),
                                 grow=True)
        _assert_laid_out(fig, f"{len(types)} types, double width")


def test_ramachandran_regions_bars_per_residue_type():
    from dihedra.presentation.figures.ramachandran import REGION_COLOURS, plot_ramachandran_regions

    regions = ["alpha-R", "beta", "PPII", "alpha-L", "other"]
    table = pd.DataFrame({"type": np.repeat(["ALA", "GLY", "PRO"], 5), "region": regions * 3,
                          "population": [0.7, 0.1, 0.2, 0.0, 0.0, 0.3, 0.05, 0.05, 0.5, 0.1, 0.3, 0.0, 0.7, 0.0, 0.0],
                          "population_err": [0.05] * 15})
    ax = plot_ramachandran_regions(table, ax=new_ax())
    bars = [b for b in ax.patches if isinstance(b, Rectangle)]
    seen = table[table["population"] > 0]
    assert len(bars) == len(seen) == 10   # a region a type never visited has no bar
    # three types fit side by side: upright bars, the types named under their groups
    np.testing.assert_allclose([b.get_height() for b in bars], seen["population"])   # in table order
    assert [to_hex(b.get_facecolor()) for b in bars] == [to_hex(REGION_COLOURS[r]) for r in seen["region"]]
    assert [t.get_text() for t in ax.get_xticklabels()] == list(seen["region"])
    assert [t.get_text() for a in ax.child_axes for t in a.get_xticklabels()] == ["ALA", "GLY", "PRO"]
    # the five regions keep apart, also from the grey of undefined frames
    assert len({to_hex(c) for c in REGION_COLOURS.values()} | {to_hex(figures.UNDEFINED_COLOUR)}) == 6


# ------------------------------------------------------------------------------------------------
# 5. 2-D map
# ------------------------------------------------------------------------------------------------
def test_free_energy_map_is_periodic_with_contours_in_kj_per_mol():
    c = np.arange(-175.0, 180, 10.0)
    ga, gb = np.meshgrid(c, c, indexing="ij")
    f = 3.0 * (2 - np.cos(np.radians(ga)) - np.cos(np.radians(gb)))
    sampled = f < 10.0
    table = pd.DataFrame({"torsion_a": "a", "torsion_b": "b", "angle_a_deg": ga.ravel(), "angle_b_deg": gb.ravel(),
                          "free_energy_kj_mol": np.where(sampled, f, np.nan).ravel(), "sampled": sampled.ravel()})
    ax = figures.plot_free_energy_map(table, ax=new_ax(height=3.0), level_step=2.0)
    mesh = [m for m in ax.collections if isinstance(m, QuadMesh)][0]
    arr = mesh.get_array()
    grid = np.where(sampled, f, np.nan).T  # rows: angle_b
    np.testing.assert_allclose(np.ma.filled(arr, np.nan).reshape(grid.shape), grid)
    assert arr.mask.sum() == (~sampled).sum()  # unsampled cells are masked, not zero
    cs = [c for c in ax.collections if hasattr(c, "levels")][0]
    np.testing.assert_allclose(cs.levels, np.arange(2.0, 10.0, 2.0))
    assert ax.get_xlim() == (-180, 180) and ax.get_ylim() == (-180, 180)
    # two generic torsions: numbered symbols, named in the note
    assert ax.get_xlabel() == r"$\varphi_1$ / deg" and ax.get_ylabel() == r"$\varphi_2$ / deg"
    assert r"$\varphi_1$: a; $\varphi_2$: b" in ax.get_title(loc="left")
    cbar_ax = [a for a in ax.figure.axes if a is not ax][0]
    assert cbar_ax.get_ylabel() == r"$\mathit{F}$ / kJ mol$^{-1}$"
    # a closed contour around the minimum at (180, 180) reaches across the periodic edge: the padded
    # grid repeats the opposite edge (np.pad wrap is the reference)
    assert "every 2 kJ/mol" in ax.get_title(loc="left")


def relative_luminance(rgb):
    """WCAG 2 relative luminance of an sRGB colour (W3C, Web Content Accessibility Guidelines 2.0)."""
    r, g, b = linear(np.asarray(rgb)[:3])
    return 0.2126 * r + 0.7152 * g + 0.0722 * b


def test_free_energy_map_draws_the_eye_to_the_basins_below_a_stated_ceiling():
    # a Ramachandran-like map: phi and psi named, F up to 30 kJ/mol
    c = np.arange(-175.0, 180, 10.0)
    ga, gb = np.meshgrid(c, c, indexing="ij")
    f = 7.5 * (2 + np.cos(np.radians(ga + 60)) + np.cos(np.radians(gb + 45)))
    table = pd.DataFrame({"torsion_a": "ALA:phi", "torsion_b": "ALA:psi", "angle_a_deg": ga.ravel(),
                          "angle_b_deg": gb.ravel(), "free_energy_kj_mol": f.ravel(), "sampled": True})
    ax = figures.plot_free_energy_map(table, ax=new_ax(height=3.0))
    mesh = [m for m in ax.collections if isinstance(m, QuadMesh)][0]
    # the scale is capped at the ceiling (15 kJ/mol = 6 kT at 300 K), said on the figure
    assert mesh.norm.vmax == pytest.approx(figures.MAP_CEILING_KJ_MOL) and f.max() > 25
    assert "colours up to 15 kJ/mol above the minimum" in ax.get_title(loc="left")
    # the basins are the darkest: luminance rises monotonically with the free energy
    lum = [relative_luminance(mesh.cmap(x)) for x in np.linspace(0, 1, 11)]
    assert all(b > a for a, b in zip(lum, lum[1:])) and lum[0] < 0.1 and lum[-1] > 0.7
    assert mesh.cmap.get_over()[:3] == pytest.approx(mesh.cmap(1.0)[:3])  # above the ceiling: the top colour
    assert ax.get_xlabel() == r"$\varphi$ (ALA) / deg" and ax.get_ylabel() == r"$\psi$ (ALA) / deg"


# ------------------------------------------------------------------------------------------------
# 6. transition diagram and 7. lifetimes
# ------------------------------------------------------------------------------------------------
def kinetics_tables():
    lifetimes = pd.DataFrame({"level": "type", "name": "T", "type": "T", "state": ["anti", "gauche+", "gauche-"],
                              "mean_ps": [40.0, 12.0, 11.0], "median_ps": [28.0, 8.0, 7.5],
                              "ci_low_ps": [35.0, 10.0, 9.0],
                              "ci_high_ps": [45.0, 14.0, 13.0], "mean_from_rates_ps": [40.0, 12.5, 11.0],
                              "population_counted": [0.6, 0.25, 0.15]})
    transitions = pd.DataFrame({"level": "type", "name": "T", "from_state": ["anti", "anti", "gauche+", "gauche-",
                                                                                 "gauche+", "gauche-"],
                                "to_state": ["gauche+", "gauche-", "anti", "anti", "gauche-", "gauche+"],
                                "count": [30, 20, 31, 19, 0, 2],
                                "rate_per_ps": [0.0125, 0.0125, 0.05, 0.08, 0.0, 0.001],
                                "rate_err_per_ps": [0.0023, 0.0028, 0.009, 0.018, 0.0, 0.0007],
                                "rate_ci_high_per_ps": [0.018, 0.019, 0.07, 0.12, 0.0126, 0.0036]})
    return transitions, lifetimes


def test_transition_diagram_arrows_by_count_labels_with_direction_and_upper_limits():
    scheme = get_scheme("anti-gauche")
    transitions, lifetimes = kinetics_tables()
    fig = Figure(figsize=(3.35, 3.4), layout="constrained")
    ax = figures.plot_transition_diagram(transitions, lifetimes, "T", scheme=scheme, ax=fig.add_subplot())
    nodes = [p for p in ax.patches if isinstance(p, Circle)]
    arrows = [p for p in ax.patches if isinstance(p, FancyArrowPatch)]
    assert len(nodes) == 3
    assert len(arrows) == 5  # the pair with zero count is not drawn
    # node area grows with population; colours are the state colours
    radius = {to_hex(n.get_facecolor()): n.get_radius() for n in nodes}
    colours = figures.state_colours(scheme)
    assert radius[to_hex(colours["anti"])] > radius[to_hex(colours["gauche+"])] > radius[to_hex(colours["gauche-"])]
    # arrow width grows with the number of transitions, not the rate: the widest is gauche+ -> anti
    # (31 transitions), not gauche- -> anti (the largest rate, 0.08 per ps); a single event is thin
    observed = transitions[transitions["count"] > 0]
    widths = [a.get_linewidth() for a in arrows]
    np.testing.assert_allclose(widths, 0.5 + 2.6 * observed["count"].to_numpy() / 31)
    # every arrow label names its count and points the way its arrow goes (the sign turns with the text)
    labels = [t for t in ax.texts if "\u2192" in t.get_text() or "\u2190" in t.get_text()]
    assert sorted(int(t.get_text().strip("\u2192\u2190 ")) for t in labels) == sorted(observed["count"])
    for t, arrow, row in zip(labels, arrows, observed.itertuples()):
        (x0, y0), (x1, y1) = arrow._posA_posB
        along = np.array([np.cos(np.radians(t.get_rotation())), np.sin(np.radians(t.get_rotation()))])
        sign = 1.0 if "\u2192" in t.get_text() else -1.0
        assert sign * along @ np.array([x1 - x0, y1 - y0]) > 0, (row.from_state, row.to_state, t.get_text())
    # the table below: direction, count and the rate per ns rounded to its error; no event: the upper limit
    table = [t.get_text() for a in fig.axes if a is not ax for t in a.texts]
    assert "gauche- \u2192 anti" in table and "80 ± 18" in table  # 0.080 +- 0.018 per ps
    assert "gauche+ \u2192 gauche-" in table and "< 13 (95 %)" in table  # 0.0126 per ps, no event
    assert "0.0000" not in " ".join(table) and "0 ± 0" not in table
    flux = figures.plot_transition_diagram(transitions, lifetimes, "T", weight="flux", scheme=scheme, ax=new_ax(),
                                           table=False)
    assert any("flux" in t.get_text() for t in flux.texts)
    with pytest.raises(DihedraError, match="arrow weight"):
        figures.plot_transition_diagram(transitions, lifetimes, "T", weight="rate", ax=new_ax(), table=False)


def two_state_kinetics():
    """A torsion that stayed in its state in every residue (a protein's omega, 98 frames): no transition."""
    lifetimes = pd.DataFrame({"level": "type", "name": "PHE:omega", "type": "PHE:omega", "state": ["trans", "cis"],
                              "mean_ps": [98.0, 98.0], "median_ps": [98.0, 98.0], "ci_low_ps": np.nan,
                              "ci_high_ps": np.nan, "mean_from_rates_ps": np.nan, "population_counted": [0.8, 0.2]})
    transitions = pd.DataFrame({"level": "type", "name": "PHE:omega", "from_state": ["trans", "cis"],
                                "to_state": ["cis", "trans"], "count": [0, 0], "rate_per_ps": [0.0, 0.0],
                                "rate_err_per_ps": [0.0, 0.0], "rate_ci_high_per_ps": [0.0095, 0.038]})
    return transitions, lifetimes, "PHE:omega", get_scheme("cis-trans")


@pytest.mark.parametrize("case", ["two states", "three states"])
@pytest.mark.parametrize("width", ["single", "double"])
def test_transition_note_stands_above_the_node_labels(case, width):
    if case == "two states":
        transitions, lifetimes, name, scheme = two_state_kinetics()
    else:
        (transitions, lifetimes), name, scheme = kinetics_tables(), "T", get_scheme("anti-gauche")
    n_pairs = len(transitions)
    with figures.style():   # the size figure_set gives it
        fig = Figure(figsize=(figures.WIDTHS[width], 2.5 + 0.105 * min(n_pairs + 1, 10)), layout="constrained")
        ax = figures.plot_transition_diagram(transitions, lifetimes, name, scheme=scheme, ax=fig.add_subplot())
        _assert_laid_out(fig, f"transitions, {case}, {width}")
        renderer = fig.canvas.get_renderer()
        note = [t for t in ax.texts if t.get_text().startswith(f"{name}. Arrows")]
        labels = [t for t in ax.texts if "\n" in t.get_text() and t not in note]
        assert len(note) == 1 and len(labels) == len(lifetimes)
        top = max(t.get_window_extent(renderer).y1 for t in labels + [ax.patch])
        assert note[0].get_window_extent(renderer).y0 >= top - 0.5   # above the drawing, covering none of it
        # the note spans the width of the figure, not only that of the (narrow) drawing
        assert note[0].get_window_extent(renderer).width > 0.5 * fig.bbox.width


def test_lifetimes_exponential_from_the_rates_and_observed_markers():
    transitions, lifetimes = kinetics_tables()
    ax = figures.plot_lifetimes(lifetimes, "T", scheme=get_scheme("anti-gauche"), ax=new_ax())
    assert ax.get_yscale() == "log"
    dashed = [ln for ln in ax.get_lines()
              if ln.get_linestyle() not in ("-", "None", "none") and len(ln.get_xdata()) > 2]
    assert len(dashed) == 3
    for ln, tau in zip(dashed, lifetimes["mean_from_rates_ps"]):
        t = np.asarray(ln.get_xdata())
        np.testing.assert_allclose(ln.get_ydata(), np.exp(-t / tau))  # analytic
    # observed medians at S = 1/2, means at S = 1/e (where an exponential has them)
    medians = [ln for ln in ax.get_lines() if ln.get_marker() == "s"]
    assert sorted(float(ln.get_xdata()[0]) for ln in medians) == sorted(lifetimes["median_ps"])
    assert all(float(ln.get_ydata()[0]) == 0.5 for ln in medians)
    assert "dwell time" in ax.get_xlabel() and ax.get_xlabel().endswith("/ ps")


def test_lifetimes_draw_the_survival_table_of_the_kinetics():
    # the steps are the Kaplan-Meier table's points (the figure draws, the kinetics computes)
    transitions, lifetimes = kinetics_tables()
    survival = pd.DataFrame({"level": "type", "name": "T", "type": "T", "state": "anti",
                             "time_ps": [1.0, 2.0, 3.0, 5.0], "survival": [0.8, 0.8, 0.8 / 3, 0.0],
                             "n_at_risk": [5, 4, 3, 1]})
    ax = figures.plot_lifetimes(lifetimes, "T", scheme=get_scheme("anti-gauche"), survival=survival, ax=new_ax())
    steps = [ln for ln in ax.get_lines() if ln.get_drawstyle() == "steps-post"]
    assert len(steps) == 1
    np.testing.assert_allclose(steps[0].get_xdata(), [0.0, 1.0, 2.0, 3.0])   # S > 0 only
    np.testing.assert_allclose(steps[0].get_ydata(), [1.0, 0.8, 0.8, 0.8 / 3])


def test_lifetimes_time_axis_follows_the_data_and_the_legend_covers_nothing():
    # a 98 ps run: one state left a few times (fitted lifetime 740 ps from the rates), one never left
    lifetimes = pd.DataFrame({"level": "type", "name": "T", "type": "T", "state": ["anti", "gauche+"],
                              "mean_ps": [np.nan, np.nan], "median_ps": [np.nan, np.nan],
                              "ci_low_ps": [np.nan, np.nan], "ci_high_ps": [np.nan, np.nan],
                              "mean_from_rates_ps": [740.0, np.nan], "population_counted": [0.7, 0.3]})
    survival = pd.DataFrame({"level": "type", "name": "T", "type": "T", "state": ["anti"] * 3 + ["gauche+"],
                             "time_ps": [10.0, 40.0, 98.0, 98.0], "survival": [0.9, 0.8, 0.8, 1.0],
                             "n_at_risk": [10, 9, 8, 3]})
    fig = Figure(figsize=(3.35, 2.5), layout="constrained")
    ax = figures.plot_lifetimes(lifetimes, "T", scheme=get_scheme("anti-gauche"), survival=survival,
                                ax=fig.add_subplot())
    assert ax.get_xlim()[1] == pytest.approx(98.0 * 1.05)  # the data, not 3 x 740 ps
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    legend = ax.get_legend().get_window_extent(canvas.get_renderer())
    assert legend.y0 >= ax.get_window_extent(canvas.get_renderer()).y1 - 1  # above the axes, over no curve
    assert "gauche+ (never left)" in [t.get_text() for t in ax.get_legend().get_texts()]


# ------------------------------------------------------------------------------------------------
# 8. convergence and 9. couplings
# ------------------------------------------------------------------------------------------------
def test_convergence_ends_at_the_per_replica_populations(full_folder):
    res = load_results(full_folder)
    name = "BUT1:C1-C2-C3-C4"
    ax = figures.plot_convergence(res, name, ax=new_ax())
    lines = [ln for ln in ax.get_lines() if len(ln.get_xdata()) > 2]
    assert len(lines) == 2 * 3  # replicas x states
    by_rep = res.populations_by_replica
    colours = figures.state_colours(res.scheme)
    for j, rep in enumerate((0, 1)):
        for k, s in enumerate(res.scheme.labels):
            ln = lines[3 * j + k]
            assert to_hex(ln.get_color()) == to_hex(colours[s])
            expected = by_rep[(by_rep["replica"] == rep) & (by_rep["torsion"] == name) & (by_rep["state"] == s)]
            # the running population at the end of the replica is the replica's population (track's table)
            assert ln.get_ydata()[-1] == pytest.approx(float(expected["population"].iloc[0]), abs=5e-6)  # CSV: 6 digits
            assert ln.get_xdata()[-1] == pytest.approx(300.0)  # 300 frames of 1 ps
    assert ax.get_ylabel() == "running population" and ax.get_xlabel().endswith("/ ps")


def test_couplings_identity_line_error_bars_and_outliers(full_folder):
    table = pd.read_csv(os.path.join(full_folder, "couplings_karplus-1959_vs_experiment.csv"))
    ax = figures.plot_couplings(table, ax=new_ax(height=3.0))
    identity = ax.get_lines()[0]
    np.testing.assert_allclose(identity.get_xdata(), identity.get_ydata())
    points = [ln for ln in ax.get_lines() if ln.get_marker() in figures.RELATION_MARKERS]
    xs = np.concatenate([ln.get_xdata() for ln in points])
    assert sorted(xs) == sorted(table["j_exp_hz"])
    outliers = [ln for ln in points if to_hex(ln.get_color()) == to_hex(figures.OKABE_ITO["vermillion"])]
    assert sum(len(ln.get_xdata()) for ln in outliers) == int(table["outlier"].sum())
    assert ax.get_xlabel() == r"experimental $^3\mathit{J}$ / Hz" and "Hz" in ax.get_ylabel()


# ------------------------------------------------------------------------------------------------
# the figure set of a folder, files, layout
# ------------------------------------------------------------------------------------------------
def test_figure_set_skips_what_a_track_only_folder_lacks(track_only_folder):
    notes = []
    with figures.style():
        fset = figures.figure_set(track_only_folder, log=notes.append)
    kinds = [i.kind for i in fset.items]
    assert kinds == ["series", "raster", "populations", "convergence"]
    assert any(s.startswith("free-energy profiles: no profiles.csv") for s in fset.skipped)
    assert any("dihedra kinetics" in s for s in fset.skipped)
    assert any("couplings" in s for s in fset.skipped)
    assert all(len(n.splitlines()) == 1 for n in notes)


def test_figure_set_of_a_full_folder_has_all_nine_figures(full_folder):
    with figures.style():
        fset = figures.figure_set(full_folder)
    kinds = {i.kind for i in fset.items}
    assert kinds == {"series", "raster", "profile", "populations", "map", "transitions", "lifetimes", "convergence",
                     "couplings"}
    assert fset.skipped == []


def _text_boxes(fig):
    """Window extents of the texts that layout places: titles, axis labels, drawn tick labels,
    legend texts and texts outside the data area (sector names, replica labels)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    renderer = canvas.get_renderer()
    texts = list(fig.texts)
    # secondary axes (names under groups, residue numbers) are children of their axes
    for ax in [a for parent in fig.axes for a in [parent, *parent.child_axes]]:
        if not ax.get_visible():
            continue
        texts += [ax.title, ax._left_title, ax._right_title]
        for axis in (ax.xaxis, ax.yaxis) if ax.axison else ():
            texts.append(axis.label)
            for tick in axis._update_ticks():  # only the ticks drawn within the view
                texts += [t for t in (tick.label1, tick.label2) if t.get_visible()]
        if ax.get_legend() is not None:
            texts += list(ax.get_legend().get_texts())
        texts += [t for t in ax.texts if not t.get_clip_on()]
    boxes = []
    for t in texts:
        if t.get_visible() and t.get_text().strip():
            boxes.append((t.get_text(), t.get_window_extent(renderer)))
    return boxes


@pytest.mark.parametrize("width", ["single", "double"])
def test_nothing_overlaps_or_leaves_the_figure_at_journal_widths(full_folder, width):
    with figures.style():
        fset = figures.figure_set(full_folder, width=width)
        for item in fset.items:
            fig = item.figure
            assert fig.get_figwidth() == pytest.approx(figures.WIDTHS[width] if item.kind not in ("couplings", "map")
                                                       else figures.SINGLE_COLUMN_IN)
            _assert_laid_out(fig, f"{item.name} ({width})")


def _assert_laid_out(fig, name):
    """No text of ``fig`` leaves the figure or overlaps another; returns the texts and their boxes."""
    boxes = _text_boxes(fig)
    bbox = fig.bbox
    for text, b in boxes:
        assert b.x0 >= bbox.x0 - 1 and b.x1 <= bbox.x1 + 1 and b.y0 >= bbox.y0 - 1 and b.y1 <= bbox.y1 + 1, \
            (name, text, b, bbox)
    clash = _overlapping(boxes)
    assert not clash, f"{name}: {clash[0]!r} overlaps {clash[1]!r}"
    return boxes


def _overlapping(boxes):
    for (ta, a), (tb, b) in itertools.combinations(boxes, 2):
        inter = a.intersection(a, b)
        if inter is not None and inter.width > 1.0 and inter.height > 1.0:
            return ta, tb
    return None


def test_the_overlap_check_finds_overlapping_text():
    # the check above must be able to fail: a note written over a legend row is caught
    ax = new_ax()
    ax.plot([0, 1], [0, 1], label="a long legend entry")
    ax.legend(loc="lower left", bbox_to_anchor=(0.0, 1.0))
    ax.set_title("a note placed over the legend", loc="left", pad=2)
    assert _overlapping(_text_boxes(ax.figure)) is not None


@pytest.mark.slow
def test_write_figures_pdf_with_truetype_fonts_and_300_dpi_png(full_folder, tmp_path):
    from PIL import Image

    paths, skipped = figures.write_figures(full_folder, formats="pdf,png,svg", out_dir=str(tmp_path))
    assert skipped == []
    names = {os.path.splitext(os.path.basename(p))[0] for p in paths}
    assert {"angle_series", "state_raster", "populations", "couplings"} <= names
    for p in paths:
        if p.endswith(".pdf"):
            data = open(p, "rb").read()
            assert b"/FontFile2" in data  # embedded TrueType (pdf.fonttype 42)
            assert b"/Subtype /Type3" not in data
        elif p.endswith(".png"):
            im = Image.open(p)
            assert tuple(round(x) for x in im.info["dpi"]) == (300, 300)
            if os.path.basename(p).startswith("profile_"):
                assert im.size[0] == round(figures.SINGLE_COLUMN_IN * 300)  # the width is not trimmed
        else:
            assert "<svg" in open(p).read(2000)
    with pytest.raises(DihedraError, match="figure format must be one of"):
        figures.write_figures(full_folder, formats="pdf,jpeg", out_dir=str(tmp_path))


def test_figures_command(full_folder, tmp_path, capsys):
    import shutil

    from dihedra.cli import main

    folder = str(tmp_path / "copy")
    shutil.copytree(full_folder, folder)
    # --types takes types and single torsions (a torsion label: its own angle series)
    assert main(["figures", folder, "--format", "png", "--width", "double", "--types", "BUT:C1-C2-C3-C4",
                 "--types", "BUT3:C1-C2-C3-C4"]) == 0
    out = capsys.readouterr().out.split()
    assert all(p.startswith(os.path.join(folder, "figures")) and p.endswith(".png") for p in out)
    assert os.path.join(folder, "figures", "profile_BUT_C1-C2-C3-C4.png") in out
    assert main(["figures", folder, "--types", "NOPE", "--overwrite"]) == 2
    assert "no torsion type 'NOPE'" in capsys.readouterr().err
    # the figures of an earlier run are replaced only with --overwrite
    assert main(["figures", folder, "--format", "png"]) == 2
    assert "--overwrite" in capsys.readouterr().err
    assert main(["figures", folder, "--format", "png", "--overwrite"]) == 0
    # with a torsion label the angle series shows that torsion
    with figures.style():
        fset = figures.figure_set(folder, types=["BUT3:C1-C2-C3-C4"])
    series = [i for i in fset.items if i.kind == "series"][0]
    assert "BUT3:C1-C2-C3-C4" in series.figure.axes[0].get_title(loc="left")


def test_population_figure_of_a_folder_shows_sampled_scan_and_reference_values(full_folder):
    comparison = pd.read_csv(os.path.join(full_folder, "comparison.csv"))
    predicted, reference = figures.comparison_populations(comparison)
    # the reference file (figure_data.py) gives anti 0.40 +- 0.03 and gauche+ 0.30 +- 0.03, plus a sum of
    # states that is not one state of the scheme (drawn nowhere: a bar is one state)
    assert set(reference["state"]) == {"anti", "gauche+", "gauche+|gauche-"}
    res = load_results(full_folder)
    ax = figures.plot_populations(res.populations_by_type, res.scheme, predicted=predicted, experiment=reference,
                                ax=new_ax())
    dotted = [b for b in ax.patches if isinstance(b, Rectangle) and b.get_hatch() == "...."]
    assert sorted(round(b.get_height(), 6) for b in dotted) == [0.3, 0.4]
    hatched = [b for b in ax.patches if isinstance(b, Rectangle) and b.get_hatch() == "//////"]
    assert len(hatched) == 3
    assert {t.get_text() for t in ax.get_legend().get_texts()} - {""} == {
        "sampled", "predicted from the scan", "experiment / reference"}


def test_a_folder_of_umbrella_windows_gets_no_convergence_figure(track_only_folder, tmp_path):  # noqa: F811
    import json
    import shutil

    folder = str(tmp_path / "windows")
    shutil.copytree(track_only_folder, folder)
    path = os.path.join(folder, "summary.json")
    summary = json.load(open(path))
    summary["kind"] = "umbrella windows (MBAR-weighted)"
    for rep in summary["replicas"]:
        rep["time_between_analysed_frames_ps"] = 0.0  # windows may store no time
    json.dump(summary, open(path, "w"))
    with figures.style():
        fset = figures.figure_set(folder)
    assert "convergence" not in [i.kind for i in fset.items]
    assert any(s.startswith("convergence: a folder of umbrella windows") for s in fset.skipped)
    series = [i for i in fset.items if i.kind == "series"][0].figure
    ax = series.axes[-1]
    assert ax.get_xlabel() == "frame"  # a zero time step is no time step: frames instead
    xs = np.concatenate([ln.get_xdata() for ln in ax.get_lines() if ln.get_marker() == "o"])
    assert xs.max() > 100  # drawn against frame numbers, not all at t = 0


def test_thin_raster_groups_share_one_label():
    # groups a few rows high among hundreds (a protein's chi4 and chi5) get one joint label at
    # the centre of their rows instead of labels drawn over each other
    from dihedra.presentation.figures.raster import _joined_labels

    ax = new_ax()
    runs = [("phi", 0, 499), ("chi4", 500, 502), ("chi5", 503, 504)]
    ticks, labels = _joined_labels(ax, runs, ["φ", "χ4", "χ5"], n_rows=505)
    assert labels == ["φ", "χ4, χ5"]
    assert ticks == [249.5, 502.0]
    wide = [("phi", 0, 9), ("psi", 10, 19)]  # groups high enough keep their own labels
    assert _joined_labels(ax, wide, ["φ", "ψ"], n_rows=20) == ([4.5, 14.5], ["φ", "ψ"])


def test_a_single_structure_gets_no_time_figures_and_no_error_band(tmp_path):
    # one frame per replica (a PDB file): nothing to draw against time, no transition and no dwell time
    # (kinetics refuses such a folder), no error band: skipped with a note, or drawn and labelled so
    from conftest import chain_coordinates, write_system

    import dihedra

    top, traj = write_system(str(tmp_path), chain_coordinates(np.array([[180.0, 178.0, 62.0, -65.0]])), stem="one")
    out = str(tmp_path / "one")
    dihedra.track(top, [traj], torsions="rotatable", scheme="anti-gauche", temperature_k=300.0, out=out)
    dihedra.free_energy_profiles(dihedra.load_results(out)).save(out)
    with figures.style():
        fset = figures.figure_set(out)
    kinds = [i.kind for i in fset.items]
    assert "convergence" not in kinds and "transitions" not in kinds and "profile" in kinds
    assert any(s.startswith("convergence: one frame per replica") for s in fset.skipped)
    assert any(s.startswith("transition diagrams and lifetimes: one frame per replica") for s in fset.skipped)
    profile = [i for i in fset.items if i.kind == "profile"][0]
    assert "without an error band" in profile.caption and "bootstrap" not in profile.caption
    # drawn anyway, the convergence figure promises no band: the final populations have no error
    ax = figures.plot_convergence(load_results(out), "BUT:C1-C2-C3-C4", ax=new_ax())
    note = " ".join(ax.get_title(loc="left").split())
    assert "thin lines: final population (no error)" in note and "± 1 s.e." not in note
