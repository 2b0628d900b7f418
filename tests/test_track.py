"""The trajectory pass end to end on synthetic trajectories with known torsion distributions."""

import os

import numpy as np
import pandas as pd
import pytest
from scipy import integrate

from conftest import chain_coordinates, write_system
from dihedra.errors import DihedraError, OutputExistsError
from dihedra.io.resultsdir import load_results
from dihedra.tracking import track
from dihedra.units import kt_kj_mol

# Ryckaert & Bellemans, Faraday Discuss. Chem. Soc. 66 (1978) 95, kJ/mol (the values as commonly
# quoted, from memory; not re-checked against the paper)
RB_C = [9.28, 12.16, -13.12, -3.06, 26.24, -31.5]


def rb_kj_mol(phi_deg):
    c = np.cos(np.radians(np.asarray(phi_deg) - 180.0))  # psi = phi - 180 deg
    return sum(cn * c**n for n, cn in enumerate(RB_C))


def rb_samples(n, temperature, rng):
    """Exact inverse-CDF samples of exp(-V/kT) on a fine grid (analytic distribution)."""
    grid = np.linspace(-180, 180, 360_001)
    dens = np.exp(-rb_kj_mol(grid) / kt_kj_mol(temperature))
    cdf = np.concatenate([[0], np.cumsum((dens[1:] + dens[:-1]) / 2)])
    cdf /= cdf[-1]
    return np.interp(rng.random(n), cdf, grid)


def boltzmann_anti_fraction(temperature):
    """Boltzmann integral of the RB potential (scipy.integrate.quad), no Jacobian for a torsion."""
    kt = kt_kj_mol(temperature)
    f = lambda x: np.exp(-rb_kj_mol(x) / kt)  # noqa: E731
    total = integrate.quad(f, -180, 180, points=[-120, 0, 120], limit=200)[0]
    anti = integrate.quad(f, 120, 180)[0] + integrate.quad(f, -180, -120)[0]
    return anti / total


def test_iid_rb_samples_recover_boltzmann_populations_within_three_se(tmp_path):
    # analytic: populations of exp(-V_RB/kT) at 298.15 K; independent samples, 120 molecules x 250 frames
    rng = np.random.default_rng(11)
    t = rb_samples(120 * 250, 298.15, rng).reshape(250, 120)
    top, traj = write_system(str(tmp_path), chain_coordinates(t), box=[60, 60, 60, 90, 90, 90])
    res = track(top, [traj], torsions="0,1,2,3", scheme="anti-gauche")
    res_all = track(top, [traj], torsions=[f"{4*m},{4*m+1},{4*m+2},{4*m+3}" for m in range(120)],
                    scheme="anti-gauche")
    row = res_all.populations_by_type.set_index("state").loc["anti"]
    expected = boltzmann_anti_fraction(298.15)
    assert abs(row["population"] - expected) < 3 * row["population_err"]
    # for independent samples the error is the binomial one, sqrt(p(1-p)/N) (analytic), within 30 %
    assert row["population_err"] == pytest.approx(np.sqrt(expected * (1 - expected) / t.size), rel=0.3)
    assert row["n_torsions"] == 120
    assert len(res.populations) == 3


def test_split_across_the_box_gives_the_same_states(tmp_path):
    # common practice (minimum-image convention): a molecule split across the periodic boundary
    # gives the same torsion
    rng = np.random.default_rng(2)
    t = rng.uniform(-180, 180, size=(40, 27))
    coords = chain_coordinates(t, spacing=6.0)
    box = np.array([18.0, 18.0, 18.0, 90, 90, 90])
    wrapped = coords - np.floor(coords / box[:3]) * box[:3]  # wrap every atom into the box
    assert np.any(np.abs(np.diff(wrapped.reshape(40, 27, 4, 3), axis=2)) > 9)  # some are split
    d1, d2 = tmp_path / "whole", tmp_path / "split"
    d1.mkdir(), d2.mkdir()
    whole = write_system(str(d1), coords, box=box)
    split = write_system(str(d2), wrapped, box=box)
    spec = [f"{4*m},{4*m+1},{4*m+2},{4*m+3}" for m in range(27)]
    a = track(*whole[:1], [whole[1]], torsions=spec, scheme="klyne-prelog")
    b = track(*split[:1], [split[1]], torsions=spec, scheme="klyne-prelog")
    pd.testing.assert_frame_equal(a.populations, b.populations)
    assert (a.states().iloc[:, 3:].to_numpy() == b.states().iloc[:, 3:].to_numpy()).all()


@pytest.fixture(scope="module")
def two_replicas(tmp_path_factory):
    folder = tmp_path_factory.mktemp("replicas")
    rng = np.random.default_rng(5)
    paths = []
    for r, centre in enumerate((60.0, -60.0)):
        t = centre + rng.normal(scale=25.0, size=(300, 8))
        sub = folder / f"r{r}"
        sub.mkdir()
        paths.append(write_system(str(sub), chain_coordinates(t), box=[40, 40, 40, 90, 90, 90], dt_ps=2.0))
    return paths


def spec8():
    return [f"{4*m},{4*m+1},{4*m+2},{4*m+3}" for m in range(8)]


def test_replicas_are_kept_apart_and_combined(two_replicas):
    (top, t0), (_, t1) = two_replicas
    res = track(top, [t0, t1], torsions=spec8(), scheme="anti-gauche")
    rep = res.populations_by_replica.set_index(["replica", "torsion", "state"])["population"]
    first = res.torsion_set.labels[0]
    assert rep.loc[(0, first, "gauche+")] > 0.9 and rep.loc[(1, first, "gauche-")] > 0.9
    pooled = res.populations.set_index(["torsion", "state"])["population"]
    assert pooled.loc[(first, "gauche+")] == pytest.approx(
        (rep.loc[(0, first, "gauche+")] + rep.loc[(1, first, "gauche+")]) / 2, abs=1e-12)
    # two replicas that disagree: the error reflects it (blocks never merge across replicas)
    err = res.populations.set_index(["torsion", "state"]).loc[(first, "gauche+"), "population_err"]
    assert err > 0.2
    states = res.states()
    assert states["replica"].tolist() == [0] * 300 + [1] * 300
    assert states["time_ps"].iloc[1] - states["time_ps"].iloc[0] == pytest.approx(2.0, rel=1e-5)
    assert res.summary["replicas"][0]["time_step_ps"] == pytest.approx(2.0, rel=1e-5)

def test_an_atom_group_follows_only_its_own_torsions(two_replicas):
    """``track(atom_group)`` (a part of the system) follows the torsions inside the group, with the
    same numbers as the whole system's run has for them."""
    import MDAnalysis as mda

    (top, t0), _ = two_replicas
    whole = track(top, [t0], torsions=spec8(), scheme="anti-gauche")
    u = mda.Universe(top, t0)
    part = track(u.atoms[:12], torsions=spec8(), scheme="anti-gauche")   # the first three chains
    assert part.torsion_set.labels == whole.torsion_set.labels[:3]
    assert len(part.torsions) == 3 and any("reach outside the atom group" in n for n in part.notices)
    mine = whole.populations[whole.populations["torsion"].isin(part.torsion_set.labels)].reset_index(drop=True)
    pd.testing.assert_frame_equal(part.populations[["torsion", "state", "population"]],
                                  mine[["torsion", "state", "population"]])



def test_one_replica_table_is_that_replica_computed_alone(two_replicas):
    """With one replica the per-replica table reuses the pooled one: the same numbers as the
    per-replica computation itself."""
    from dihedra.numerics.populations import replica_populations, torsion_populations

    (top, t0), _ = two_replicas
    res = track(top, [t0], torsions=spec8(), scheme="anti-gauche")
    counts, replica = res.blocks["state_counts"], res.blocks["block_replica"]
    args = (counts, replica, res.torsion_set.labels, res.torsion_set.types, res.scheme.labels)
    alone = replica_populations(*args)
    # the table adds the scheme of every torsion to the numbers
    assert (res.populations_by_replica["scheme"] == "anti-gauche").all()
    pd.testing.assert_frame_equal(res.populations_by_replica.drop(columns="scheme"), alone)
    pd.testing.assert_frame_equal(replica_populations(*args, pooled=torsion_populations(*args)), alone)
    assert alone["population_err"].notna().all() and (alone["replica"] == 0).all()


@pytest.mark.parametrize("backend", ["multiprocessing", "dask"])
def test_parallel_backends_give_results_identical_to_serial(two_replicas, backend):
    (top, t0), (_, t1) = two_replicas
    kw = dict(torsions=spec8(), scheme="klyne-prelog", keep_angles=True)
    serial = track(top, [t0, t1], **kw)
    par = track(top, [t0, t1], workers=2, backend=backend, **kw)
    assert set(serial.blocks) == set(par.blocks)
    for key in ("state_counts", "histograms", "block_frames", "conformer_rows", "undefined"):
        np.testing.assert_array_equal(serial.blocks[key], par.blocks[key])
    for key in (k for k in serial.blocks if k.startswith("conformer_counts_w")):
        np.testing.assert_array_equal(serial.blocks[key], par.blocks[key])
    pd.testing.assert_frame_equal(serial.populations, par.populations)
    pd.testing.assert_frame_equal(serial.states(), par.states())
    pd.testing.assert_frame_equal(serial.angles(), par.angles())


def test_weights_reweight_populations(two_replicas, tmp_path):
    (top, t0), _ = two_replicas
    plain = track(top, [t0], torsions=spec8(), scheme="anti-gauche")
    states = plain.states()
    first = plain.torsion_set.labels[0]
    # weight 1 on frames where the first torsion is gauche-, 0 elsewhere: it must be all gauche-
    w = (states[first] == plain.scheme.labels.index("gauche-")).astype(float)
    path = tmp_path / "w.csv"
    pd.DataFrame({"frame": states["frame"], "weight": w}).to_csv(path, index=False)
    res = track(top, [t0], torsions=spec8(), scheme="anti-gauche", weights=str(path))
    pop = res.populations.set_index(["torsion", "state"])["population"]
    assert pop.loc[(first, "gauche-")] == pytest.approx(1.0)
    # weighted mean of another torsion equals the direct weighted average of its indicator
    other = plain.torsion_set.labels[3]
    direct = np.sum(w * (states[other] == 1)) / np.sum(w)
    assert pop.loc[(other, "gauche+")] == pytest.approx(direct)
    bad = tmp_path / "bad.csv"
    pd.DataFrame({"weight": np.ones(10)}).to_csv(bad, index=False)
    with pytest.raises(DihedraError, match="has 10 rows but 300 frames"):
        track(top, [t0], torsions=spec8(), weights=str(bad))


def test_conformer_populations_equal_direct_joint_counts(tmp_path):
    # five-site chains: two torsions per molecule; conformers are their joint states
    rng = np.random.default_rng(9)
    n_frames, n_mol = 400, 10
    choices = np.array([180.0, 60.0, -60.0])
    t1 = choices[rng.integers(0, 3, size=(n_frames, n_mol))] + rng.normal(scale=10, size=(n_frames, n_mol))
    t2 = choices[rng.integers(0, 3, size=(n_frames, n_mol))] + rng.normal(scale=10, size=(n_frames, n_mol))
    coords = five_site_chains(t1, t2)
    top, traj = write_system(str(tmp_path), coords, names=("C1", "C2", "C3", "C4", "C5"), resname="PEN",
                             box=[80, 80, 80, 90, 90, 90])
    res = track(top, [traj], torsions="rotatable", scheme="anti-gauche")
    assert len(res.torsion_set) == 2 * n_mol
    conf = res.conformers.set_index(["group", "conformer"])["population"]
    label = lambda a: np.array(["anti", "gauche+", "gauche-"])[res.scheme.assign(a)]  # noqa: E731
    joint = np.char.add(np.char.add(label(t1[:, 0]), "|"), label(t2[:, 0]))
    values, counts = np.unique(joint, return_counts=True)
    for v, c in zip(values, counts):
        assert conf.loc[("PEN1", v)] == pytest.approx(c / n_frames)
    pooled = res.conformers_by_type.set_index("conformer")["population"]
    assert pooled.sum() == pytest.approx(1.0)
    assert set(res.conformers_by_type["n_groups"]) == {n_mol}


def test_pooled_conformers_equal_pooling_of_the_zero_filled_grid():
    # the pooled table is pool_by_type over every (group, conformer) of a type, a conformer a
    # group never visited counting as 0: here that grid is made with pandas' reindex (the plain
    # formulation) and pooled, for two types with different conformers, ties and a NaN error
    from dihedra.numerics.populations import _pooled_conformers, pool_by_type

    rng = np.random.default_rng(4)
    rows = []
    for g in range(12):
        gtype = "AAA" if g % 3 else "BB"
        confs = rng.choice(["a|a", "a|b", "b|b", "c|a"] if gtype == "AAA" else ["x", "y", "z"], size=2, replace=False)
        for c in confs:
            rows.append((f"G{g}", gtype, c, round(rng.random(), 1), rng.random() / 10))
    by_group = pd.DataFrame(rows, columns=["group", "group_type", "conformer", "population", "population_err"])
    by_group.loc[5, "population_err"] = np.nan
    got = _pooled_conformers(*(by_group[c].to_numpy() for c in ["group_type", "group", "conformer", "population",
                                                                  "population_err"]))
    full = []
    for gtype, sub in by_group.groupby("group_type", sort=False):
        grid = pd.MultiIndex.from_product([sub["group"].unique(), sub["conformer"].unique()],
                                          names=["group", "conformer"])
        sub = sub.set_index(["group", "conformer"])[["population", "population_err"]].reindex(grid, fill_value=0.0)
        full.append(sub.reset_index().assign(group_type=gtype))
    want = pool_by_type(pd.concat(full, ignore_index=True).rename(columns={"conformer": "state"}),
                        key="group_type", item="group", count_name="n_groups").rename(columns={"state": "conformer"})
    want = want.sort_values(["group_type", "population"], ascending=[True, False], kind="stable").reset_index(drop=True)
    pd.testing.assert_frame_equal(got, want)
    nan = got[got["population_err"].isna()]   # a NaN error makes the pooled error of its conformer NaN
    assert nan[["group_type", "conformer"]].values.tolist() == [list(by_group.loc[5, ["group_type", "conformer"]])]


def five_site_chains(t1, t2, bond=1.53, angle=112.0):
    from conftest import place_fourth
    base = chain_coordinates(t1, spacing=8.0, bond=bond, angle=angle)
    n_frames, n_mol = t1.shape
    out = np.empty((n_frames, 5 * n_mol, 3))
    for m in range(n_mol):
        a, b, c, d = (base[:, 4 * m + k] for k in range(4))
        e = place_fourth(b.copy(), c.copy(), d.copy(), bond, angle, t2[:, m])
        out[:, 5 * m:5 * m + 5] = np.stack([a, b, c, d, e], axis=1)
    return out


def test_undefined_torsions_are_counted_not_binned(tmp_path):
    # a collinear molecule (angle B-C-D of 180 deg) has no defined torsion
    t = np.full((50, 2), 60.0)
    coords = chain_coordinates(t)
    b, c = coords[:, 1], coords[:, 2]
    coords[:25, 3] = c[:25] + (c[:25] - b[:25])  # D on the B-C line for half of the frames
    top, traj = write_system(str(tmp_path), coords)
    res = track(top, [traj], torsions=["0,1,2,3", "4,5,6,7"], scheme="anti-gauche")
    assert res.blocks["undefined"].tolist() == [25, 0]
    assert res.blocks["state_counts"][:, 0].sum() == 25
    assert res.blocks["histograms"][:, 0].sum() == 25
    assert res.populations.set_index(["torsion", "state"]).loc[(res.torsion_set.labels[0], "gauche+"),
                                                               "population"] == pytest.approx(1.0)
    assert any("undefined" in n for n in res.notices)
    assert (res.states()[res.torsion_set.labels[0]].to_numpy()[:25] == -1).all()


def test_results_folder_round_trip_and_existing_folder_untouched(two_replicas, tmp_path):
    (top, t0), _ = two_replicas
    out = tmp_path / "res"
    res = track(top, [t0], torsions=spec8(), scheme="anti-gauche", out=str(out))
    names = sorted(os.listdir(out))
    assert names == sorted(["blocks.npz", "conformers.csv", "conformers_by_type.csv", "convergence.csv",
                            "convergence.json", "convergence_by_state.csv", "convergence_over_time.csv",
                            "cores.parquet", "dihedra-files.json", "histograms.parquet", "populations.csv",
                            "populations_by_replica.csv", "populations_by_type.csv", "schemes.csv",
                            "states.parquet", "summary.json", "torsions.csv"])
    back = load_results(out)
    pd.testing.assert_frame_equal(back.populations, res.populations, check_exact=False, rtol=1e-5)
    assert back.scheme == res.scheme
    assert back.states().shape == (300, 3 + 8)
    # the SHA-256 of the inputs (hashlib, standard library), computed while the run went on
    import hashlib
    assert back.summary["topology"]["sha256"] == hashlib.sha256(open(top, "rb").read()).hexdigest()
    assert back.summary["replicas"][0]["sha256"] == hashlib.sha256(open(t0, "rb").read()).hexdigest()
    before = {n: os.path.getmtime(out / n) for n in names}
    with pytest.raises(OutputExistsError):
        track(top, [t0], torsions=spec8(), out=str(out))
    assert {n: os.path.getmtime(out / n) for n in names} == before
    # nothing half-written is left beside it
    assert sorted(os.listdir(tmp_path)) == ["res"]


def test_state_counts_are_kept_narrow_and_read_wide_and_the_summary_comes_last(two_replicas, tmp_path):
    (top, t0), _ = two_replicas
    out = tmp_path / "res"
    res = track(top, [t0], torsions=spec8(), scheme="anti-gauche", out=str(out))
    # a block holds at most its frames, so the counts of a short run are kept as uint8; analyses
    # read int64 with the same integers (common practice: counters sized to their bound)
    kept = res.blocks.stored["state_counts"]
    assert kept.dtype == np.uint8
    assert int(kept.max()) <= int(res.blocks["block_frames"].max())
    wide = res.blocks["state_counts"]
    assert wide.dtype == np.int64 and np.array_equal(wide, kept)
    assert int(wide.sum()) == 300 * 8 - int(res.blocks["undefined"].sum())   # frames x torsions
    back = load_results(out)
    assert back.blocks["state_counts"].dtype == np.int64 and np.array_equal(back.blocks["state_counts"], wide)
    # summary.json is written after every table: it records the convergence phase, and its own peak
    # memory is the process's peak until then (ru_maxrss, in MB of 10^6 bytes)
    import resource
    summary = back.summary
    assert list(summary["phase_seconds"])[-2:] == ["convergence", "hashing_wait"]
    assert summary["convergence"]["verdicts"]
    peaks = summary["peak_memory_mb_after"]
    assert list(peaks.values()) == sorted(peaks.values())
    assert peaks["hashing_wait"] <= resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024 / 1e6 + 1
    assert os.path.getmtime(out / "summary.json") >= max(os.path.getmtime(out / n) for n in
                                                         ("populations.csv", "convergence.csv", "histograms.parquet"))


def test_interrupted_run_leaves_no_folder(two_replicas, tmp_path, monkeypatch):
    (top, t0), _ = two_replicas
    from dihedra.trajectory import trackpass

    def boom(self, batch):
        raise KeyboardInterrupt

    # (_process takes the frames of both readers: MDAnalysis' iteration and dihedra's decoder)
    monkeypatch.setattr(trackpass.TorsionPass, "_process", boom)
    with pytest.raises(KeyboardInterrupt):
        track(top, [t0], torsions=spec8(), out=str(tmp_path / "res"))
    assert os.listdir(tmp_path) == []


@pytest.mark.parametrize("target, kw", [("save_blocks", {}), ("TimeSeriesWriter.close", {}),
                                        ("TimeSeriesWriter.add", {}), ("TimeSeriesWriter.add", {"workers": 2}),
                                        # chunks of 5 frames: written by the third thread mid-pass
                                        ("TimeSeriesWriter.add", {"threads": 2, "chunk_frames": 5})])
def test_error_while_writing_files_reaches_the_caller_and_leaves_no_folder(two_replicas, tmp_path, monkeypatch,
                                                                           target, kw):
    # the block sums are written in another thread, the time series during the pass (in the second
    # thread or in workers): a failed write is the run's error, not a "damaged trajectory"
    (top, t0), _ = two_replicas
    import dihedra.tracking as tracking_module
    from dihedra.io import series

    def full_disk(*args, **kwargs):
        raise OSError(28, "No space left on device")

    owner, name = (tracking_module, target) if "." not in target else (series.TimeSeriesWriter, target.split(".")[1])
    monkeypatch.setattr(owner, name, full_disk)
    with pytest.raises(OSError, match="No space left"):
        track(top, [t0], torsions=spec8(), out=str(tmp_path / "res"), **kw)
    assert os.listdir(tmp_path) == []


def test_simulated_rb_butane_populations_match_boltzmann_integral():
    # A united-atom butane gas simulated with OpenMM (example_trajectories/make_examples.py), RB torsion
    # and no 1-4 nonbonded terms: pooled anti/gauche populations agree with the Boltzmann integral of
    # the RB potential (Ryckaert & Bellemans, Faraday Discuss. Chem. Soc. 66 (1978) 95, coefficients
    # from memory; scipy.integrate.quad,
    # no Jacobian for a torsion) within 3 standard errors.
    from dihedra import example_path
    top, traj = example_path("butane_rb.pdb"), example_path("butane_rb.xtc")
    if not os.path.exists(traj):
        pytest.skip("butane_rb example not present")
    res = track(top, [traj], torsions="rotatable", scheme="anti-gauche")
    assert res.torsions["type"].nunique() == 1 and len(res.torsions) == 100
    pops = res.populations_by_type.set_index("state")
    kt = kt_kj_mol(298.15)
    f = lambda x: np.exp(-rb_kj_mol(x) / kt)  # noqa: E731
    total = integrate.quad(f, -180, 180, points=[-120, 0, 120], limit=200)[0]
    expected = {"anti": boltzmann_anti_fraction(298.15),
                "gauche+": integrate.quad(f, 0, 120)[0] / total,
                "gauche-": integrate.quad(f, -120, 0)[0] / total}
    for state, p in expected.items():
        assert abs(pops.loc[state, "population"] - p) < 3 * pops.loc[state, "population_err"], state
        assert pops.loc[state, "population_err"] < 0.02  # the check has teeth


def test_input_hashes_are_sha256_and_cached_until_the_file_changes(tmp_path, monkeypatch):
    # hashlib's SHA-256 (standard library) of the inputs, in the summary; a second hashing of an
    # unchanged file comes from the cache, a changed file is hashed again
    import hashlib

    from dihedra.trajectory import inputs

    path = tmp_path / "data.bin"
    path.write_bytes(b"x" * 5000)
    monkeypatch.setenv(inputs.CACHE_ENV, str(tmp_path / "cache"))
    expect = hashlib.sha256(b"x" * 5000).hexdigest()
    assert inputs.cached_sha256(path) == expect
    calls = []
    monkeypatch.setattr(inputs, "sha256", lambda *a, **k: calls.append(a) or "recomputed")
    assert inputs.cached_sha256(path) == expect and not calls
    path.write_bytes(b"y" * 5000)
    assert inputs.cached_sha256(path) == "recomputed" and len(calls) == 1
    monkeypatch.setenv(inputs.NO_CACHE_ENV, "1")
    assert inputs.cached_sha256(path) == "recomputed" and len(calls) == 2
    hashes = inputs.FileHashes([path])
    with hashes.paused():
        pass
    assert hashes.get(path) == "recomputed"


def test_replicas_with_frames_at_different_intervals_are_pointed_out(two_replicas, tmp_path):
    # pooling frames of replicas saved 2 ps and 1 ps apart weighs each by its frames, not its time
    (top, t0), (_, t1) = two_replicas
    t = 60.0 + np.random.default_rng(9).normal(scale=25.0, size=(300, 8))
    _, t2 = write_system(str(tmp_path), chain_coordinates(t), box=[40, 40, 40, 90, 90, 90], dt_ps=1.0)
    mixed = track(top, [t0, t2], torsions=spec8(), scheme="anti-gauche")
    assert any("different times apart" in n and "2 ps" in n and "1 ps" in n for n in mixed.notices)
    same = track(top, [t0, t1], torsions=spec8(), scheme="anti-gauche")
    assert not any("different times apart" in n for n in same.notices)


def test_pooled_types_come_in_the_order_of_the_numbers_in_their_names():
    # a lipid chain's positions C22, C23, ..., C29, C210: text order would put C210 before C22
    from dihedra.numerics.populations import pool_by_type

    names = [f"POPE:C2{k}-C2{k + 1}" for k in range(2, 12)]
    rows = [(t, f"{t}#{m}", s, 0.5, 0.01) for t in reversed(names) for m in range(2) for s in ("anti", "gauche")]
    table = pd.DataFrame(rows, columns=["type", "torsion", "state", "population", "population_err"])
    pooled = pool_by_type(table)
    assert list(dict.fromkeys(pooled["type"])) == names
    assert pooled["state"].tolist()[:2] == ["anti", "gauche"]


def test_states_no_torsion_visited_are_named_as_unvisited_not_as_measured_zeros(tmp_path):
    # 8 torsions held in anti and gauche+ only: gauche- is 0 +- 0 in populations_by_type, which says
    # that no frame was there, not that the state is empty (with n independent samples and no
    # event a population up to about 3 / n stays possible at 95 %: the "rule of three", Hanley &
    # Lippman-Hand, JAMA 249 (1983) 1743)
    from synthetic_rotors import write_rotor_trajectory

    rng = np.random.default_rng(4)
    held = np.r_[np.full(3, 62.0), np.full(5, 178.0)]
    pdb, dcd = write_rotor_trajectory(str(tmp_path), "held", held[None, :] + rng.normal(0.0, 5.0, size=(100, 8)))
    res = track(pdb, [dcd], torsions="rotatable")
    by_type = res.populations_by_type.set_index("state")
    assert by_type.loc["gauche-", "population"] == 0 and by_type.loc["gauche-", "population_err"] == 0
    named = [n for n in res.notices if "never visited by any of their torsions" in n]
    assert len(named) == 1 and named[0].startswith("1 state(s)") and "gauche-" in named[0]
    # a type that visits all its states gets no such notice
    moving = track(pdb, [dcd], torsions="rotatable", scheme="cis-trans")
    assert not [n for n in moving.notices if "never visited" in n]
