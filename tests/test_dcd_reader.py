"""dihedra's batch reading of DCD files (dihedra.trajectory.trajread.DCDFrames) gives what
MDAnalysis' DCDReader gives (reference library): the same positions, boxes, frame numbers and
times bit for bit on the DCD files of MDAnalysisTests (CHARMM and NAMD, with and without a unit
cell, orthorhombic and triclinic), and a pass over a DCD gives the same results either way.
Also the narrow counters of the pass (uint8, widened when a cell could pass 255)."""

import warnings

import numpy as np
import pytest

from conftest import write_system
from dihedra.selection.schemes import get_scheme
from dihedra.tracking import track
from dihedra.trajectory import trajread

pytest.importorskip("numba")
data = pytest.importorskip("MDAnalysisTests.datafiles")

FILES = [("PSF", "DCD"), ("PSF_TRICLINIC", "DCD_TRICLINIC"), ("PSF_NAMD_TRICLINIC", "DCD_NAMD_TRICLINIC"),
         ("PSF_NAMD_GBIS", "DCD_NAMD_GBIS"), ("waterPSF", "waterDCD")]


def _universe(top, traj):
    import MDAnalysis as mda

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return mda.Universe(top, traj)


def _as_atoms(src, rows):
    """Coordinates (frames, atoms, 3) of frames read in the file's layout (DCDFrames.layout)."""
    where, stride = src.layout(np.arange(src.n_atoms))
    return np.stack([rows[:, where.astype(np.int64) + axis * stride] for axis in range(3)], axis=2)


@pytest.mark.parametrize("layout", ["atoms", "file"])
@pytest.mark.parametrize("top,traj", FILES)
def test_batches_equal_mdanalysis_frames(top, traj, layout):
    reader = _universe(getattr(data, top), getattr(data, traj)).trajectory
    src = trajread.frame_source(reader)
    assert isinstance(src, trajread.DCDFrames)
    n = reader.n_frames
    for frames in (np.arange(n), np.unique(np.r_[0, np.arange(2, n, 3), n - 1])):   # runs and gaps
        shape = (len(frames), reader.n_atoms, 3) if layout == "atoms" else (len(frames), src.frame_words)
        pos = np.empty(shape, dtype=np.float32)
        dims, fr, t = np.empty((len(frames), 6), dtype=np.float32), np.empty(len(frames), np.int64), np.empty(len(frames))
        src.read(frames, pos, dims, fr, t)
        if layout == "file":
            pos = _as_atoms(src, pos)
        for k, f in enumerate(frames):
            ts = reader[int(f)]
            np.testing.assert_array_equal(pos[k], ts.positions)
            ref = np.full(6, np.nan, np.float32) if ts.dimensions is None else ts.dimensions
            np.testing.assert_array_equal(dims[k], ref)
            assert fr[k] == ts.frame and t[k] == ts.time
    src.close()


def _copied_adk(tmp_path, n):
    """A copy of MDAnalysisTests' adk DCD (to damage), its reader, dihedra's batch reader of it,
    and the boxes, frame numbers and times of ``n`` frames to fill."""
    import shutil

    path = str(tmp_path / "adk.dcd")
    shutil.copy(data.DCD, path)
    reader = _universe(data.PSF, path).trajectory
    out = np.empty((n, 6), dtype=np.float32), np.empty(n, np.int64), np.empty(n)
    return path, reader, trajread.frame_source(reader), out


def test_damaged_batch_in_the_file_layout_is_read_by_mdanalysis(tmp_path):
    # a record marker of frame 2 overwritten: the batch is read again by MDAnalysis, frame by
    # frame, into the same layout (frames before the damage equal the library's frames)
    path, reader, src, (dims, fr, t) = _copied_adk(tmp_path, 2)
    with open(path, "r+b") as fh:
        fh.seek(int(src.offsets[2]) + 4 * (src._cell_words + src.n_atoms + 2))   # the y record's marker
        fh.write(np.int32(7).tobytes())
    rows = np.empty((2, src.frame_words), dtype=np.float32)
    assert not src._records_intact(np.fromfile(path, dtype=np.int32, count=src.frame_words,
                                               offset=int(src.offsets[2]))[None])
    src.read(np.array([0, 1]), rows, dims, fr, t)
    np.testing.assert_array_equal(_as_atoms(src, rows)[1], reader[1].positions)
    calls = []
    src._put = lambda positions, k, xyz: calls.append(k) or trajread.DCDFrames._put(src, positions, k, xyz)
    with pytest.raises(Exception):   # MDAnalysis' own error for the damaged frame
        src.read(np.array([1, 2]), rows, dims, fr, t)
    assert calls[:1] == [0]
    np.testing.assert_array_equal(_as_atoms(src, rows)[0], reader[1].positions)
    src.close()


def test_a_file_cut_short_after_mapping_is_not_read_from_the_mapping(tmp_path):
    # the mapped pages of a file that shrank would end the process (SIGBUS): read_mapped checks
    # the size first and leaves such a batch to read(), whose reading fails cleanly
    path, reader, src, (dims, fr, t) = _copied_adk(tmp_path, 3)
    first = src.read_mapped(np.arange(3), dims, fr, t)
    np.testing.assert_array_equal(_as_atoms(src, first)[2], reader[2].positions)
    del first
    last = reader.n_frames - 3
    with open(path, "r+b") as fh:
        fh.truncate(int(src.offsets[last]) + 100)
    assert src.read_mapped(np.arange(last, last + 3), dims, fr, t) is None
    assert src.read_mapped(np.arange(3), dims, fr, t) is not None   # (frames before the cut)
    src.close()


@pytest.mark.parametrize("step", [1, 2])
def test_pass_over_dcd_equals_mdanalysis_reading(tmp_path, monkeypatch, step):
    # every frame and every second frame (read into buffers, not from the mapped file)
    rng = np.random.default_rng(3)
    steps = rng.normal(size=(30, 20, 6, 3))
    steps *= 1.5 / np.linalg.norm(steps, axis=-1, keepdims=True)
    xyz = (steps.cumsum(axis=2) + rng.uniform(0, 20, size=(1, 20, 1, 3))).reshape(30, -1, 3)
    top, traj = write_system(str(tmp_path), xyz, names=("C1", "C2", "C3", "C4", "C5", "C6"), resname="HEX",
                             box=[25.0, 25.0, 25.0, 90.0, 90.0, 90.0], fmt="dcd")
    assert isinstance(trajread.frame_source(_universe(top, traj).trajectory), trajread.DCDFrames)
    kw = dict(torsions="rotatable", keep_angles=True, chunk_frames=7, step=step)
    ours = track(top, [traj], threads=2, **kw)
    monkeypatch.setenv(trajread.NO_DCD_ENV, "1")
    assert trajread.frame_source(_universe(top, traj).trajectory) is None
    ref = track(top, [traj], threads=1, **kw)
    for key in ("state_counts", "histograms", "conformer_rows", "undefined"):
        np.testing.assert_array_equal(ours.blocks[key], ref.blocks[key], err_msg=key)
    np.testing.assert_array_equal(ours.angles().to_numpy(), ref.angles().to_numpy())
    assert ours.states().equals(ref.states())


def test_counts_widen_past_255_per_cell(tmp_path):
    # 600 identical frames in one histogram block: every torsion puts 600 counts into one fine
    # bin, beyond uint8; the block is widened and holds exactly np.histogram's counts (reference
    # library) of the torsion's angle
    rng = np.random.default_rng(5)
    steps = rng.normal(size=(4, 6, 3))
    steps *= 1.5 / np.linalg.norm(steps, axis=-1, keepdims=True)
    xyz = np.repeat((steps.cumsum(axis=1) + 10.0).reshape(1, -1, 3), 600, axis=0)
    top, traj = write_system(str(tmp_path), xyz, names=("C1", "C2", "C3", "C4", "C5", "C6"), resname="HEX")
    res = track(top, [traj], torsions="rotatable", n_hist_blocks=1, n_state_blocks=2, keep_angles=True,
                chunk_frames=300)
    # kept in histograms.parquet as the pass counted them (uint16 here), widened when read
    assert res.blocks.stored["histograms"].materialize().dtype == np.uint16
    hist = res.blocks["histograms"]
    assert hist.dtype == np.int32
    angles = res.angles()[list(res.torsion_set.labels)].to_numpy(dtype=np.float64)
    for t in range(hist.shape[1]):
        expect = np.histogram(-angles[:, t], bins=np.linspace(-180, 180, 361))[0][::-1]   # bins open at the left
        np.testing.assert_array_equal(hist[0, t], expect)
    assert hist.max() == 600
    counts = res.blocks["conformer_counts_w3"]
    assert counts.dtype == np.int32 and counts.sum() == 600 * 4 and counts.max() == 300
    assert get_scheme("anti-gauche").n_states == res.blocks["state_counts"].shape[2]


def test_scheme_classes_follow_their_torsions_when_the_work_is_cut(monkeypatch):
    # MDAnalysisTests' adenylate kinase (CHARMM PSF/DCD, reference data): backbone and side-chain
    # torsions follow different schemes of the "protein" set (a bin table per class, a class per
    # torsion); the reading thread computing the first half of the torsions of each batch and
    # the second thread the rest give the states of one thread
    from dihedra.trajectory.frame_work import FrameWork

    kw = dict(torsions=["protein-backbone", "protein-sidechains"], scheme="protein", stop=40, keep_angles=True)
    one = track(data.PSF, [data.DCD], threads=1, **kw)
    from dihedra.trajectory.histograms import bin_state_tables
    _, (classes, *_) = bin_state_tables(one.scheme, one.torsion_set.types, 360)
    assert len(np.unique(classes)) > 1 and classes[0] != classes[-1]

    def half(self, side, seconds, frames):
        self.split = self.n // 2 + 1
    monkeypatch.setattr(FrameWork, "balance", half)
    cut = track(data.PSF, [data.DCD], threads=2, **kw)
    assert cut.states().equals(one.states())
    np.testing.assert_array_equal(cut.blocks["state_counts"], one.blocks["state_counts"])
    np.testing.assert_array_equal(cut.blocks["histograms"], one.blocks["histograms"])
