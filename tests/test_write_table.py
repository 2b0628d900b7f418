"""Tables read back with plain pandas (reference library: pandas); block sums and chunk files read
back with NumPy equal what was written."""

import numpy as np
import pandas as pd
import pytest

from dihedra.io.tables import write_table


def test_tables_read_back_with_plain_pandas(tmp_path):
    """Every table reads back with a plain pandas.read_csv (reference library: pandas): floats
    exactly equal, NaN as empty cells, booleans as booleans, text with commas, quotes and line
    breaks quoted, integers exact."""
    rng = np.random.default_rng(0)
    frame = pd.DataFrame({
        "torsion": ["C1-C2-C3-C4", 'say "hi"', "a,b", "line\nbreak", "x", "x y"] * 5,
        "angle_deg": np.r_[rng.normal(0, 100, 26), [np.nan, -0.0, 1e-30, 12345.678]],
        "frames": rng.integers(-5, 10**12, 30),
        "flag": rng.random(30) > 0.5,
        "odd, name": np.arange(30, dtype=np.uint8),
    })
    path = write_table(frame, tmp_path, "t.csv")
    back = pd.read_csv(path, keep_default_na=False, na_values=[""])
    assert list(back.columns) == list(frame.columns)
    assert back["torsion"].tolist() == frame["torsion"].tolist()
    np.testing.assert_array_equal(back["frames"], frame["frames"])
    np.testing.assert_array_equal(back["odd, name"], frame["odd, name"])
    assert back["flag"].dtype == bool and (back["flag"] == frame["flag"]).all()
    np.testing.assert_array_equal(back["angle_deg"], frame["angle_deg"])
    pd.testing.assert_frame_equal(back.drop(columns="torsion"), frame.drop(columns="torsion"), check_dtype=False)


def test_long_tables_are_written_in_single_precision(tmp_path, monkeypatch):
    """Tables longer than EXACT_ROWS carry the shortest float32 text of each value (reference:
    NumPy's float32 rounding)."""
    from dihedra.io import tables

    monkeypatch.setattr(tables, "EXACT_ROWS", 10)
    x = np.random.default_rng(3).normal(0, 100, 50)
    back = pd.read_csv(write_table(pd.DataFrame({"x": x}), tmp_path, "long.csv"))
    np.testing.assert_array_equal(back["x"].to_numpy(np.float32), x.astype(np.float32))
    assert not np.array_equal(back["x"].to_numpy(), x)


def test_a_table_in_parts_gives_the_same_text(tmp_path, monkeypatch):
    """Rows formatted part by part (threads) give the text of one part."""
    from dihedra.io import tables

    frame = pd.DataFrame({"state": ["anti", "gauche+", "", "x|y:z-1"] * 8,
                          "population": np.r_[np.linspace(0, 1, 30), np.nan, 1e-7],
                          "frames": np.arange(32)})
    whole = open(write_table(frame, tmp_path, "whole.csv"), "rb").read()
    monkeypatch.setattr(tables, "_ROWS_PER_PART", 7)
    assert open(write_table(frame, tmp_path, "parts.csv"), "rb").read() == whole


def test_categorical_columns_in_parts_read_back_as_their_text(tmp_path, monkeypatch):
    """Categorical columns (the type and torsion labels of the profiles) are written as their
    text part by part, their categories made once per table; a missing value is an empty cell
    (reference library: pandas)."""
    from dihedra.io import tables

    labels = [f"RES{k}:C1-C2-C3-C4" for k in range(500)] + ["a,b"]
    codes = np.r_[np.arange(501), np.arange(499, -1, -1), [-1, 3]]
    frame = pd.DataFrame({"torsion": pd.Categorical.from_codes(codes, categories=labels),
                          "estimate": pd.Categorical.from_codes(codes % 2, categories=["histogram", "kernel"]),
                          "value": np.arange(len(codes), dtype=float) / 7})
    monkeypatch.setattr(tables, "_ROWS_PER_PART", 97)
    back = pd.read_csv(write_table(frame, tmp_path, "cat.csv"), keep_default_na=False, na_values=[""])
    expected = [labels[c] if c >= 0 else np.nan for c in codes]
    assert back["torsion"].tolist()[:-2] == expected[:-2] and np.isnan(back["torsion"].iloc[-2])
    assert back["torsion"].iloc[-1] == labels[3]
    assert back["estimate"].tolist() == [["histogram", "kernel"][c % 2] for c in codes]
    np.testing.assert_array_equal(back["value"], frame["value"])


@pytest.mark.parametrize("top, stored", [(200, np.uint8), (60_000, np.uint16), (70_000, np.int32)])
def test_histograms_stored_narrow_read_back_equal(tmp_path, top, stored):
    """save_npz narrows non-negative counts to the smallest unsigned type (checked against
    NumPy's own np.load), and load_results' widening gives the int32 array back."""
    from dihedra.io.blocks import narrowed_type, save_npz

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
    from dihedra.io.blocks import save_npz

    neg = np.array([[-1, 2], [3, 4]], dtype=np.int32)
    flt = np.array([0.5, 2.0])
    save_npz(tmp_path / "b.npz", {"histograms": neg, "other": flt}, narrow=("histograms", "other"))
    with np.load(tmp_path / "b.npz") as npz:
        assert npz["histograms"].dtype == np.int32 and npz["other"].dtype == np.float64
        np.testing.assert_array_equal(npz["histograms"], neg)


@pytest.mark.parametrize("top, stored", [(200, np.uint8), (60_000, np.uint16), (70_000, np.int32)])
def test_histogram_file_round_trip_read_with_plain_pyarrow(tmp_path, monkeypatch, top, stored):
    """save_blocks puts the histograms into histograms.parquet (narrowed as save_npz narrows) and
    the rest into blocks.npz; the file reads back equal through load_blocks (lazily: its shape is
    known before it is read) and, as the folder's documentation says, with pyarrow and NumPy
    alone (the reference readers)."""
    import json

    import pyarrow.parquet as pq

    from dihedra.io import blocks as blocks_module
    from dihedra.io.blocks import HistogramFile, load_blocks, narrowed_type, save_blocks

    # rows of three torsions (1 MB by default): a block spans several rows, the last one shorter
    monkeypatch.setattr(blocks_module, "HISTOGRAM_ROW_BYTES", 3 * 360 * np.dtype(stored).itemsize)
    rng = np.random.default_rng(2)
    hist = rng.integers(0, top + 1, size=(4, 7, 360)).astype(np.int32)
    hist[1, 2, 3] = top
    arrays = {"state_counts": hist[:, :, :3].astype(np.int64), "histograms": hist,
              "hist_block_replica": np.array([0, 0, 1, 1])}
    save_blocks(tmp_path, arrays, narrow=[k for k in arrays if narrowed_type(k)])
    with np.load(tmp_path / "blocks.npz") as npz:
        assert "histograms" not in npz.files
    blocks = load_blocks(tmp_path / "blocks.npz")
    lazy = blocks.stored["histograms"]
    assert isinstance(lazy, HistogramFile) and lazy.shape == hist.shape and lazy.dtype == np.dtype(stored)
    assert blocks["histograms"].dtype == np.int32
    np.testing.assert_array_equal(blocks["histograms"], hist)
    table = pq.read_table(tmp_path / "histograms.parquet")
    meta = json.loads(table.schema.metadata[b"dihedra.histograms"])
    assert meta["shape"] == list(hist.shape) and len(table) == 4 * 3   # 7 torsions: rows of 3, 3, 1
    assert table["replica"].to_pylist() == [0] * 6 + [1] * 6 and table["first_torsion"].to_pylist() == [0, 3, 6] * 4
    back = np.zeros(meta["shape"], np.dtype(meta["dtype"]))
    for b, first, value in zip(*(table[c].to_pylist() for c in ("block", "first_torsion", "counts"))):
        counts = np.frombuffer(value, np.dtype(meta["dtype"])).reshape(-1, meta["shape"][2])
        back[b, first:first + len(counts)] = counts
    np.testing.assert_array_equal(back, hist)


def test_histograms_kept_in_parts_and_weighted_histograms(tmp_path):
    """Histograms kept in parts (block files and non-empty cells, as a pass leaves them) are
    written block by block as their sum; float (weighted) histograms are kept as they are."""
    from dihedra.io.blocks import load_blocks, save_blocks
    from dihedra.trajectory.result import BlockParts

    rng = np.random.default_rng(3)
    whole = rng.integers(0, 9, size=(3, 5, 360)).astype(np.uint16)
    first = whole[0].copy()
    first.reshape(-1)[:10] = 0
    np.save(tmp_path / "part0.npy", first)
    cells = np.arange(10)
    parts = BlockParts([(0, str(tmp_path / "part0.npy")), (0, (cells, whole[0].reshape(-1)[:10])),
                        (1, whole[1]), (2, whole[2])], whole.shape, np.uint16)
    save_blocks(tmp_path, {"histograms": parts, "state_counts": np.zeros((3, 5, 3), np.int64)},
                narrow=["histograms"])
    np.testing.assert_array_equal(load_blocks(tmp_path / "blocks.npz")["histograms"], whole)
    weighted = rng.random((2, 5, 360))
    save_blocks(tmp_path, {"histograms": weighted, "state_counts": np.zeros((2, 5, 3))}, narrow=["histograms"])
    back = load_blocks(tmp_path / "blocks.npz")["histograms"]
    assert back.dtype == np.float64
    np.testing.assert_array_equal(back, weighted)


def test_histograms_of_an_earlier_folder_in_blocks_npz_and_a_damaged_file(tmp_path):
    """A blocks.npz that holds the histograms itself (folders of earlier versions) reads as it is;
    a histograms.parquet damaged inside (its footer intact) is an InputFileError naming the file
    when the histograms are read."""
    from dihedra.errors import InputFileError
    from dihedra.io.blocks import load_blocks, save_blocks, save_npz

    hist = np.arange(2 * 3 * 360, dtype=np.int32).reshape(2, 3, 360) % 7
    old = tmp_path / "old"
    old.mkdir()
    save_npz(old / "blocks.npz", {"histograms": hist, "state_counts": np.ones((2, 3, 3), np.int64)})
    np.testing.assert_array_equal(load_blocks(old / "blocks.npz")["histograms"], hist)
    save_blocks(tmp_path, {"histograms": hist, "state_counts": np.ones((2, 3, 3), np.int64)})
    path = tmp_path / "histograms.parquet"
    data = bytearray(path.read_bytes())
    data[40:200] = bytes(160)   # inside the first block's pages
    path.write_bytes(bytes(data))
    blocks = load_blocks(tmp_path / "blocks.npz")
    with pytest.raises(InputFileError, match="histograms.parquet is damaged"):
        blocks["histograms"]


def test_histograms_of_blocks_beyond_2_gb_use_64_bit_offsets(tmp_path, monkeypatch):
    """A block of 2 GB or more is written with Arrow's large_binary (64-bit offsets): made to
    happen here for a small block, which reads back equal."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from dihedra.io import blocks as blocks_module

    monkeypatch.setattr(blocks_module, "LARGE_BLOCK_BYTES", 1)
    hist = np.arange(2 * 5 * 360, dtype=np.int32).reshape(2, 5, 360) % 300
    blocks_module.save_blocks(tmp_path, {"histograms": hist, "state_counts": np.ones((2, 5, 3), np.int64)},
                              narrow=["histograms"])
    assert pq.read_schema(tmp_path / "histograms.parquet").field("counts").type == pa.large_binary()
    np.testing.assert_array_equal(blocks_module.load_blocks(tmp_path / "blocks.npz")["histograms"], hist)


def test_name_columns_are_read_as_text_however_long_the_table(tmp_path):
    # a profiles table: empty torsion cells in the types' rows, then labels in the torsions' rows,
    # long enough that pandas reads it in chunks (and otherwise warns of mixed types)
    import warnings

    from dihedra.io.tables import read_table

    n = 1_200_000
    torsion = [""] * (n // 2) + [f"H{k}" for k in range(n // 2)]
    (tmp_path / "t.csv").write_text("type,torsion,x\n" + "".join(f"H,{t},{k}\n" for k, t in enumerate(torsion)))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        frame = read_table(str(tmp_path), "t.csv")
    assert frame["torsion"].isna().sum() == n // 2 and frame["torsion"].iloc[-1] == f"H{n // 2 - 1}"
    assert frame["x"].dtype.kind == "i"
