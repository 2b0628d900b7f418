"""The block sums of a results folder: ``blocks.npz`` (state counts, conformer counts per block,
with block frames, weights and replicas) and ``histograms.parquet`` (the fine angle histograms per
block, the largest of them: rows of about 1 MB of counts, zstd-compressed, about three times
faster to write than zlib inside the ``.npz``; folders of earlier versions keep them in
``blocks.npz`` and are read as they are)."""

from __future__ import annotations

import json
import os

import numpy as np

from ..errors import InputFileError
from ..trajectory.result import NARROWED, BlockSums, narrowed_type

__all__ = ["HISTOGRAMS_FILE", "NARROWED", "BlockSums", "HistogramFile", "damaged_file", "load_blocks",
           "narrowed_type", "save_blocks", "save_histograms", "save_npz"]

#: The file of the fine histograms in a results folder.
HISTOGRAMS_FILE = "histograms.parquet"
#: Schema metadata key of :data:`HISTOGRAMS_FILE`: the type and shape of the histogram array.
_META = b"dihedra.histograms"


def save_blocks(folder, arrays, narrow=()):
    """Write the block sums ``arrays`` (a mapping or :class:`BlockSums`) into ``folder``: the fine
    histograms into :data:`HISTOGRAMS_FILE` (:func:`save_histograms`), the rest into
    ``blocks.npz`` (:func:`save_npz`)."""
    arrays = dict(getattr(arrays, "stored", arrays))
    hist = arrays.pop("histograms", None)
    save_npz(os.path.join(folder, "blocks.npz"), arrays, narrow=narrow)
    if hist is not None:
        save_histograms(os.path.join(folder, HISTOGRAMS_FILE), hist, arrays.get("hist_block_replica"),
                        narrow="histograms" in narrow)


#: Blocks of this many bytes and more are stored with 64-bit offsets (Arrow's large_binary).
LARGE_BLOCK_BYTES = 2 ** 31 - 1
#: Bytes of counts per row of :data:`HISTOGRAMS_FILE` (a block is split by torsions into rows of
#: about this size: Parquet's page and compression buffers stay small for any number of torsions).
HISTOGRAM_ROW_BYTES = 1 << 20


def save_histograms(path, hist, block_replica=None, narrow=True, level=1):
    """Write a histogram array of shape (n_blocks, n_torsions, n_bins) as Parquet, one block in
    memory at a time: rows of columns ``block``, ``replica``, ``first_torsion`` and ``counts``
    (binary: the counts of consecutive torsions from ``first_torsion`` on, n_bins values each, in
    the type named in the schema metadata ``dihedra.histograms``, which also gives the shape);
    zstd level ``level``. Integer counts are stored in the smallest unsigned type that holds them
    (``narrow``); a histogram kept in parts (:class:`~dihedra.trajectory.result.BlockParts`) is
    written as kept."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    if hasattr(hist, "materialize") and not hasattr(hist, "block"):   # in a file: read it
        hist = hist.materialize()
    if not hasattr(hist, "block"):
        hist = np.ascontiguousarray(hist)
        small = _narrow_dtype(hist) if narrow else None
        if small is not None:
            hist = hist.astype(small)
    shape, dtype = tuple(int(x) for x in hist.shape), np.dtype(hist.dtype)
    replica = np.zeros(shape[0], dtype=np.int64) if block_replica is None else np.asarray(block_replica)
    meta = {"dtype": dtype.str, "shape": list(shape), "order": "C",
            "axes": ["block", "torsion (torsions.csv order)", "bin (bin_edges_deg of blocks.npz)"]}
    per_torsion = int(np.prod(shape[2:], dtype=np.int64)) * dtype.itemsize
    binary, offset_type = ((pa.large_binary(), np.int64) if shape[1] * per_torsion >= LARGE_BLOCK_BYTES
                           else (pa.binary(), np.int32))
    schema = pa.schema([("block", pa.int32()), ("replica", pa.int32()), ("first_torsion", pa.int32()),
                        ("counts", binary)], metadata={_META: json.dumps(meta).encode()})
    step = max(1, HISTOGRAM_ROW_BYTES // max(1, per_torsion))
    firsts = np.arange(0, shape[1], step, dtype=np.int64) if shape[1] else np.zeros(1, dtype=np.int64)
    offsets = np.append(firsts, shape[1]) * per_torsion
    with pq.ParquetWriter(path, schema, compression="zstd", compression_level=level, use_dictionary=False,
                          write_statistics=["block", "replica", "first_torsion"]) as writer:
        for b in range(shape[0]):
            block = np.ascontiguousarray(hist.block(b) if hasattr(hist, "block") else hist[b], dtype=dtype)
            counts = pa.Array.from_buffers(binary, len(firsts), [None, pa.py_buffer(offsets.astype(offset_type)),
                                                                  pa.py_buffer(block)])   # (no copy)
            n = len(firsts)
            writer.write_table(pa.table({"block": pa.array(np.full(n, b, np.int32)),
                                         "replica": pa.array(np.full(n, int(replica[b]), np.int32)),
                                         "first_torsion": pa.array(firsts.astype(np.int32)), "counts": counts},
                                        schema=schema), row_group_size=1)   # (Arrow buffers a row group)
            del block, counts   # (before the next block is read)


class HistogramFile:
    """The histograms of :data:`HISTOGRAMS_FILE`, read when first needed (:meth:`materialize`);
    their :attr:`shape` and :attr:`dtype` are known from the file's metadata without reading."""

    def __init__(self, path):
        import pyarrow.parquet as pq

        self.path = path
        try:
            meta = json.loads(pq.read_schema(path).metadata[_META])
            self.shape = tuple(int(x) for x in meta["shape"])
            self.dtype = np.dtype(meta["dtype"])
        except Exception as exc:  # noqa: BLE001 - any unreadable file is the same error for a user
            raise damaged_file(path, exc) from None
        self.ndim = len(self.shape)

    def materialize(self):
        import pyarrow.parquet as pq

        out = np.zeros(self.shape, dtype=self.dtype)
        try:
            pf = pq.ParquetFile(self.path)
            for g in range(pf.num_row_groups):
                table = pf.read_row_group(g, columns=["block", "first_torsion", "counts"])
                rows = zip(table.column("block").to_pylist(), table.column("first_torsion").to_pylist(),
                           table.column("counts").combine_chunks())
                for b, first, value in rows:
                    counts = np.frombuffer(value.as_buffer(), dtype=self.dtype).reshape((-1,) + self.shape[2:])
                    out[b, first:first + len(counts)] = counts
        except InputFileError:
            raise
        except Exception as exc:  # noqa: BLE001
            raise damaged_file(self.path, exc) from None
        return out


def damaged_file(path, what):
    """The error of a results folder's file that cannot be read as written (``what``: a text, or
    the exception that reading it raised)."""
    if isinstance(what, BaseException):
        what = f"{type(what).__name__}: {str(what).strip()[:120]}"
    return InputFileError(f"{path} is damaged ({what}); the results folder was cut or changed by hand: run "
                          "'dihedra track' again.")


def save_npz(path, arrays, level=1, narrow=()):
    """``np.savez_compressed`` with a chosen zlib level (1: about 4 times faster than numpy's
    default on large histograms, files about 1.5 times larger); read it with ``np.load``.

    Integer arrays named in ``narrow`` whose values are all non-negative are stored in the
    smallest unsigned type that holds their maximum (uint8 or uint16; converted in pieces of
    16 MB): a histogram of a few thousand frames then compresses two to four times faster and
    the file is smaller. :func:`load_results` widens them back (see :data:`NARROWED`). A
    :class:`~dihedra.trajectory.result.BlockSums` is written as it is kept (narrow arrays are not
    widened first).
    """
    import zipfile

    arrays = getattr(arrays, "stored", arrays)

    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED, compresslevel=level,
                         allowZip64=True) as zf:
        for name, value in arrays.items():
            if hasattr(value, "materialize") and not hasattr(value, "block"):   # in a file (HistogramFile)
                value = value.materialize()
            value = value if hasattr(value, "block") else np.asanyarray(value)
            with zf.open(f"{name}.npy", "w", force_zip64=True) as fh:
                if hasattr(value, "block"):   # kept in parts (BlockParts): written block by block
                    _write_blocks(fh, value)
                    continue
                small = _narrow_dtype(value) if name in narrow else None
                if small is None:
                    np.lib.format.write_array(fh, value, allow_pickle=False)
                    continue
                np.lib.format.write_array_header_1_0(
                    fh, {"descr": np.lib.format.dtype_to_descr(small), "fortran_order": False,
                         "shape": value.shape})
                flat = value.reshape(-1)
                step = max(1, (16 << 20) // value.itemsize)
                for lo in range(0, len(flat), step):
                    fh.write(flat[lo:lo + step].astype(small))


def _write_blocks(fh, parts):
    """An array kept in parts (:class:`~dihedra.trajectory.result.BlockParts`, already in the
    narrowest type of its counts) written as one ``.npy``, one block in memory at a time."""
    np.lib.format.write_array_header_1_0(
        fh, {"descr": np.lib.format.dtype_to_descr(parts.dtype), "fortran_order": False, "shape": parts.shape})
    for b in range(len(parts)):
        fh.write(np.ascontiguousarray(parts.block(b)))   # (no copy into bytes)


def _narrow_dtype(value):
    """uint8 or uint16 when every value of an integer array fits, else ``None``."""
    if value.dtype.kind not in "iu" or value.size == 0 or not value.flags.c_contiguous:
        return None
    if value.min() < 0:
        return None
    top = value.max()
    for small in (np.uint8, np.uint16):
        if top <= np.iinfo(small).max and np.dtype(small).itemsize < value.itemsize:
            return np.dtype(small)
    return None


def load_blocks(path):
    """The arrays of a ``blocks.npz`` as :class:`~dihedra.trajectory.result.BlockSums`: those
    stored narrow are widened back to their type when read; the histograms of
    :data:`HISTOGRAMS_FILE` beside it (a :class:`HistogramFile`) when first read."""
    with np.load(path) as npz:
        blocks = BlockSums({k: npz[k] for k in npz.files})
    beside = os.path.join(os.path.dirname(os.path.abspath(path)), HISTOGRAMS_FILE)
    if "histograms" not in blocks.stored and os.path.exists(beside):
        blocks["histograms"] = HistogramFile(beside)
    return blocks
