"""Counters kept in the narrowest integer type that their largest possible value fits.

The trajectory pass counts frames per block, torsion and fine bin (and per conformer group and
joint state). Most cells of a block stay small (a few hundred frames per block spread over 360
bins), so the counts start as ``uint8`` and are widened, whole array at once, to ``uint16``,
``int32`` and ``int64`` only when the next update could pass the type's maximum: a quarter of
the memory of ``int32`` counts for runs of up to about 4,000 frames per block and flat beyond,
with the same integers (common practice: counters sized to their bound).
"""

from __future__ import annotations

import numpy as np

#: The types a counter goes through as it grows.
COUNTER_TYPES = (np.dtype(np.uint8), np.dtype(np.uint16), np.dtype(np.int32), np.dtype(np.int64))


def counter_type(top):
    """The narrowest of :data:`COUNTER_TYPES` that holds every count up to ``top``.

    Examples
    --------
    >>> counter_type(255), counter_type(256), counter_type(70_000)
    (dtype('uint8'), dtype('uint16'), dtype('int32'))
    """
    for dtype in COUNTER_TYPES:
        if top <= np.iinfo(dtype).max:
            return dtype
    raise OverflowError(f"a count of {top} does not fit in 64 bits")


def fit_counts(array, top):
    """``array`` itself when its type holds every count up to ``top``, else a copy widened to
    :func:`counter_type` ``(top)`` (float arrays, weighted sums, are returned as they are).

    Examples
    --------
    >>> a = np.full(3, 250, dtype=np.uint8)
    >>> fit_counts(a, 255) is a, fit_counts(a, 300).dtype
    (True, dtype('uint16'))
    """
    if array.dtype.kind == "f" or top <= np.iinfo(array.dtype).max:
        return array
    return array.astype(counter_type(top))


def narrowest(array, top):
    """``array`` in the narrowest counter type that holds ``top`` (its largest count), when
    that is narrower than its own type (for handing counts over: fewer bytes to write and read)."""
    if array.dtype.kind == "f":
        return array
    dtype = counter_type(top)
    return array.astype(dtype) if dtype.itemsize < array.dtype.itemsize else array
