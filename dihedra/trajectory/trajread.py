"""Reading frames in batches for the trajectory pass, with dihedra's own XTC decoder.

MDAnalysis decodes one XTC frame at a time while holding Python's lock; for a large system
decoding is most of the cost of a pass. :class:`XTCFrames` reads the bytes of a batch of frames
with one system call per run of consecutive frames and decodes them all in one compiled call
(:mod:`dihedra.trajectory._xtc`) that releases the lock, so that with a second thread the torsions of the
previous batch are computed at the same time. The positions, boxes, frame numbers and times are
the ones MDAnalysis gives (tested bit for bit): the decoder does the library's integer and float32
operations, the boxes go through MDAnalysis' own ``triclinic_box`` and unit conversion, the times
follow the reader's ``dt`` and ``time_offset``.

It is used only where it gives exactly what the MDAnalysis reader would: a plain ``XTCReader``
(no on-the-fly transformations, no auxiliary data, no atom subset, units converted) and the
compiled kernels; everything else (other formats, ``DIHEDRA_NO_XTC_DECODER=1``) is iterated
by MDAnalysis as usual. A frame whose header or compressed coordinates are malformed (an
overflowed integer range, a bit stream that runs past its atoms) is refused with an
:class:`~dihedra.errors.InputFileError`: MDAnalysis' reader does not survive such frames. A batch
with a truncated frame, a wrong magic number or an encoding outside what the decoder handles is
read again frame by frame by MDAnalysis, which reports the first two safely, so its errors and its
results are the ones a user would get from MDAnalysis.
"""

from __future__ import annotations

import os

import numpy as np

from .inputs import malformed_frame

#: Set to 1 to read XTC through MDAnalysis' iteration as every other format.
NO_DECODER_ENV = "DIHEDRA_NO_XTC_DECODER"


def xtc_frames(reader):
    """An :class:`XTCFrames` for ``reader`` when dihedra's decoder gives exactly what
    ``reader`` would, else ``None``."""
    if os.environ.get(NO_DECODER_ENV, "") not in ("", "0"):
        return None
    try:
        from MDAnalysis.coordinates.XTC import XTCReader
    except ImportError:   # pragma: no cover - MDAnalysis always has it
        return None
    if type(reader) is not XTCReader:
        return None
    if (getattr(reader, "transformations", None) or getattr(reader, "aux_list", None)
            or getattr(reader, "_sub", None) is not None or not getattr(reader, "convert_units", True)):
        return None
    if reader.units.get("length") != "nm":
        return None
    from . import _xtc
    return XTCFrames(reader, _xtc)


class XTCFrames:
    """Frames of an XTC trajectory decoded in batches (see the module docstring).

    Parameters
    ----------
    reader : MDAnalysis.coordinates.XTC.XTCReader
        Supplies the file, the frame offsets, ``dt``, ``time_offset`` and the fallback.
    decoder : module
        :mod:`dihedra.trajectory._xtc`.
    """

    def __init__(self, reader, decoder):
        self._reader = reader
        self._decoder = decoder
        self.path = reader.filename
        self.n_atoms = int(reader.n_atoms)
        self.offsets = np.asarray(reader._xdr.offsets, dtype=np.int64)
        size = os.path.getsize(self.path)
        self.sizes = np.diff(np.append(self.offsets, size))
        self._dt = reader._kwargs.get("dt")
        self._time_offset = reader.ts.data.get("time_offset", 0)
        self._buf = np.empty(0, dtype=np.uint8)
        largest = int(self.sizes.max()) if len(self.sizes) else 0
        self._words = np.empty(largest // 8 + 1 + decoder.PAD_WORDS, dtype=np.uint64)
        self._boxes = np.empty((0, 3, 3), dtype=np.float32)
        self._steps = np.empty(0, dtype=np.int64)
        self._times = np.empty(0, dtype=np.float32)
        self._box_cache = {}
        self._fh = None

    def close(self):
        if self._fh is not None:
            self._fh.close()
            self._fh = None

    def read(self, frames, positions, dimensions, frame_out, time_out):
        """Decode ``frames`` (frame numbers, ascending) into the first ``len(frames)`` rows of
        ``positions`` (float32, Angstrom), ``dimensions`` (MDAnalysis' ``ts.dimensions``,
        NaN for a frame without a box), ``frame_out`` and ``time_out`` (ps)."""
        frames = np.asarray(frames, dtype=np.int64)
        n = len(frames)
        if n == 0:
            return
        starts = self._read_bytes(frames)
        if len(self._boxes) < n:
            self._boxes = np.empty((n, 3, 3), dtype=np.float32)
            self._steps = np.empty(n, dtype=np.int64)
            self._times = np.empty(n, dtype=np.float32)
        total = int(starts[-1] + self.sizes[frames[-1]])
        status, bad = self._decoder.decode_frames(self._buf[:total], starts, self.n_atoms, positions,
                                                  self._boxes, self._steps, self._times, self._words)
        if status in (self._decoder.BAD_ATOMS, self._decoder.BAD_HEADER, self._decoder.BAD_DATA):
            problem = {self._decoder.BAD_ATOMS: "holds another number of atoms than frame 0",
                       self._decoder.BAD_HEADER: "has a malformed header (an overflowed coordinate range, as a "
                                                 "writer leaves it for NaN coordinates, or a field out of range)",
                       }.get(status, "has damaged compressed coordinates")
            raise malformed_frame(self.path, int(frames[bad]), problem)
        if status != self._decoder.OK:
            self._read_by_mdanalysis(frames, positions, dimensions, frame_out, time_out)
            return
        for k in range(n):
            dimensions[k] = self._dimensions(self._boxes[k])
        frame_out[:n] = frames
        if self._dt is None:
            time_out[:n] = self._times[:n].astype(np.float64) + self._time_offset
        else:
            time_out[:n] = frames * self._dt + self._time_offset

    def _read_bytes(self, frames):
        """The bytes of ``frames`` into the buffer (one read per run of consecutive frames);
        returns the offset of each frame in it."""
        sizes = self.sizes[frames]
        starts = np.zeros(len(frames), dtype=np.int64)
        np.cumsum(sizes[:-1], out=starts[1:])
        total = int(starts[-1] + sizes[-1])
        if len(self._buf) < total:
            self._buf = np.empty(int(total * 1.25) + 64, dtype=np.uint8)
        if self._fh is None:
            self._fh = open(self.path, "rb", buffering=0)
        cuts = np.flatnonzero(np.diff(frames) != 1) + 1
        view = memoryview(self._buf)
        for lo, hi in zip(np.r_[0, cuts], np.r_[cuts, len(frames)]):
            a = int(starts[lo])
            b = int(starts[hi - 1] + sizes[hi - 1])
            self._fh.seek(int(self.offsets[frames[lo]]))
            got = self._fh.readinto(view[a:b])
            while got is not None and got < b - a:   # short reads (pipes, network file systems)
                more = self._fh.readinto(view[a + got:b])
                if not more:
                    break
                got += more
        return starts

    def _dimensions(self, box):
        """``ts.dimensions`` of a frame with this box (nm), as MDAnalysis' XTC reader sets it."""
        key = box.tobytes()
        dims = self._box_cache.get(key)
        if dims is None:
            from MDAnalysis.lib.mdamath import triclinic_box

            dims = np.asarray(triclinic_box(*box), dtype=np.float32).copy()
            if (dims[:3] == 0).all():   # no box: ts.dimensions is None
                dims[:] = np.nan
            else:
                self._reader.convert_pos_from_native(dims[:3])
            if len(self._box_cache) > 4096:   # boxes of NPT runs: keep the cache small
                self._box_cache.clear()
            self._box_cache[key] = dims
        return dims

    def _read_by_mdanalysis(self, frames, positions, dimensions, frame_out, time_out):
        """The frames through MDAnalysis, one by one (errors are MDAnalysis' own)."""
        reader = self._reader
        for k, f in enumerate(frames):
            ts = reader[int(f)]
            positions[k] = ts.positions
            dimensions[k] = ts.dimensions if ts.dimensions is not None else np.nan
            frame_out[k] = ts.frame
            time_out[k] = ts.time
