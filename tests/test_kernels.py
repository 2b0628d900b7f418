"""The compiled (numba) kernels of the trajectory pass agree with independent references:
MDAnalysis' calc_dihedrals for the angles (reference library), analytic torsions of constructed
geometries, the scheme's own assign() for the state codes at and next to every boundary,
numpy.histogram for the bins. The compiled blocking analysis gives the numbers of the NumPy
blocking code (whose analytic checks are in test_statistics.py)."""

import numpy as np
import pytest

from blocking_reference import reference_blocking
from dihedra.numerics import angles
from dihedra.selection.schemes import get_scheme

pytest.importorskip("numba")


def random_chains(n_mol, seed, side=30.0):
    """Six-site chains with random bond directions (bond 1.5 A), atoms wrapped one by one."""
    rng = np.random.default_rng(seed)
    steps = rng.normal(size=(n_mol, 6, 3))
    steps *= 1.5 / np.linalg.norm(steps, axis=-1, keepdims=True)
    xyz = steps.cumsum(axis=1) + rng.uniform(0, side, size=(n_mol, 1, 3))
    idx = (np.arange(n_mol)[:, None, None] * 6 + np.arange(3)[None, :, None] + np.arange(4)).reshape(-1, 4)
    return xyz.reshape(-1, 3), idx


@pytest.mark.parametrize("box", [None, [30.0, 30.0, 30.0, 90.0, 90.0, 90.0],
                                 [30.0, 32.0, 35.0, 70.0, 80.0, 100.0]])
def test_angles_equal_mdanalysis(box):
    from MDAnalysis.lib.distances import calc_dihedrals
    from MDAnalysis.lib.mdamath import triclinic_vectors

    xyz, idx = random_chains(3000, seed=7)
    if box is not None:   # wrap every atom into the cell on its own (molecules split)
        h = triclinic_vectors(np.asarray(box, dtype=np.float32)).astype(float)
        frac = xyz @ np.linalg.inv(h)
        xyz = (frac - np.floor(frac)) @ h
    xyz = xyz.astype(np.float32)
    # undefined torsions: collinear atoms and a NaN coordinate
    xyz[0:4] = [[1, 1, 1], [2, 1, 1], [3, 1, 1], [4, 1, 1]]
    xyz[13, 1] = np.nan
    compiled = angles.TorsionGeometry(idx)(xyz, box).copy()
    # reference library: MDAnalysis calc_dihedrals, float64, with the box
    ref = np.degrees(calc_dihedrals(*(xyz[idx[:, k]].astype(np.float64) for k in range(4)),
                                    box=None if box is None else np.asarray(box, dtype=np.float64)))
    undefined = np.isnan(compiled)
    assert np.flatnonzero(undefined).tolist() == [0, 1, 6, 7]   # collinear 0-1-2-3, NaN atom 13
    diff = (compiled[~undefined] - ref[~undefined] + 180.0) % 360.0 - 180.0
    assert np.abs(diff).max() < 1e-3
    assert (compiled[~undefined] > -180).all() and (compiled[~undefined] <= 180).all()


def test_arctangent_octants_and_signs():
    # analytic: a torsion of exactly 0, +-90 and 180 degrees, and both signs near 180
    geo = angles.TorsionGeometry([[0, 1, 2, 3]])
    for phi in (0.0, 90.0, -90.0, 180.0, 179.9, -179.9, 45.0, -135.0, 33.69, -146.31):
        p = np.radians(phi)
        xyz = np.array([[1, 0, 0], [0, 0, 0], [0, 0, 1], [np.cos(p), np.sin(p), 1]], dtype=np.float32)
        got = geo(xyz)[0]
        assert abs(((got - phi + 180) % 360) - 180) < 1e-4
        assert -180 < got <= 180


@pytest.mark.parametrize("name", ["anti-gauche", "klyne-prelog", "staggered-eclipsed", "staggered-eclipsed:5"])
def test_bin_and_count_equal_assign_at_every_boundary(name):
    from dihedra.numerics import _kernels
    from dihedra.trajectory.histograms import MIXED, bin_state_table

    scheme = get_scheme(name)
    n_bins = 360
    # every boundary, its float32 neighbours, bin edges, and random angles
    b = np.asarray(scheme.boundaries_deg, dtype=np.float32)
    edges = np.arange(-179, 181, dtype=np.float32)
    rng = np.random.default_rng(1)
    deg = np.concatenate([b, np.nextafter(b, np.float32(-200)), np.nextafter(b, np.float32(200)), edges,
                          np.nextafter(edges, np.float32(-200)), rng.uniform(-180, 180, 5000).astype(np.float32),
                          [np.nan, 180.0]]).astype(np.float32)
    deg = np.where(deg <= -180, np.float32(180), deg)
    n = len(deg)
    table = bin_state_table(scheme, n_bins)
    hist = np.zeros((1, n, n_bins), dtype=np.int32)
    counts = np.zeros((n, scheme.n_states), dtype=np.int64)
    codes = np.empty(n, dtype=np.int8)
    undefined = np.zeros(n, dtype=np.int64)
    bins = np.empty((1, n), dtype=np.uint16)
    per_state = np.zeros(scheme.n_states, dtype=np.int32)
    nb = len(scheme.boundaries_deg)
    _kernels.bin_and_code(deg, 1.0, 0.0, n_bins // 2, n_bins, table[None, :], np.zeros(n, dtype=np.int64),
                          np.asarray(scheme.boundaries_deg, dtype=float)[None, :], np.array([nb]),
                          np.asarray(scheme.start_closed, dtype=bool)[None, :],
                          np.asarray(scheme.arc_states, dtype=np.int8)[None, :],
                          MIXED, bins[0], codes, counts, 1, undefined, np.zeros(n, dtype=np.int64), per_state)
    # the frame's torsions in each state (all of one type here): the state counts summed
    np.testing.assert_array_equal(per_state, counts.sum(axis=0))
    top = np.zeros(1, dtype=np.int64)
    _kernels.add_histograms(bins, np.ones(1, dtype=np.int64), hist[0], top)
    assert top[0] == hist.max() == 1   # the largest cell written (from which the pass widens narrow counts)
    hist = hist[0]
    # the scheme's own rule, on the same float32 angles
    np.testing.assert_array_equal(codes, scheme.assign(deg.astype(np.float64)))
    assert undefined.tolist() == [0] * (n - 2) + [1, 0]
    # bins open at the left edge: numpy's left-closed bins of the negated angles, reversed
    ok = ~np.isnan(deg)
    expect = np.array([np.histogram([-x], bins=np.linspace(-180, 180, n_bins + 1))[0][::-1] for x in deg[ok]])
    np.testing.assert_array_equal(hist[ok], expect)
    np.testing.assert_array_equal(counts[ok], np.eye(scheme.n_states, dtype=np.int64)[codes[ok]])


def test_pass_in_a_triclinic_cell_equals_mdanalysis(tmp_path):
    # molecules wrapped atom by atom into a triclinic cell: the pass (frames of one batch, cell
    # parameters per frame, a second thread) gives the angles of MDAnalysis' calc_dihedrals with
    # the box (reference library), and the states the scheme assigns to them
    import MDAnalysis as mda
    from MDAnalysis.lib.distances import calc_dihedrals
    from MDAnalysis.lib.mdamath import triclinic_vectors

    from conftest import write_system
    from dihedra.tracking import track

    box = np.array([30.0, 32.0, 35.0, 70.0, 80.0, 100.0])
    h = triclinic_vectors(box.astype(np.float32)).astype(float)
    frames = []
    for seed in range(12):
        xyz, _ = random_chains(40, seed=seed)
        frac = xyz @ np.linalg.inv(h)
        frames.append((frac - np.floor(frac)) @ h)
    top, traj = write_system(str(tmp_path), np.array(frames), names=("C1", "C2", "C3", "C4", "C5", "C6"),
                             resname="HEX", box=box)
    kw = dict(torsions="rotatable", scheme="klyne-prelog", keep_angles=True, chunk_frames=5)
    compiled = track(top, [traj], threads=2, **kw)
    labels = list(compiled.torsion_set.labels)
    scheme = compiled.scheme
    np.testing.assert_array_equal(compiled.states()[labels].to_numpy(),
                                  scheme.assign(compiled.angles()[labels].to_numpy(dtype=np.float64)))
    u = mda.Universe(top, traj)
    idx = compiled.torsion_set.indices
    ref = np.array([np.degrees(calc_dihedrals(*(ts.positions[idx[:, k]] for k in range(4)), box=ts.dimensions))
                    for ts in u.trajectory])
    got = compiled.angles()[list(compiled.torsion_set.labels)].to_numpy(dtype=float)
    assert np.abs((got - ref + 180.0) % 360.0 - 180.0).max() < 1e-3


def _blocking_cases():
    rng = np.random.default_rng(7)
    counts = rng.integers(0, 50, size=(64, 300, 3)).astype(float)
    counts[5, 7] = 0          # a torsion undefined in one block
    counts[:, 9, 1] = 0       # a state never visited
    totals = counts.sum(axis=2, keepdims=True)
    holes = counts.copy()
    holes[10:30] = 0          # blocks without frames (left out)
    yield counts, totals, np.zeros(64, int), {}
    yield counts, totals, np.repeat([3, 1, 2], [20, 30, 14]), {}     # replicas, unsorted labels
    yield holes, holes.sum(axis=2, keepdims=True), np.repeat([0, 1], 32), {}
    yield counts[:5], totals[:5], np.zeros(5, int), {}               # too few blocks for a level
    yield counts[:1], totals[:1], np.zeros(1, int), {}               # one block: no error
    yield counts, totals[:, :, 0].sum(axis=1), np.zeros(64, int), {}  # one weight per block
    yield rng.random((64, 40)), rng.random((64, 40)), np.arange(64) % 3, {"min_blocks": 4}
    yield rng.integers(0, 9, size=(64, 70, 27)).astype(np.int32), None, np.zeros(64, int), {}


def test_compiled_blocking_with_weight_columns_equals_reference():
    """Columns that share weights through ``weight_columns`` (conformers of one group): the same
    numbers as the NumPy reference on the gathered weights, also where an unused weight column has
    frames in blocks that the used ones lack."""
    from dihedra.numerics.statistics import blocking_error

    rng = np.random.default_rng(8)
    counts = rng.integers(0, 9, size=(64, 40, 27)).astype(float)
    counts[:8] = 0                        # blocks without frames in every group ...
    totals = counts.sum(axis=2)
    totals[:8, 39] = 5.0                  # ... except group 39, which no column below uses
    local, code = np.nonzero((counts > 0).any(axis=0))
    keep = local < 39
    local, code = local[keep], code[keep]
    table = counts[:, local, code]
    ref = reference_blocking(table, totals[:, local], np.zeros(64, int))
    out = blocking_error(table, totals, np.zeros(64, int), weight_columns=local, short_run=False)
    for a, b in zip(ref, out):
        np.testing.assert_array_equal(a, b)
    assert np.isfinite(ref[1]).all()


@pytest.mark.parametrize("case", range(8))
def test_compiled_blocking_equals_reference(case):
    from dihedra.numerics.statistics import blocking_error

    values, weights, replica, kw = list(_blocking_cases())[case]
    if weights is None:   # conformer-like int32 counts, weights summed over the joint states
        weights = values.sum(axis=2, keepdims=True)
    ref = reference_blocking(values, weights, replica, **kw)
    out = blocking_error(values, weights, replica, short_run=False, **kw)
    for a, b in zip(ref, out):
        assert a.shape == b.shape
        # the same operations in the same order: the same bits (NaN where the reference has NaN)
        np.testing.assert_array_equal(a, b)
    assert np.isfinite(ref[1]).any() or len(values) < 2


def test_a_set_of_schemes_codes_each_torsion_by_its_own_part():
    # the pass gives every torsion the codes of its own part of a set of schemes (omega cis/trans,
    # chi rotamer wells): the same as the part's exact rule on the same float32 angles
    from dihedra.numerics import _kernels
    from dihedra.trajectory.histograms import MIXED, bin_state_tables

    scheme = get_scheme("protein")
    types = ["ALA:omega", "ALA:phi", "LYS:chi1", "PHE:chi2", "HIS:chi2", "ARG:chi5"] * 400
    rng = np.random.default_rng(2)
    deg = rng.uniform(-180, 180, len(types)).astype(np.float32)
    deg[:48] = np.repeat(np.float32([-135, -120, -90, -45, 0, 45, 90, 120]), 6)   # boundaries of the parts
    n_bins = 360
    table, args = bin_state_tables(scheme, types, n_bins)
    n = len(deg)
    counts = np.zeros((n, scheme.n_states), dtype=np.int64)
    codes = np.empty(n, dtype=np.int8)
    bins = np.empty(n, dtype=np.uint16)
    keys = {t: k for k, t in enumerate(dict.fromkeys(types))}
    type_key = np.array([keys[t] * scheme.n_states for t in types], dtype=np.int64)
    per_type = np.zeros(len(keys) * scheme.n_states, dtype=np.int32)
    _kernels.bin_and_code(deg, 1.0, 0.0, n_bins // 2, n_bins, table, *args, MIXED, bins, codes, counts, 1,
                          np.zeros(n, dtype=np.int64), type_key, per_type)
    # the torsions of each type in each state, as NumPy counts them from the codes
    expect_per_type = np.zeros_like(per_type)
    np.add.at(expect_per_type, type_key + codes, 1)
    np.testing.assert_array_equal(per_type, expect_per_type)
    expect = np.array([scheme.for_type(t).assign([float(a)])[0] for t, a in zip(types, deg)])
    np.testing.assert_array_equal(codes, expect)
    # every torsion only takes states of its own part
    for t, c in zip(types, codes):
        assert scheme.labels[c] in scheme.states_of_type(t)


def test_histogram_blocks_saved_to_files_equal_counts_per_block(tmp_path):
    """Blocks saved to the scratch folder as the frames pass them (their arrays reused, zeroed,
    for the next block) hold exactly the counts of their own frames (numpy.add.at reference),
    also for a block whose counts outgrow uint8."""
    from dihedra.numerics import _kernels
    from dihedra.trajectory.histograms import HistogramBlocks

    rng = np.random.default_rng(5)
    n_t, n_bins = 7, 36
    block = np.repeat(np.arange(3), [40, 300, 25])            # block 1: cells past 255
    bins = rng.integers(0, n_bins + 1, size=(len(block), n_t)).astype(np.uint16)   # (0: undefined)
    bins[40:340, 0] = 5                                       # one cell counted 300 times
    hb = HistogramBlocks(0, n_t, n_bins, weighted=False, spill=str(tmp_path / "h"))
    for lo in range(0, len(block), 64):                       # buffered as the pass hands them over
        hb.add(bins[lo:lo + 64], block[lo:lo + 64], np.ones(min(64, len(block) - lo)), _kernels)
    parts = hb.finish()
    assert [b for b, _, _ in parts] == [0, 1, 2]
    for b, path, most in parts:
        ref = np.zeros((n_t, n_bins), dtype=np.int64)
        sel = bins[block == b]
        t = np.broadcast_to(np.arange(n_t), sel.shape)
        ok = sel > 0
        np.add.at(ref, (t[ok], sel[ok].astype(np.int64) - 1), 1)
        got = np.load(path)
        assert np.array_equal(got, ref) and most == ref.max()
        assert got.dtype == (np.uint16 if ref.max() > 255 else np.uint8)
