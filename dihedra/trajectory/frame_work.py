"""The per-frame torsion work of the trajectory pass, shared by the reading and the computing
thread.

One compiled call per batch of frames (:func:`dihedra.numerics._kernels.frames`) computes, for a
range of torsions, the angles, fine bins and state codes, and adds the state counts and the
undefined frames of those torsions. The torsions are independent of each other, so the range
can be cut in two: with a second thread, the thread that reads a batch also computes the first
``split`` torsions of it (:meth:`FrameWork.first_part`), and the computing thread the rest
(:meth:`FrameWork.second_part`) before it buffers the frames and adds the histograms, conformer
counts and time series. The cut follows the two threads' measured seconds per frame
(:meth:`FrameWork.balance`): fast formats (DCD) leave the reading thread idle, which then takes
up to half of the torsion work; a costly read (XTC, MDAnalysis' iteration) leaves it less. Both
parts write only their own torsions' cells, so the results do not depend on the cut. Where even
none of the torsion work leaves the reading thread the slower one (dihedra's XTC decoder, on a
large system), the computing thread decodes the last frames of some batches as well
(:meth:`FrameWork.later_frames`, :meth:`dihedra.trajectory.trajread.XTCFrames.decode_later`):
the same frames, decoded elsewhere.
"""

from __future__ import annotations

import time

import numpy as np

from .overlap import LaterFrames

#: Frames of both threads between two moves of the cut.
WINDOW = 128


class FrameWork:
    """The torsion work of frames, for a range of torsions at a time.

    Parameters
    ----------
    geometry : dihedra.numerics.angles.TorsionGeometry
        Atom indices (``idx3``), box parameters and the compiled kernels.
    bin_args : tuple
        The fine-bin and state arguments of the frame kernel: bin width, shifts, number of
        bins, the bin -> state tables of the scheme classes, the class of every torsion (sliced
        with the torsions of a part), boundaries, their numbers, closed starts and arc states
        per class, the mixed mark.
    state_counts : ndarray (n_state_blocks, n_torsions, n_states)
    undefined : ndarray (n_torsions,)
    frame_sblock, frame_weight : ndarray
        State block and weight of every frame of the pass (by position).
    core_bits : dihedra.trajectory.cores.CoreBits, optional
        Records whether each angle lies in its state's core (``cores.parquet``), torsion range by
        torsion range with the rest of the work.
    """

    def __init__(self, geometry, bin_args, state_counts, undefined, frame_sblock, frame_weight,
                 core_bits=None, type_key=None, n_keys=1):
        self.geometry = geometry
        self.kernels = geometry.kernels
        # where each atom's coordinates are in a frame (see gather_bonds): atom by atom, or as
        # the batch reader lays its frames out (use_layout)
        self.where, self.stride = geometry.idx3, 1
        self.n = geometry.n_torsions
        self.bin_head, self.classes, self.bin_tail = bin_args[:5], bin_args[5], bin_args[6:]
        self.state_counts, self.undefined = state_counts, undefined
        self.frame_sblock, self.frame_weight = frame_sblock, frame_weight
        self.core_bits = core_bits
        # per frame, the torsions of each type in each state (the convergence time blocks):
        # type_key[t] + code indexes a row of n_keys counts
        self.type_key = np.zeros(self.n, dtype=np.int64) if type_key is None else np.asarray(type_key, np.int64)
        self.n_keys = max(1, int(n_keys))
        self.split = 0
        #: share of the frames of a batch that the computing thread decodes (0 unless the
        #: reading thread is the slower one with none of the torsion work; set by balance)
        self.later_share = 0.0
        self._carry = 0.0
        # per thread since the last move of the cut: seconds, frames, seconds of torsion work,
        # seconds of decoding
        self._acc = _empty_acc()
        self._part_frames = 0   # torsion-frames computed in that time
        self._decoded = 0   # frames decoded in that time (both threads)
        self._bonds = [None, None]
        self._box_cache = [(None, None), (None, None)]   # (each thread its own)

    def use_layout(self, where, stride):
        """Frames come as the rows of a batch reader's layout (``positions`` (frames, words)):
        ``where`` of each atom's x and ``stride`` to its y and z (:func:`~dihedra.numerics._kernels.gather_bonds`)."""
        self.where, self.stride = where, int(stride)

    # -- the two parts --------------------------------------------------------------------------
    def first_part(self, batch):
        """In the reading thread: the box parameters of the batch and torsions ``[0, split)``
        (nothing for a batch with frames left to the computing thread to decode)."""
        later = getattr(batch, "later", None)
        if later is not None and later.n:
            batch.boxes, batch.split = None, 0
            return
        batch.boxes = self.box_rows(batch.dimensions[:batch.n], 0)
        batch.split = self.split
        self._part(batch, 0, batch.split, 0)

    def second_part(self, batch):
        """In the computing thread: torsions ``[split, n)`` of the batch (all of them when the
        reading thread did none; the box parameters too when it did not set them)."""
        if getattr(batch, "boxes", None) is None:
            batch.boxes = self.box_rows(batch.dimensions[:batch.n], 1)
            batch.split = 0
        self._part(batch, batch.split, self.n, 1)

    def read(self, source, frames, batch, share=True):
        """In the reading thread: ``frames`` read (decoded) into ``batch`` by ``source``; one that
        can leave the decoding of some frames to the computing thread (XTC) leaves it
        :meth:`later_frames` of them where ``share``."""
        if not hasattr(source, "decode_later"):
            source.read(frames, batch.buffer, batch.dimensions, batch.frame, batch.time)
            return
        n_later = self.later_frames(len(frames)) if share else 0
        if n_later and batch.later is None:
            batch.later = LaterFrames()
        source.decode_seconds = 0.0
        source.read(frames, batch.buffer, batch.dimensions, batch.frame, batch.time, batch.later, n_later)
        self.decoded(0, source.decode_seconds, len(frames) - (batch.later.n if batch.later else 0))

    def decode_left(self, source, batch):
        """In the computing thread: the frames of ``batch`` that the reading thread left undecoded
        (the last ones); returns how many (0: none)."""
        later = batch.later
        if later is None or not later.n:
            return 0
        m = later.n
        started = time.perf_counter()
        source.decode_later(later)
        self.decoded(1, time.perf_counter() - started, m)
        return m

    def later_frames(self, n):
        """How many of the ``n`` frames of the next batch the computing thread decodes:
        :attr:`later_share` of them, the fractions carried from batch to batch."""
        if self.later_share <= 0.0:
            self._carry = 0.0
            return 0
        self._carry += self.later_share * n
        k = min(n, int(self._carry))
        self._carry -= k
        return k

    def decoded(self, side, seconds, frames):
        """Record a thread's seconds of decoding ``frames`` frames (for :meth:`balance`)."""
        self._acc[side][3] += seconds
        self._decoded += frames

    def _part(self, batch, t0, t1, side):
        m = batch.n
        out = _outputs(batch, side, t1 - t0, self.core_bits is not None, self.n_keys)
        if m == 0 or t1 <= t0:
            return
        type_counts = out[4][:m]
        type_counts[:] = 0
        bonds = self._bonds[side]   # (each thread its own buffer of bond vectors)
        if bonds is None or bonds.shape[1] != t1 - t0:
            bonds = self._bonds[side] = np.empty((9, t1 - t0), dtype=np.float64)
        i = batch.index[:m]
        deg, bins, codes, cores = (None if a is None else a[:m] for a in out[:4])
        started = time.perf_counter()
        self.kernels.frames(batch.positions[:m], self.where[t0:t1], self.stride, bonds, *batch.boxes, deg,
                            *self.bin_head, self.classes[t0:t1], *self.bin_tail, bins, codes,
                            self.state_counts[:, t0:t1], self.frame_sblock[i],
                            self.frame_weight[i], self.undefined[t0:t1], self.type_key[t0:t1], type_counts)
        if cores is not None:
            self.core_bits(bins, deg, cores.view(np.bool_), t0, t1)
        self._acc[side][2] += time.perf_counter() - started
        self._part_frames += m * (t1 - t0)

    def copy_out(self, batch, lo, m, bins, codes, angles, cores=None, type_counts=None):
        """Frames ``lo .. lo + m`` of the batch (both parts) into rows of the pass's buffers
        (``angles``, ``cores`` and ``type_counts``, the sum of both parts, where given)."""
        s = batch.split
        if type_counts is not None:
            type_counts[:] = 0
        for side, cols in ((0, slice(0, s)), (1, slice(s, self.n))):
            if cols.stop <= cols.start:
                continue
            deg, b, c, k, tc = batch.outputs[side]
            bins[:, cols] = b[lo:lo + m]
            codes[:, cols] = c[lo:lo + m]
            if angles is not None:
                angles[:, cols] = deg[lo:lo + m]
            if cores is not None:
                cores[:, cols] = k[lo:lo + m]
            if type_counts is not None:
                type_counts += tc[lo:lo + m]

    # -- balance ------------------------------------------------------------------------------
    def balance(self, side, seconds, frames):
        """Record a thread's seconds for ``frames`` frames (``side`` 0 reading, 1 computing) and,
        every :data:`WINDOW` frames of both, move the cut to where both threads would take as
        long per frame: with w the seconds per torsion-frame of the torsion work, D per frame
        of decoding, r and d the other seconds per frame of the reading and the computing
        thread (reading; buffers, histograms, conformers, time series), the reading thread
        taking torsions ``[0, s)`` and decoding a share 1 - q of the frames, ``r + D (1 - q) +
        w s = d + D q + w (n - s)``: with q = 0, ``s = (w n + d - r - D) / 2w``; where that is
        below 0, s = 0 and ``q = (r + D - d - w n) / 2D`` (at most 1). Both move halfway from
        where they were (s in multiples of 64 torsions)."""
        acc = self._acc[side]
        acc[0] += seconds
        acc[1] += frames
        (read_s, read_f, read_part, read_dec), (comp_s, comp_f, comp_part, comp_dec) = self._acc
        if side == 0 or read_f < WINDOW or comp_f < WINDOW:
            return
        done, decoded = self._part_frames, self._decoded
        w = (read_part + comp_part) / done if done else 0.0
        dec = (read_dec + comp_dec) / decoded if decoded else 0.0
        self._acc = _empty_acc()
        self._part_frames = self._decoded = 0
        if w <= 0.0:
            return
        r = (read_s - read_part - read_dec) / read_f
        d = (comp_s - comp_part - comp_dec) / comp_f
        excess = r + dec - d - w * self.n   # of the reading thread, with none of the torsions
        share = min(1.0, excess / (2.0 * dec)) if excess > 0.0 and dec > 0.0 else 0.0
        self.later_share = (self.later_share + share) / 2.0
        if self.later_share < 0.01:
            self.later_share = 0.0
        if self.later_share > 0.0:
            self.split = 0
            return
        best = min(float(self.n), max(0.0, (w * self.n + d - r - dec) / (2.0 * w)))
        self.split = int(round((self.split + best) / 2.0 / 64.0)) * 64
        self.split = min(self.split, self.n)

    # -- boxes --------------------------------------------------------------------------------
    def box_rows(self, dimensions, side=0):
        """Minimum-image parameters of the frames of a batch (lengths, inverse, cells, reach2,
        triclinic; new arrays), recomputed only for rows whose box changed since the thread
        ``side`` last asked."""
        m = len(dimensions)
        boxes, keys = self._box_cache[side]
        if boxes is None or len(boxes[0]) < m:
            boxes = (np.zeros((m, 3)), np.zeros((m, 3)), np.zeros((m, 3, 3)), np.zeros(m), np.zeros(m, dtype=bool))
            keys = [None] * m
            self._box_cache[side] = (boxes, keys)
        lengths, inverse, cells, reach2, triclinic = boxes
        for f in range(m):
            key = dimensions[f].tobytes()
            if key != keys[f]:
                lengths[f], inverse[f], h, reach2[f] = self.geometry.box_parameters(dimensions[f])
                triclinic[f] = h is not None
                cells[f] = h if h is not None else 0.0
                keys[f] = key
        return tuple(a[:m].copy() for a in boxes)


def _empty_acc():
    return [[0.0, 0, 0.0, 0.0], [0.0, 0, 0.0, 0.0]]


def _outputs(batch, side, width, cores=False, n_keys=1):
    """The angle, bin, code (and core bit: int8 0/1) rows of one part of a batch and its counts
    per type and state, (re)allocated for ``width`` torsions."""
    outs = getattr(batch, "outputs", None)
    if outs is None:
        outs = batch.outputs = [None, None]
    size = len(batch.frame)
    cur = outs[side]
    if (cur is None or cur[0].shape != (size, width) or (cur[3] is not None) != cores
            or cur[4].shape[1] != n_keys):
        cur = outs[side] = (np.empty((size, width), dtype=np.float32), np.empty((size, width), dtype=np.uint16),
                            np.empty((size, width), dtype=np.int8),
                            np.empty((size, width), dtype=np.int8) if cores else None,
                            np.zeros((size, n_keys), dtype=np.int32))
    return cur
