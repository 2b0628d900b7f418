"""write_table writes exactly the text of pandas' to_csv (reference library: pandas); block sums and
chunk files read back with NumPy equal what was written."""

import numpy as np
import pandas as pd
import pytest

from dihedra.io.resultsdir import write_table


@pytest.mark.parametrize("float_format", ["%.6g", "%.3f"])
def test_plain_tables_are_written_as_pandas_writes_them(tmp_path, float_format):
    rng = np.random.default_rng(0)
    frame = pd.DataFrame({
        "torsion": ["C1-C2-C3-C4", 'say "hi"', "a,b", "line\nbreak", "", "x y"] * 5,
        "angle_deg": np.r_[rng.normal(0, 100, 25), [np.nan, np.inf, -np.inf, -0.0, 1e-300]],
        "weight": rng.random(30).astype(np.float32),
        "frames": rng.integers(-5, 10**12, 30),
        "flag": rng.random(30) > 0.5,
        "odd, name": np.arange(30, dtype=np.uint8),
    })
    ours = write_table(frame, tmp_path, "ours.csv", float_format=float_format)
    frame.to_csv(tmp_path / "pandas.csv", index=False, float_format=float_format)
    assert open(ours, "rb").read() == open(tmp_path / "pandas.csv", "rb").read()


def test_other_column_types_go_through_pandas(tmp_path):
    frame = pd.DataFrame({"n": pd.array([1, None, 3], dtype="Int64"), "c": pd.Categorical(["a", "b", "a"]),
                          "mixed": ["a", 1.5, None]})
    ours = write_table(frame, tmp_path, "ours.csv")
    frame.to_csv(tmp_path / "pandas.csv", index=False, float_format="%.6g")
    assert open(ours, "rb").read() == open(tmp_path / "pandas.csv", "rb").read()


@pytest.mark.parametrize("text_dtype", [object, "str"])
def test_rows_written_in_parts_give_the_same_text(tmp_path, text_dtype):
    """Text that needs no quotes is joined without the csv module: the same text, empty fields
    included, for object and pandas string columns."""
    from dihedra.io.resultsdir import _write_plain_csv

    frame = pd.DataFrame({"state": pd.Series(["anti", "gauche+", "", "x|y:z-1"] * 8, dtype=text_dtype),
                          "population": np.r_[np.linspace(0, 1, 30), np.nan, 1e-7],
                          "frames": np.arange(32)})
    assert _write_plain_csv(frame, tmp_path / "parts.csv", "%.6g", rows_per_part=7)
    frame.to_csv(tmp_path / "pandas.csv", index=False, float_format="%.6g")
    assert open(tmp_path / "parts.csv", "rb").read() == open(tmp_path / "pandas.csv", "rb").read()


@pytest.mark.parametrize("top, stored", [(200, np.uint8), (60_000, np.uint16), (70_000, np.int32)])
def test_histograms_stored_narrow_read_back_equal(tmp_path, top, stored):
    """save_npz narrows non-negative counts to the smallest unsigned type (checked against
    NumPy's own np.load), and load_results' widening gives the int32 array back."""
    from dihedra.io.resultsdir import narrowed_type, save_npz

    rng = np.random.default_rng(1)
    hist = rng.integers(0, top + 1, size=(3, 5, 360)).astype(np.int32)
    hist[0, 0, 0] = top
    frames = rng.integers(0, 5, size=4)   # int64, not listed: stored as is
    arrays = {"histograms": hist, "block_frames": frames, "state_counts": hist[:, :, :3].astype(np.int64),
              "conformer_counts_w3": hist[:, :4, :27].copy()}
    assert [narrowed_type(k) for k in arrays] == [np.int32, None, np.int64, np.int32]
    path = tmp_path / "blocks.npz"
    save_npz(path, arrays, narrow=[k for k in arrays if narrowed_type(k)])
    with np.load(path) as npz:
        assert npz["histograms"].dtype == np.dtype(stored)
        assert npz["block_frames"].dtype == frames.dtype
        np.testing.assert_array_equal(npz["histograms"].astype(np.int32), hist)
        np.testing.assert_array_equal(npz["block_frames"], frames)
        for name in ("state_counts", "conformer_counts_w3"):   # narrow where uint8/16 holds them
            narrow = np.dtype(stored).kind == "u"
            assert npz[name].dtype == (np.dtype(stored) if narrow else arrays[name].dtype)
            np.testing.assert_array_equal(npz[name], arrays[name])


def test_negative_or_float_arrays_are_not_narrowed(tmp_path):
    from dihedra.io.resultsdir import save_npz

    neg = np.array([[-1, 2], [3, 4]], dtype=np.int32)
    flt = np.array([0.5, 2.0])
    save_npz(tmp_path / "b.npz", {"histograms": neg, "other": flt}, narrow=("histograms", "other"))
    with np.load(tmp_path / "b.npz") as npz:
        assert npz["histograms"].dtype == np.int32 and npz["other"].dtype == np.float64
        np.testing.assert_array_equal(npz["histograms"], neg)


@pytest.mark.parametrize("shape", [(7, 3), (300, 1500), (64, 2049)])
def test_frames_transposed_into_the_chunk_with_and_without_the_kernels(shape):
    """Frames transposed into a chunk (a column slice of a wider buffer) equal NumPy's transpose,
    and nothing around the slice changes (reference: NumPy)."""
    from dihedra.numerics.angles import compiled_kernels
    from dihedra.trajectory.trackpass import _transpose

    block = np.random.default_rng(2).integers(-1, 3, size=shape).astype(np.int8)
    for kernels in (compiled_kernels(), None):
        chunk = np.full((shape[1], shape[0] + 9), 7, dtype=np.int8)
        _transpose(block, chunk[:, 4:4 + shape[0]], kernels)
        np.testing.assert_array_equal(chunk[:, 4:4 + shape[0]], block.T)
        assert (chunk[:, :4] == 7).all() and (chunk[:, 4 + shape[0]:] == 7).all()
