"""The block sums of a results folder (``blocks.npz``): state counts, fine angle histograms and
conformer counts per block, with block frames, weights and replicas."""

from __future__ import annotations

import numpy as np

def save_npz(path, arrays, level=1, narrow=()):
    """``np.savez_compressed`` with a chosen zlib level (1: about 4 times faster than numpy's
    default on large histograms, files about 1.5 times larger); read it with ``np.load``.

    Integer arrays named in ``narrow`` whose values are all non-negative are stored in the
    smallest unsigned type that holds their maximum (uint8 or uint16; converted in pieces of
    16 MB): a histogram of a few thousand frames then compresses two to four times faster and
    the file is smaller. :func:`load_results` widens them back (see :data:`NARROWED`).
    """
    import zipfile

    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED, compresslevel=level,
                         allowZip64=True) as zf:
        for name, value in arrays.items():
            value = np.asanyarray(value)
            with zf.open(f"{name}.npy", "w", force_zip64=True) as fh:
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
                    fh.write(flat[lo:lo + step].astype(small).tobytes())


#: arrays of ``blocks.npz`` that may be stored narrow, and the type they are read back as (the
#: conformer counts by prefix: ``conformer_counts_w3`` for groups of three torsions, ...)
NARROWED = {"histograms": np.int32, "state_counts": np.int64, "conformer_counts_w": np.int32}


def narrowed_type(name):
    """The type an array of ``blocks.npz`` is read back as when it was stored narrow, or ``None``
    for an array that is always stored as it is (see :data:`NARROWED`)."""
    if name in NARROWED:
        return NARROWED[name]
    prefix = "conformer_counts_w"
    return NARROWED[prefix] if name.startswith(prefix) and name[len(prefix):].isdigit() else None


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
    """The arrays of a ``blocks.npz``, those stored narrow widened back to their type."""
    with np.load(path) as npz:
        blocks = {k: npz[k] for k in npz.files}
    for name in list(blocks):
        dtype = narrowed_type(name)
        if dtype is not None and blocks[name].dtype.kind == "u" and blocks[name].dtype.itemsize < np.dtype(dtype).itemsize:
            blocks[name] = blocks[name].astype(dtype)
    return blocks
