"""Serial, multiprocessing, dask and dask.distributed runs of the trajectory pass give identical
results; the per-frame shortcuts (bin table, chunked counts) agree with direct references; memory
does not grow with the number of frames."""

import os

import MDAnalysis as mda
import numpy as np
import pandas as pd
import pyarrow.parquet as pq
from series_reading import read_wide
import pytest

from conftest import place_fourth, write_system
from dihedra.errors import DihedraError
from dihedra.io import series as series_module
from dihedra.io.series import ParquetSeriesFactory, series_files
from dihedra.selection.schemes import get_scheme
from dihedra.tracking import track

distributed = pytest.importorskip("distributed")

N_MOL = 10           # six-site chains: three torsions each, sharing atoms along the chain
N_FRAMES = 150


def hexane_like(n_frames, n_mol, seed, centre_deg=None, spread_deg=40.0):
    """Coordinates (n_frames, 6 * n_mol, 3) of six-site chains (NeRF, common practice)."""
    rng = np.random.default_rng(seed)
    if centre_deg is None:
        phi = rng.uniform(-180, 180, size=(n_frames, n_mol, 3))
    else:
        phi = centre_deg + rng.normal(scale=spread_deg, size=(n_frames, n_mol, 3))
    out = np.empty((n_frames, n_mol, 6, 3))
    th = np.radians(112.0)
    out[:, :, 0] = [0.0, 0.0, 0.0]
    out[:, :, 1] = [1.53, 0.0, 0.0]
    out[:, :, 2] = [1.53 - 1.53 * np.cos(th), 1.53 * np.sin(th), 0.0]
    for k in range(3):
        out[:, :, k + 3] = place_fourth(out[:, :, k], out[:, :, k + 1], out[:, :, k + 2], 1.53, 112.0,
                                        phi[:, :, k])
    centres = rng.uniform(0, 24.0, size=(n_mol, 3))
    return (out + centres[None, :, None, :]).reshape(n_frames, 6 * n_mol, 3)


@pytest.fixture(scope="module")
def replicas(tmp_path_factory):
    """Two replicas of ten six-site chains in a 24 A box, wrapped atom by atom (some molecules
    split across the boundary), the first with molecule 0 collinear (undefined) in some frames."""
    folder = tmp_path_factory.mktemp("parallel")
    box = np.array([24.0, 24.0, 24.0, 90, 90, 90])
    paths = []
    for r, centre in enumerate((None, -65.0)):
        xyz = hexane_like(N_FRAMES, N_MOL, seed=10 + r, centre_deg=centre)
        if r == 0:  # atoms 0..3 on one line: the first torsion is undefined in these frames
            xyz[3::7, :4] = np.array([[2.0, 3.0, 4.0], [3.5, 3.0, 4.0], [5.0, 3.0, 4.0], [6.5, 3.0, 4.0]])
        xyz -= np.floor(xyz / box[:3]) * box[:3]
        sub = folder / f"r{r}"
        sub.mkdir()
        paths.append(write_system(str(sub), xyz, names=("C1", "C2", "C3", "C4", "C5", "C6"),
                                  resname="HEX", box=box, dt_ps=2.0))
    top = paths[0][0]
    weights = folder / "weights.csv"
    rng = np.random.default_rng(3)
    pd.DataFrame({"replica": np.repeat([0, 1], N_FRAMES), "frame": np.tile(np.arange(N_FRAMES), 2),
                  "weight": rng.uniform(0.2, 2.0, 2 * N_FRAMES)}).to_csv(weights, index=False)
    return top, [p[1] for p in paths], str(weights)


@pytest.fixture(scope="module")
def cluster():
    """A dask.distributed cluster on loopback: two single-thread workers inside this process."""
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  protocol="tcp://", host="127.0.0.1", dashboard_address=None) as lc:
        yield lc


# small chunks that do not line up with the 64 state blocks or the 16 histogram blocks
KW = dict(torsions="rotatable", scheme="klyne-prelog", keep_angles=True, chunk_frames=23)


@pytest.fixture(scope="module")
def serial(replicas):
    top, trajs, _ = replicas
    return track(top, trajs, threads=1, **KW)


def assert_same(a, b):
    assert set(a.blocks) == set(b.blocks)
    for key in a.blocks:
        np.testing.assert_array_equal(a.blocks[key], b.blocks[key], err_msg=key)
    for name in ("populations", "populations_by_replica", "conformers", "conformers_by_type"):
        pd.testing.assert_frame_equal(getattr(a, name), getattr(b, name))
    pd.testing.assert_frame_equal(a.states(), b.states())
    pd.testing.assert_frame_equal(a.angles(), b.angles())
    cores = [pq.read_table(r.series.path("cores")).to_pandas() for r in (a, b)]
    pd.testing.assert_frame_equal(*cores)
    # the convergence time blocks counted by the pass (every worker its frames' blocks)
    for x, y in zip(a.time_blocks.replicas, b.time_blocks.replicas, strict=True):
        for name in ("counts", "frames", "time_ps"):
            np.testing.assert_array_equal(getattr(x, name), getattr(y, name), err_msg=name)
    # the same rows whatever the number of workers (above); each process wrote the files of its
    # own frames: file names by replica and first frame, rows in the order of the names
    for r in (a, b):
        for kind in ("states", "cores", "angles"):
            files = series_files(r.series.path(kind))
            firsts = [(int(os.path.basename(f)[5:9]), int(os.path.basename(f)[10:22])) for f in files]
            heads = [tuple(pq.read_table(f, columns=["replica", "frame"]).slice(0, 1).to_pylist()[0].values())
                     for f in files]
            assert firsts == heads == sorted(heads)


def test_time_series_start_new_files(replicas, serial, monkeypatch):
    # Arrow's writer keeps the metadata of every row group until its file closes, so a long run
    # starts a new file every ROW_GROUPS_PER_FILE row groups; here every row group (the serial
    # pass and every worker write through TimeSeriesWriter)
    monkeypatch.setattr(series_module, "ROW_GROUPS_PER_FILE", 1)
    top, trajs, _ = replicas
    split = track(top, trajs, **KW)
    files = series_files(split.series.path("states"))
    assert len(files) > 2
    assert [pq.ParquetFile(f).num_row_groups for f in files] == [1] * len(files)
    # the same table as in one file, also read back in chunks
    pd.testing.assert_frame_equal(split.states(), serial.states())
    pd.testing.assert_frame_equal(split.angles(), serial.angles())
    pd.testing.assert_frame_equal(pd.concat(list(split.iter_states()), ignore_index=True), serial.states())
    assert_same(split, track(top, trajs, workers=2, backend="multiprocessing", **KW))


@pytest.mark.parametrize("threads", [1, 2])
def test_deferred_close_writes_the_same_files(replicas, tmp_path, threads):
    """With defer_close the last row group and the footers are written in the background until
    finish_series(): then the files equal those of a pass that closes them itself."""
    import MDAnalysis as mda
    from dihedra.selection.specs import select_torsions
    from dihedra.trajectory.trackpass import TorsionPass

    top, trajs, _ = replicas
    u = mda.Universe(top, trajs[0])
    tset = select_torsions(u, "rotatable")
    tables = []
    for defer in (False, True):
        out = tmp_path / f"defer{defer}"
        out.mkdir()
        tp = TorsionPass(u, tset, get_scheme("klyne-prelog"), series=ParquetSeriesFactory(str(out)), keep_angles=True,
                         chunk_frames=40, threads=threads, defer_close=defer)
        tp.run()
        tp.finish_series()
        tp.finish_series()   # a second call has nothing left to wait for
        tables.append([pq.read_table(str(out / f"{kind}.parquet")) for kind in ("states", "angles")])
    for kind in range(2):   # (pandas: the angles of undefined torsions are NaN in both)
        assert tables[0][kind].num_rows == N_FRAMES
        pd.testing.assert_frame_equal(tables[0][kind].to_pandas(), tables[1][kind].to_pandas())


@pytest.mark.parametrize("backend", ["multiprocessing", "dask"])
def test_process_backends_equal_serial(replicas, serial, backend):
    top, trajs, _ = replicas
    assert_same(serial, track(top, trajs, workers=2, backend=backend, **KW))


def test_distributed_scheduler_equals_serial(replicas, serial, cluster):
    top, trajs, _ = replicas
    res = track(top, trajs, scheduler=cluster.scheduler_address, **KW)
    assert res.summary["parameters"]["backend"] == "DistributedBackend"
    assert res.summary["parameters"]["scheduler"] == cluster.scheduler_address
    assert_same(serial, res)


def test_basins_first_pass_runs_on_the_cluster_and_equals_serial(replicas, cluster):
    # the first pass of --scheme basins (the histograms the basins are found in) is spread over
    # the cluster's workers like the run's own pass, with the same basins and results
    top, trajs, _ = replicas
    kw = dict(torsions="rotatable", scheme="basins", temperature_k=300.0, chunk_frames=23)
    ref = track(top, trajs, threads=1, **kw)
    res = track(top, trajs, scheduler=cluster.scheduler_address, **kw)
    first = res.summary["parameters"]["scheme_choice"]["basins"]["first_pass"]
    assert first["backend"] == "DistributedBackend" and first["workers"] == 2
    assert ref.summary["parameters"]["scheme_choice"]["basins"]["first_pass"]["backend"] == "serial"
    pd.testing.assert_frame_equal(ref.schemes, res.schemes)
    for key in ref.blocks:
        np.testing.assert_array_equal(ref.blocks[key], res.blocks[key], err_msg=key)
    pd.testing.assert_frame_equal(ref.populations, res.populations)


def test_distributed_weighted_run_equals_serial(replicas, cluster):
    top, trajs, weights = replicas
    kw = dict(KW, weights=weights, keep_angles=False)
    with distributed.Client(cluster) as client:
        res = track(top, trajs, scheduler=client, **kw)
        assert client.status == "running"  # a client given by the caller stays open
    ref = track(top, trajs, **kw)
    for key in ref.blocks:
        if ref.blocks[key].dtype.kind == "f":
            # weight sums of a block split between workers are added in another order: equal to
            # rounding (float64), not bit for bit
            np.testing.assert_allclose(ref.blocks[key], res.blocks[key], rtol=1e-12, err_msg=key)
        else:
            np.testing.assert_array_equal(ref.blocks[key], res.blocks[key], err_msg=key)
    pd.testing.assert_frame_equal(ref.states(), res.states())


def test_command_line_scheduler_option(replicas, serial, cluster, tmp_path):
    from dihedra.cli import main
    from dihedra.io.resultsdir import load_results

    top, trajs, _ = replicas
    out = tmp_path / "res"
    code = main(["track", top, *trajs, "--torsions", "rotatable", "--scheme", "klyne-prelog",
                 "--scheduler", cluster.scheduler_address, "--out", str(out)])
    assert code in (None, 0)
    res = load_results(out)
    np.testing.assert_array_equal(res.blocks["histograms"], serial.blocks["histograms"])
    np.testing.assert_array_equal(res.blocks["state_counts"], serial.blocks["state_counts"])
    pd.testing.assert_frame_equal(res.states(), serial.states())


def test_unreachable_scheduler_is_a_clear_error():
    from dihedra.trajectory.distributed import connect
    with pytest.raises(DihedraError, match="cannot reach a dask scheduler"):
        connect("tcp://127.0.0.1:9", timeout_s=2)


def test_codes_histograms_and_angles_agree_with_references(serial, replicas):
    from MDAnalysis.lib.distances import calc_dihedrals
    import MDAnalysis as mda

    top, trajs, _ = replicas
    scheme = get_scheme("klyne-prelog")
    states, angles = serial.states(), serial.angles()
    labels = list(serial.torsion_set.labels)
    a = angles[labels].to_numpy(dtype=float)
    s = states[labels].to_numpy()
    # reference library: MDAnalysis calc_dihedrals (float64) with the box, on replica 0
    u = mda.Universe(top, trajs[0])
    idx = serial.torsion_set.indices
    ref = np.array([np.degrees(calc_dihedrals(*(ts.positions[idx[:, k]] for k in range(4)), box=ts.dimensions))
                    for ts in u.trajectory])
    mine = a[states["replica"].to_numpy() == 0]
    defined = ~np.isnan(ref)
    assert np.array_equal(defined, ~np.isnan(mine))
    # atoms 0-3 on a line: torsions 0-1-2-3 and 1-2-3-4 of molecule 0 are undefined in those frames
    assert (~defined).sum() == 2 * len(range(3, N_FRAMES, 7))
    diff = (mine[defined] - ref[defined] + 180.0) % 360.0 - 180.0
    assert np.abs(diff).max() < 1e-3   # float32 arithmetic, XTC coordinates
    # the bin-table lookup gives exactly the codes of StateScheme.assign on the stored angles
    expect = np.where(np.isnan(a), -1, scheme.assign(np.nan_to_num(a)))
    np.testing.assert_array_equal(s, expect)
    # histogram bins open at the left: numpy's left-closed bins of the negated angles, reversed
    edges = serial.blocks["bin_edges_deg"]
    hist = serial.blocks["histograms"].sum(axis=0)
    for j in range(len(labels)):
        col = a[:, j][~np.isnan(a[:, j])]
        np.testing.assert_array_equal(hist[j], np.histogram(-col, bins=edges)[0][::-1])
    assert serial.blocks["undefined"].sum() == (~defined).sum()


def test_conformer_rows_equal_direct_joint_counts(serial):
    # direct count of the joint states of each chain from states.parquet (no shortcut)
    states = serial.states()
    tset = serial.torsion_set
    n_s = serial.scheme.n_states
    from dihedra.trajectory.conformer_counts import conformer_rows
    rows, _ = conformer_rows(serial.blocks, tset, n_s)
    assert len(serial.blocks["conformer_rows"]) == 0   # every chain counted densely
    n_blocks = serial.blocks["state_counts"].shape[0] // 2
    from dihedra.trajectory.conformer_counts import conformer_layout
    groups, members, _ = conformer_layout(tset, n_s)
    for g, m in list(enumerate(members))[:3]:
        codes = states[[tset.labels[p] for p in m]].to_numpy().astype(np.int64)
        ok = (codes >= 0).all(axis=1)
        joint = codes @ (n_s ** np.arange(len(m)))
        pos = np.concatenate([np.arange(N_FRAMES) * 64 // N_FRAMES,
                              n_blocks + np.arange(N_FRAMES) * 64 // N_FRAMES])
        expect = pd.Series(1, index=pd.MultiIndex.from_arrays([pos[ok], joint[ok]])).groupby(level=[0, 1]).sum()
        got = rows[rows[:, 1] == g]
        got = pd.Series(got[:, 3], index=pd.MultiIndex.from_arrays([got[:, 0], got[:, 2]]))
        pd.testing.assert_series_equal(got.sort_index(), expect.sort_index(), check_names=False)


MEMORY_PROBE = """
import json, os, sys, tracemalloc, warnings
warnings.simplefilter("ignore")
import MDAnalysis as mda
from dihedra.selection.schemes import get_scheme
from dihedra.selection.specs import select_torsions
from dihedra.trajectory.trackpass import TorsionPass
from dihedra.io.series import ParquetSeriesFactory, series_files
import pyarrow.parquet as pq
top, traj, folder = sys.argv[1:4]
u = mda.Universe(top, traj)
tset = select_torsions(u, "rotatable")
out = []
for stop in (200, 800):
    parts = os.path.join(folder, f"parts{stop}")
    os.mkdir(parts)
    # coarse bins and few blocks keep the fixed part small, so growth would show
    tp = TorsionPass(u, tset, get_scheme("anti-gauche"), series=ParquetSeriesFactory(parts), chunk_frames=50,
                     keep_angles=True, bin_width_deg=30.0, n_state_blocks=4, n_hist_blocks=4)
    tracemalloc.start()
    tp.run(stop=stop)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    groups = [pq.ParquetFile(f).num_row_groups
              for kind in ("states", "angles") for f in series_files(os.path.join(parts, kind + ".parquet"))]
    out.append({"peak": peak, "counted": int(tp.results.state_counts.sum()), "torsions": len(tset),
                "row_groups": sum(groups)})
print(json.dumps(out))
"""


def test_pass_memory_does_not_grow_with_frames(tmp_path):
    # traced NumPy/Python allocations of the pass (not the OS view of memory, so it is stable), in
    # a fresh process (no other threads allocating): with angles in three narrow wells every block
    # fills the same few cells, and four times the frames must not need more memory than the
    # chunk buffer and the block sums already hold (MDAnalysis keeps the frame numbers and times,
    # 16 bytes per frame: small against 10 %)
    import json
    import subprocess
    import sys

    xyz = hexane_like(800, 40, seed=4, centre_deg=180.0, spread_deg=0.2)
    top, traj = write_system(str(tmp_path), xyz, names=("C1", "C2", "C3", "C4", "C5", "C6"),
                             resname="HEX", box=[60, 60, 60, 90, 90, 90])
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    env = dict(os.environ, PYTHONPATH=root + os.pathsep + os.environ.get("PYTHONPATH", ""))
    done = subprocess.run([sys.executable, "-c", MEMORY_PROBE, top, traj, str(tmp_path)], env=env,
                          capture_output=True, text=True, check=True)
    small, large = json.loads(done.stdout.strip().splitlines()[-1])
    assert small["counted"] == 200 * small["torsions"] and large["counted"] == 800 * large["torsions"]
    # every chunk of 50 frames written as it filled: one row group each of states and angles
    assert (small["row_groups"], large["row_groups"]) == (2 * 4, 2 * 16)
    assert large["peak"] <= 1.1 * small["peak"]


def test_weighted_state_counts_equal_direct_sums(replicas):
    # the weighted state counts of the pass are the sums of the frames' weights per torsion and
    # state, counted here directly from the state time series (reference: NumPy)
    top, trajs, weights = replicas
    res = track(top, trajs, **dict(KW, weights=weights, keep_angles=False))
    states = res.states()
    labels = list(res.torsion_set.labels)
    codes = states[labels].to_numpy()
    w = states["weight"].to_numpy()
    expect = np.stack([np.bincount(codes[:, t][codes[:, t] >= 0], weights=w[codes[:, t] >= 0],
                                   minlength=res.scheme.n_states) for t in range(len(labels))])
    np.testing.assert_allclose(res.blocks["state_counts"].sum(axis=0), expect, rtol=1e-12)


def test_second_thread_equals_serial(replicas, serial, monkeypatch):
    # a second thread computes batches of copied frames while the first reads: same results
    import dihedra.trajectory.trackpass as tp
    monkeypatch.setattr(tp, "BATCH_BYTES", 7 * 60 * 12)   # batches of 7 frames (60 atoms)
    top, trajs, _ = replicas
    res = track(top, trajs, threads=2, **KW)
    assert res.summary["parameters"]["threads"] == 2
    assert_same(serial, res)


@pytest.mark.parametrize("kw", [dict(threads=1), dict(threads=2), dict(workers=2, backend="multiprocessing")])
def test_xtc_decoder_equals_mdanalysis_reading(replicas, serial, monkeypatch, kw):
    # dihedra's XTC decoder (dihedra.trajectory.trajread) against MDAnalysis' own iteration (reference
    # library): the same blocks, tables and time series, in batches of 7 frames
    pytest.importorskip("numba")
    import dihedra.trajectory.trackpass as tp
    from dihedra.trajectory import trajread

    top, trajs, _ = replicas
    assert trajread.xtc_frames(mda.Universe(top, trajs[0]).trajectory) is not None
    monkeypatch.setattr(tp, "BATCH_BYTES", 7 * 60 * 12)
    decoded = track(top, trajs, **kw, **KW)
    monkeypatch.setenv(trajread.NO_DECODER_ENV, "1")
    assert trajread.xtc_frames(mda.Universe(top, trajs[0]).trajectory) is None
    assert_same(serial, decoded)
    assert_same(track(top, trajs, **kw, **KW), decoded)


def test_error_in_the_second_thread_reaches_the_caller(replicas, monkeypatch):
    import dihedra.trajectory.trackpass as tp

    def broken(self, batch):
        raise RuntimeError("broken batch")
    monkeypatch.setattr(tp.TorsionPass, "_process", broken)
    top, trajs, _ = replicas
    with pytest.raises(RuntimeError, match="broken batch"):
        track(top, trajs[:1], threads=2, **KW)


def test_more_workers_than_frames(replicas):
    # a worker without frames holds no blocks and adds nothing
    top, trajs, _ = replicas
    kw = dict(KW, stop=1)
    one = track(top, trajs[:1], **kw)
    two = track(top, trajs[:1], workers=2, backend="multiprocessing", **kw)
    assert two.summary["parameters"]["workers"] == 2
    for key in one.blocks:
        np.testing.assert_array_equal(one.blocks[key], two.blocks[key], err_msg=key)
    pd.testing.assert_frame_equal(one.states(), two.states())


def test_default_threads_follow_the_usable_cores(monkeypatch):
    # common practice: a serial run uses the second core when the process may run on it
    from dihedra.trajectory import assemble

    monkeypatch.setattr(assemble.os, "sched_getaffinity", lambda pid: {0, 1}, raising=False)
    assert assemble.pass_threads(None, "serial") == 2
    assert assemble.pass_threads(None, "multiprocessing") == 1   # workers use one thread each
    assert assemble.pass_threads(1, "serial") == 1
    monkeypatch.setattr(assemble.os, "sched_getaffinity", lambda pid: {3}, raising=False)
    assert assemble.pass_threads(None, "serial") == 1
    with pytest.raises(DihedraError, match="threads must be 1 or 2"):
        assemble.pass_threads(3, "serial")


@pytest.mark.parametrize("with_parts_dir", [True, False])
def test_block_sums_of_workers_through_files_or_pickles_equal_serial(replicas, tmp_path, with_parts_dir):
    # the workers' histogram blocks and conformer rows come back as files in parts_dir (or,
    # without one, pickled: non-empty cells of each block); either way the sums equal a serial pass
    import MDAnalysis as mda

    from dihedra.selection.specs import select_torsions
    from dihedra.trajectory.trackpass import TorsionPass

    top, trajs, _ = replicas
    u = mda.Universe(top, trajs[0])
    tset = select_torsions(u, "rotatable")
    scheme = get_scheme("anti-gauche")
    ref = TorsionPass(u, tset, scheme).run()
    parts = tmp_path / "parts"
    parts.mkdir()
    par = TorsionPass(u, tset, scheme, parts_dir=str(parts) if with_parts_dir else None)
    par.run(backend="multiprocessing", n_workers=3)
    np.testing.assert_array_equal(par.results.histograms, ref.results.histograms)
    np.testing.assert_array_equal(par.results.state_counts, ref.results.state_counts)
    np.testing.assert_array_equal(par.results.conformer_counts, ref.results.conformer_counts)
    np.testing.assert_array_equal(par.results.conformer_weights, ref.results.conformer_weights)
    # dense conformer counts (chains of three torsions: one class), summed over the workers
    assert set(par.results.conformer_dense) == set(ref.results.conformer_dense) == {3}
    np.testing.assert_array_equal(par.results.conformer_dense[3][0], ref.results.conformer_dense[3][0])
    # one count per chain and frame, less the frames with an undefined member
    assert 0.9 * ref.results.block_frames.sum() * len(tset) // 3 <= ref.results.conformer_dense[3][0].sum() \
        <= ref.results.block_frames.sum() * len(tset) // 3
    # files of the workers are read and removed by the parent
    assert not [f for f in os.listdir(parts) if ".hist" in f or "conformer" in f]


def test_workers_pay_only_with_free_cores_and_enough_frames(replicas, monkeypatch):
    # common practice: a serial run already uses two cores (a thread reads, one computes), so a
    # worker process needs two more cores and enough frames to earn back its start-up
    from dihedra.trajectory import assemble

    per = assemble.TORSION_FRAMES_PER_WORKER
    assert assemble.plan_workers("auto", 1500, 15_000, cores=2)[:2] == (1, 2)
    assert assemble.plan_workers(2, 10 * per, 1, cores=2)[:2] == (1, 2)       # no free cores
    assert assemble.plan_workers(2, 1500, 15_000, cores=8)[:2] == (1, 2)      # too few frames
    assert assemble.plan_workers("auto", 3 * per, 1, cores=8)[:2] == (3, 2)
    assert assemble.plan_workers(2, 3 * per, 1, cores=8)[:2] == (2, 2)        # at most as asked
    assert assemble.plan_workers("auto", 10 * per, 1, cores=6)[:2] == (3, 2)
    assert "usable core" in assemble.plan_workers(2, 1500, 15_000, cores=2)[2]
    # threads asked for are the threads said and used
    n, threads, why = assemble.plan_workers("auto", 1500, 15_000, cores=2, threads=1)
    assert (n, threads) == (1, 1) and "1 thread(s) (--threads)" in why
    # the choice is said and recorded; asking for two workers never makes a small run slower
    top, trajs, _ = replicas
    monkeypatch.setattr(assemble.os, "sched_getaffinity", lambda pid: {0, 1}, raising=False)
    said = []
    res = track(top, trajs[:1], workers=2, log=said.append, **KW)
    params = res.summary["parameters"]
    assert params["workers"] == 1 and params["workers_asked"] == 2 and params["backend"] == "serial"
    assert any(line.startswith("workers: one process with 2 thread(s)") for line in said)
    with pytest.raises(DihedraError, match="workers must be 'auto'"):
        track(top, trajs[:1], workers=0, **KW)


@pytest.mark.parametrize("cut", ["half", "all", "decode-some", "decode-all"])
def test_torsion_work_shared_by_the_reading_thread_gives_the_same_results(replicas, serial, monkeypatch, cut):
    # the reading thread computes the first torsions of each batch, the second thread the rest
    # (frame_work.FrameWork); or the second thread decodes the last frames of each batch (XTC:
    # trajread.XTCFrames.decode_later, with their boxes and times); wherever the cut is, the
    # results are those of one thread
    import dihedra.trajectory.trackpass as tp
    from dihedra.trajectory.frame_work import FrameWork
    from dihedra.trajectory.trajread import XTCFrames

    def fixed(self, side, seconds, frames):
        self.split = {"half": self.n // 2, "all": self.n}.get(cut, 0)
    monkeypatch.setattr(FrameWork, "balance", fixed)
    left = []
    if cut.startswith("decode"):
        monkeypatch.setattr(FrameWork, "later_frames",
                            lambda self, n: n if cut == "decode-all" else n // 2 + 1)
        original = XTCFrames.decode_later
        monkeypatch.setattr(XTCFrames, "decode_later",
                            lambda self, later: (left.append(later.n), original(self, later)))
    monkeypatch.setattr(tp, "BATCH_BYTES", 7 * 60 * 12)   # batches of 7 frames (60 atoms)
    top, trajs, _ = replicas
    assert_same(serial, track(top, trajs, threads=2, **KW))
    if cut.startswith("decode"):   # (the second thread did decode frames: 7 or 4 of every batch of 7)
        assert max(left) == (7 if cut == "decode-all" else 4)


def test_core_bits_written_are_the_core_rule_of_the_angles(replicas, serial):
    # cores.parquet (bits packed along the torsions, frame by frame), read as the documentation
    # says, holds exactly the core rule of the scheme
    # (StateScheme.core_codes, Buchete & Hummer 2008) applied to the angles the same run wrote
    from dihedra.trajectory.cores import CORE_MARGIN_DEG

    angles = serial.angles()
    cores = read_wide(serial.series.folder, "cores")
    labels = [c for c in angles.columns if c not in ("replica", "frame", "time_ps", "weight")]
    scheme = get_scheme("klyne-prelog")
    expected = np.stack([scheme.core_codes(angles[c].to_numpy(), CORE_MARGIN_DEG) >= 0 for c in labels], axis=1)
    np.testing.assert_array_equal(cores[labels].to_numpy(), expected)
    assert 0.1 < expected.mean() < 0.9


@pytest.mark.parametrize("kind", ["decoding", "cheap-read"])
def test_the_balance_of_the_threads_meets_where_both_take_as_long(kind):
    # FrameWork.balance solves r + D (1 - q) + w s = d + D q + w (n - s) for the torsions s of the
    # reading thread and the share q of the frames the computing thread decodes (algebra of the
    # two threads' seconds per frame); fed the seconds of a run of that shape window after
    # window, it settles there
    from types import SimpleNamespace

    from dihedra.trajectory.frame_work import WINDOW, FrameWork

    n = 15_000
    work = FrameWork(SimpleNamespace(kernels=None, idx3=np.zeros((n, 4)), n_torsions=n), (None,) * 7,
                     None, np.zeros(n), None, None)
    # seconds per frame (ms): reading r, decoding D, computing thread's other work d, torsions w n
    r, dec, d, wn = (0.03, 0.2, 0.05, 0.14) if kind == "decoding" else (0.05, 0.0, 0.07, 0.2)
    for _ in range(30):
        q, s = work.later_share, work.split
        work._acc[0][2] += WINDOW * wn * s / n * 1e-3
        work._acc[1][2] += WINDOW * wn * (n - s) / n * 1e-3
        work._part_frames += WINDOW * n
        if dec:
            work.decoded(0, WINDOW * dec * (1 - q) * 1e-3, WINDOW)
            work.decoded(1, WINDOW * dec * q * 1e-3, 0)
        work.balance(0, WINDOW * (r + dec * (1 - q) + wn * s / n) * 1e-3, WINDOW)
        work.balance(1, WINDOW * (d + dec * q + wn * (n - s) / n) * 1e-3, WINDOW)
    if kind == "decoding":   # r + D > d + w n: no torsions for the reading thread, q = 0.04 / 0.4
        assert work.split == 0 and work.later_share == pytest.approx(0.1, abs=1e-3)
        k = [work.later_frames(5) for _ in range(100)]   # batches of 5 frames: one in two gets one
        assert abs(sum(k) - 500 * work.later_share) < 1 and set(k) == {0, 1}
    else:   # nothing to decode: s = (w n + d - r) / 2w = 0.55 n
        assert work.later_share == 0.0 and work.later_frames(5) == 0
        assert abs(work.split - 0.55 * n) <= 64
