"""dihedra's compiled XTC decoder gives what MDAnalysis' XTC reader gives, bit for bit.

The reference is MDAnalysis itself (its XTCReader, the xdrfile library of GROMACS): on the XTC
files that MDAnalysisTests ships, and on files written by MDAnalysis' XTCWriter that reach every
branch of the format (fewer than 10 atoms stored as plain floats, coordinate ranges wider than
2^24 precision units, packed integers of 53-72 bits, small integers whose bit size adapts up and
down, negative coordinates, a triclinic box), with frames read in steps, with ``dt`` and
``time_offset`` given to the reader, and where the decoder hands a frame back to MDAnalysis."""

import glob
import os
import warnings

import numpy as np
import pytest

pytest.importorskip("numba")

import MDAnalysis as mda  # noqa: E402
from MDAnalysis.coordinates.XTC import XTCReader  # noqa: E402

from dihedra.trajectory import trajread  # noqa: E402
from dihedra.trajectory.overlap import LaterFrames  # noqa: E402


def _read_both(path, frames=None, n_later=0, **reader_kwargs):
    """(positions, dimensions, frames, times) from the decoder and from MDAnalysis; with
    ``n_later``, the last frames are left undecoded by ``read`` and decoded by ``decode_later``
    (as the second thread of a pass does)."""
    reader = XTCReader(path, **reader_kwargs)
    source = trajread.xtc_frames(reader)
    assert source is not None
    frames = np.arange(reader.n_frames) if frames is None else np.asarray(frames)
    n = len(frames)
    got = (np.empty((n, reader.n_atoms, 3), np.float32), np.empty((n, 6), np.float32),
           np.empty(n, np.int64), np.empty(n, np.float64))
    later = LaterFrames()
    source.read(frames, *got, later=later, n_later=n_later)
    assert later.n == min(n_later, n)
    source.decode_later(later)
    assert later.n == 0
    source.close()
    ref = (np.empty_like(got[0]), np.empty_like(got[1]), np.empty_like(got[2]), np.empty_like(got[3]))
    for k, f in enumerate(frames):
        ts = reader[int(f)]
        ref[0][k] = ts.positions
        ref[1][k] = ts.dimensions if ts.dimensions is not None else np.nan
        ref[2][k] = ts.frame
        ref[3][k] = ts.time
    return got, ref


def _assert_same(got, ref):
    np.testing.assert_array_equal(got[0].view(np.uint32), ref[0].view(np.uint32))   # same bits
    np.testing.assert_array_equal(got[1], ref[1])
    np.testing.assert_array_equal(got[2], ref[2])
    np.testing.assert_array_equal(got[3], ref[3])


def _mdanalysis_test_xtcs():
    from MDAnalysisTests import datafiles

    return sorted(glob.glob(os.path.join(os.path.dirname(datafiles.XTC), "*.xtc")))


@pytest.mark.parametrize("n_later", [0, 2])
@pytest.mark.parametrize("path", _mdanalysis_test_xtcs(), ids=os.path.basename)
def test_mdanalysis_test_files_decode_to_the_same_bits(path, n_later):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        _assert_same(*_read_both(path, n_later=n_later))


def _write(path, frames, box=(50.0, 50.0, 50.0, 90.0, 90.0, 90.0)):
    u = mda.Universe.empty(len(frames[0]), trajectory=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with mda.Writer(str(path), len(frames[0])) as w:
            for f, xyz in enumerate(frames):
                u.atoms.positions = xyz
                u.dimensions = box
                u.trajectory.ts.time = 2.5 * f
                w.write(u.atoms)
    return str(path)


def _clusters(rng, n, spread, lo, hi, frames=3):
    centres = rng.uniform(lo, hi, (n, 1, 3))
    return [(centres + rng.normal(0, spread, (n, 5, 3))).reshape(-1, 3) for _ in range(frames)]


CASES = {
    # name: (frames of coordinates in Angstrom, box)
    "plain-floats": (lambda rng: [rng.uniform(0, 10, (7, 3)) for _ in range(3)], None),
    "ten-atoms-triclinic": (lambda rng: [rng.uniform(0, 10, (10, 3)) for _ in range(3)],
                            (30.0, 40.0, 50.0, 70.0, 80.0, 100.0)),
    "random-walks": (lambda rng: [np.cumsum(rng.normal(0, s, (3000, 3)), axis=0) for s in (0.5, 5.0, 50.0)], None),
    "beyond-2^24-units": (lambda rng: _clusters(rng, 40, 1.5, -1e5, 2e5), None),   # 30,000 nm
    "packed-66-bits": (lambda rng: _clusters(rng, 40, 1.5, 0.0, 4e4), None),       # 4,000 nm
    "packed-66-bits-spread": (lambda rng: [rng.uniform(0, 4e4, (200, 3)) for _ in range(3)], None),
    "mixed-scales": (lambda rng: [np.concatenate([rng.normal(0, 0.3, (500, 3)), rng.uniform(-3e3, 3e3, (50, 3)),
                                                  rng.normal(100, 1, (500, 3))]) for _ in range(3)], None),
    "negative": (lambda rng: [rng.uniform(-500, -10, (400, 3)) for _ in range(3)], None),
}


@pytest.mark.parametrize("name", list(CASES))
def test_every_branch_of_the_format_decodes_to_the_same_bits(tmp_path, name):
    make, box = CASES[name]
    frames = make(np.random.default_rng(11))
    path = _write(tmp_path / f"{name}.xtc", frames, **({} if box is None else {"box": box}))
    _assert_same(*_read_both(path))


def test_stepped_frames_dt_and_time_offset(tmp_path):
    rng = np.random.default_rng(5)
    path = _write(tmp_path / "walk.xtc", [np.cumsum(rng.normal(0, 1, (500, 3)), axis=0) for _ in range(9)])
    _assert_same(*_read_both(path, frames=[0, 2, 3, 4, 8]))
    got, ref = _read_both(path, frames=[1, 5, 6], dt=4.0, time_offset=100.0)
    _assert_same(got, ref)
    assert got[3].tolist() == [104.0, 120.0, 124.0]   # frame * dt + offset
    for n_later in (1, 3):   # the last frames decoded apart: their times from their own headers or dt
        _assert_same(*_read_both(path, frames=[0, 2, 3, 4, 8], n_later=n_later))
        got, ref = _read_both(path, frames=[1, 5, 6], n_later=n_later, dt=4.0, time_offset=100.0)
        _assert_same(got, ref)
        assert got[3].tolist() == [104.0, 120.0, 124.0]
    got, ref = _read_both(path, frames=[3], time_offset=10.0)
    _assert_same(got, ref)
    assert got[3][0] == 10.0 + 2.5 * 3


def test_a_frame_the_decoder_does_not_take_is_read_by_mdanalysis(tmp_path, monkeypatch):
    """Consecutive atoms thousands of nm apart drive the small-integer size past the library's
    table (which the library then reads beyond); such a batch is read again by MDAnalysis."""
    rng = np.random.default_rng(3)
    path = _write(tmp_path / "far.xtc", [rng.uniform(-1e5, 2e5, (50, 3)) for _ in range(3)])
    from dihedra.trajectory import _xtc

    calls = []
    original = trajread.XTCFrames._read_by_mdanalysis
    monkeypatch.setattr(trajread.XTCFrames, "_read_by_mdanalysis",
                        lambda self, *a: (calls.append(len(a[0])), original(self, *a)))
    got, ref = _read_both(path)
    _assert_same(got, ref)
    assert calls == [3]
    # the same frames left to the second thread: it hands them to MDAnalysis
    calls.clear()
    _assert_same(*_read_both(path, n_later=3))
    assert calls == [3]
    assert _xtc.BAD_DATA != _xtc.OK


def test_where_the_decoder_is_not_used(tmp_path, monkeypatch):
    from MDAnalysis.transformations import translate
    from MDAnalysisTests.datafiles import GRO, XTC

    assert trajread.xtc_frames(mda.Universe(GRO, XTC).trajectory) is not None
    u = mda.Universe(GRO, XTC)
    u.trajectory.add_transformations(translate([1.0, 0.0, 0.0]))
    assert trajread.xtc_frames(u.trajectory) is None               # transformations
    assert trajread.xtc_frames(XTCReader(XTC, convert_units=False)) is None
    assert trajread.xtc_frames(mda.Universe(GRO).trajectory) is None   # not XTC
    monkeypatch.setenv(trajread.NO_DECODER_ENV, "1")
    assert trajread.xtc_frames(mda.Universe(GRO, XTC).trajectory) is None


def test_a_truncated_file_gives_mdanalysis_error(tmp_path):
    rng = np.random.default_rng(2)
    path = _write(tmp_path / "full.xtc", [rng.uniform(0, 40, (300, 3)) for _ in range(4)])
    data = open(path, "rb").read()
    cut = tmp_path / "cut.xtc"
    cut.write_bytes(data[:len(data) - 200])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        reader = XTCReader(str(cut))
        source = trajread.xtc_frames(reader)
        n = reader.n_frames
        out = (np.empty((n, 300, 3), np.float32), np.empty((n, 6), np.float32), np.empty(n, np.int64),
               np.empty(n, np.float64))
        with pytest.raises(OSError) as ours:
            source.read(np.arange(n), *out)
        later = LaterFrames()   # (a truncated frame is never left to the other thread)
        with pytest.raises(OSError) as ours_later:
            source.read(np.arange(n), *out, later=later, n_later=2)
        assert str(ours_later.value) == str(ours.value) and later.n == 0
        with pytest.raises(OSError) as theirs:   # MDAnalysis reading the frame, as a pass does
            reader[n - 1]
    assert str(ours.value) == str(theirs.value)
