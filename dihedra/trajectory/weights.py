"""Per-frame weights of biased or reweighted runs, read from a CSV file (``--weights FILE[:COLUMN]``)."""

from __future__ import annotations

import os

import numpy as np
import pandas as pd

from ..errors import InputFileError
from .inputs import check_readable


def load_weights(spec, n_frames_per_replica):
    """Per-frame weights from ``FILE`` or ``FILE:COLUMN`` (CSV).

    The column is ``COLUMN``, else the one named ``weight``, else the last column. Rows are matched
    to analysed frames by the columns ``replica`` and ``frame`` when present, else in order (all
    replicas one after another).
    """
    path, _, column = str(spec).partition(":") if not os.path.exists(str(spec)) else (str(spec), "", "")
    check_readable(path, "weights file")
    try:
        table = pd.read_csv(path)
    except Exception as exc:  # noqa: BLE001
        raise InputFileError(f"weights file {path} is not a readable CSV table: {exc}.") from None
    if column:
        if column not in table.columns:
            raise InputFileError(f"weights file {path} has no column {column!r}; its columns are "
                                 f"{', '.join(map(str, table.columns))}.")
    else:
        column = "weight" if "weight" in table.columns else table.columns[-1]
    w = pd.to_numeric(table[column], errors="coerce").to_numpy(dtype=float)
    if np.any(~np.isfinite(w)) or np.any(w < 0):
        bad = int(np.flatnonzero(~np.isfinite(w) | (w < 0))[0])
        raise InputFileError(f"weights file {path}, column {column!r}: row {bad + 1} is not a finite "
                             f"non-negative number ({table[column].iloc[bad]!r}).")
    return w, column, table


def weights_per_replica(spec, frames_per_replica):
    """The weights of ``spec`` for the analysed frames of each replica (a list of arrays), and the
    column they came from; every analysed frame must have exactly one weight."""
    w, column, table = load_weights(spec, frames_per_replica)
    total = sum(len(f) for f in frames_per_replica)
    if "frame" in table.columns:
        rep = _index_column(table, "replica", spec) if "replica" in table.columns else np.zeros(len(table), int)
        frame = _index_column(table, "frame", spec)
        dup = pd.DataFrame({"replica": rep, "frame": frame}).duplicated(keep=False).to_numpy()
        if dup.any():
            k0 = int(np.flatnonzero(dup)[0])
            same = np.flatnonzero((rep == rep[k0]) & (frame == frame[k0]))
            raise InputFileError(f"weights file {spec} gives replica {rep[k0]}, frame {frame[k0]} {len(same)} times "
                                 f"(rows {', '.join(str(k + 1) for k in same[:5])}); give one weight per frame.")
        lookup = {(int(r), int(f)): x for r, f, x in zip(rep, frame, w)}
        out = []
        for r, frames in enumerate(frames_per_replica):
            missing = [int(f) for f in frames if (r, int(f)) not in lookup]
            if missing:
                raise InputFileError(f"weights file {spec} has no weight for replica {r}, frame {missing[0]} "
                                     f"({len(missing)} analysed frames are missing).")
            out.append(np.array([lookup[(r, int(f))] for f in frames]))
    else:
        if len(w) != total:
            raise InputFileError(f"weights file {spec} has {len(w)} rows but {total} frames are analysed; "
                                 "give one weight per analysed frame (replicas one after another), or "
                                 "add 'replica' and 'frame' columns.")
        out, k = [], 0
        for frames in frames_per_replica:
            out.append(w[k:k + len(frames)])
            k += len(frames)
    if sum(float(x.sum()) for x in out) <= 0:
        raise InputFileError(f"weights file {spec}: all weights of the analysed frames are zero.")
    return out, column


def _index_column(table, name, spec):
    """A 'replica' or 'frame' column of a weights file as integers (every cell a whole number)."""
    values = pd.to_numeric(table[name], errors="coerce").to_numpy(dtype=float)
    bad = ~np.isfinite(values) | (values != np.round(values)) | (values < 0)
    if bad.any():
        k = int(np.flatnonzero(bad)[0])
        raise InputFileError(f"weights file {spec}, column {name!r}, row {k + 1}: {table[name].iloc[k]!r} is not a "
                             "whole number >= 0.")
    return values.astype(np.int64)


#: Below this Kish effective fraction of the analysed frames, a weighted run says it rests on few.
MIN_KISH_FRACTION = 0.1


def weight_notices(weight_arrays):
    """Sentences on weights that leave little: replicas whose analysed frames all weigh 0, and a
    Kish effective sample size, (sum w)^2 / sum w^2 (Kish, Survey Sampling, Wiley 1965), below
    :data:`MIN_KISH_FRACTION` of the analysed frames."""
    arrays = [np.asarray(w, dtype=float) for w in weight_arrays if w is not None]
    if not arrays:
        return []
    out = []
    empty = [r + 1 for r, w in enumerate(weight_arrays) if w is not None and len(w) and not np.any(np.asarray(w) > 0)]
    if empty:
        out.append(f"the weights of replica(s) {', '.join(map(str, empty))} are all 0 over the analysed frames: "
                   "they contribute nothing to the results.")
    w = np.concatenate(arrays)
    n_eff = float(w.sum()) ** 2 / float(np.sum(w ** 2)) if np.any(w > 0) else 0.0
    if len(w) and n_eff < MIN_KISH_FRACTION * len(w):
        out.append(f"the weights leave about {n_eff:.0f} effective frames of {len(w)} (Kish): the reweighted results "
                   "rest on few frames, and their errors are rough.")
    return out
