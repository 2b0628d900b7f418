"""Reading frames in batches for the trajectory pass, with dihedra's own XTC decoder and DCD reader.

MDAnalysis decodes one XTC frame at a time while holding Python's lock; for a large system
decoding is most of the cost of a pass. :class:`XTCFrames` reads the bytes of a batch of frames
with one system call per run of consecutive frames and decodes them all in one compiled call
(:mod:`dihedra.trajectory._xtc`) that releases the lock, so that with a second thread the torsions of the
previous batch are computed at the same time. The positions, boxes, frame numbers and times are
the ones MDAnalysis gives (tested bit for bit): the decoder does the library's integer and float32
operations, the boxes go through MDAnalysis' own ``triclinic_box`` and unit conversion, the times
follow the reader's ``dt`` and ``time_offset``. :class:`DCDFrames` does the same for DCD files
(three dimensions, no fixed atoms): the x, y and z records of a batch are copied into the positions
by one compiled call (:mod:`dihedra.trajectory._dcd`), the unit cell and times as MDAnalysis'
``DCDReader`` converts them.

Either is used only where it gives exactly what the MDAnalysis reader would: a plain ``XTCReader``
or ``DCDReader`` (no on-the-fly transformations, no auxiliary data, no atom subset, units
converted) and the compiled kernels; everything else (other formats, ``DIHEDRA_NO_XTC_DECODER=1``,
``DIHEDRA_NO_DCD_READER=1``) is iterated by MDAnalysis as usual. An XTC frame whose header or
compressed coordinates are malformed (an overflowed integer range, a bit stream that runs past its
atoms) is refused with an :class:`~dihedra.errors.InputFileError`: MDAnalysis' reader does not
survive such frames. A batch with a truncated frame, a wrong magic number, a damaged DCD record or
an encoding outside what the decoder handles is read again frame by frame by MDAnalysis, which
reports the first two safely, so its errors and its results are the ones a user would get from
MDAnalysis.
"""

from __future__ import annotations

import os
import threading
import time

import numpy as np

from .inputs import malformed_frame

#: Set to 1 to read XTC through MDAnalysis' iteration as every other format.
NO_DECODER_ENV = "DIHEDRA_NO_XTC_DECODER"

#: Mapped pages of a DCD already computed are handed back in pieces of at least this many bytes.
RELEASE_BYTES = 4 << 20

#: Set to 1 to read DCD through MDAnalysis' iteration as every other format.
NO_DCD_ENV = "DIHEDRA_NO_DCD_READER"


def frame_source(reader):
    """A batch reader for ``reader`` (:class:`XTCFrames` or :class:`DCDFrames`) where it gives
    exactly what ``reader`` would, else ``None`` (MDAnalysis' iteration)."""
    return xtc_frames(reader) or dcd_frames(reader)


def _plain(reader, cls_name, module):
    """Whether ``reader`` is exactly MDAnalysis' ``cls_name`` without transformations,
    auxiliary data or atom subset, converting units."""
    try:
        cls = getattr(__import__(f"MDAnalysis.coordinates.{module}", fromlist=[cls_name]), cls_name)
    except (ImportError, AttributeError):   # pragma: no cover - MDAnalysis always has them
        return False
    return (type(reader) is cls and not getattr(reader, "transformations", None)
            and not getattr(reader, "aux_list", None) and getattr(reader, "_sub", None) is None
            and getattr(reader, "convert_units", True))


def dcd_frames(reader):
    """A :class:`DCDFrames` for ``reader`` when it gives exactly what ``reader`` would (a plain
    DCD of three dimensions without fixed atoms, lengths in Angstrom), else ``None``."""
    if os.environ.get(NO_DCD_ENV, "") not in ("", "0") or not _plain(reader, "DCDReader", "DCD"):
        return None
    f = reader._file
    n = int(reader.n_atoms)
    cell = 14 if f.header.get("is_periodic") else 0
    if (f.ndims != 3 or f._firstframesize != f._framesize or f._framesize != 4 * (cell + 3 * (n + 2))
            or reader.units.get("length") != "Angstrom" or f._header_size % 4 or len(f) == 0):
        return None
    from . import _dcd
    return DCDFrames(reader, _dcd)


def xtc_frames(reader):
    """An :class:`XTCFrames` for ``reader`` when dihedra's decoder gives exactly what
    ``reader`` would, else ``None``."""
    if os.environ.get(NO_DECODER_ENV, "") not in ("", "0") or not _plain(reader, "XTCReader", "XTC"):
        return None
    if reader.units.get("length") != "nm":
        return None
    from . import _xtc
    return XTCFrames(reader, _xtc)


class _FileFrames:
    """What the batch readers share: the bytes of a batch of frames read with one system call
    per run of consecutive frames (``offsets`` and ``sizes`` of every frame in the file), and
    MDAnalysis' own reading of a batch that cannot be decoded."""

    def __init__(self, reader, offsets, sizes):
        self._reader = reader
        self.path = reader.filename
        self.n_atoms = int(reader.n_atoms)
        self.offsets = np.asarray(offsets, dtype=np.int64)
        self.sizes = np.asarray(sizes, dtype=np.int64)
        self._time_offset = reader.ts.data.get("time_offset", 0)
        self._buf = np.empty(0, dtype=np.uint8)
        self._box_cache = {}
        self._fh = None
        self._lock = threading.Lock()   # (MDAnalysis' reader is one: two threads may fall back to it)

    def close(self):
        if self._fh is not None:
            self._fh.close()
            self._fh = None

    def _cached_box(self, key, make):
        """``make()`` for a box not seen before (boxes of NPT runs: the cache stays small)."""
        dims = self._box_cache.get(key)
        if dims is None:
            dims = make()
            if len(self._box_cache) > 4096:
                self._box_cache.clear()
            self._box_cache[key] = dims
        return dims

    def _read_bytes(self, frames, into=None):
        """The bytes of ``frames`` into the buffer, or into ``into`` (uint8, large enough), one
        read per run of consecutive frames; returns the offset of each frame in it."""
        sizes = self.sizes[frames]
        starts = np.zeros(len(frames), dtype=np.int64)
        np.cumsum(sizes[:-1], out=starts[1:])
        total = int(starts[-1] + sizes[-1])
        if into is None and len(self._buf) < total:
            self._buf = np.empty(int(total * 1.25) + 64, dtype=np.uint8)
        if self._fh is None:
            self._fh = open(self.path, "rb", buffering=0)
        cuts = np.flatnonzero(np.diff(frames) != 1) + 1
        view = memoryview(self._buf if into is None else into)
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

    def _put(self, positions, k, xyz):
        """Coordinates ``xyz`` (n_atoms, 3) of a frame into row ``k`` of ``positions``."""
        positions[k] = xyz

    def _read_by_mdanalysis(self, frames, positions, dimensions, frame_out, time_out):
        """The frames through MDAnalysis, one by one (errors are MDAnalysis' own)."""
        reader = self._reader
        with self._lock:
            for k, f in enumerate(frames):
                ts = reader[int(f)]
                self._put(positions, k, ts.positions)
                dimensions[k] = ts.dimensions if ts.dimensions is not None else np.nan
                frame_out[k] = ts.frame
                time_out[k] = ts.time


class DCDFrames(_FileFrames):
    """Frames of a DCD trajectory (three dimensions, no fixed atoms) read in batches.

    The bytes of a batch are read at once (Python's lock released during the system call) and
    the x, y and z records of every frame copied into the positions by one compiled call
    (:mod:`dihedra.trajectory._dcd`, lock released), or, into positions of one row of
    :attr:`frame_words` words per frame, read there as they are in the file (the torsion work
    then finds each atom's x, y and z where :meth:`layout` says: no copy); the unit cell goes through the conversion
    of MDAnalysis' ``DCDReader._frame_to_ts`` (cosines or degrees of the cell angles, or CHARMM's
    box vectors), the times are ``(frame + istart / nsavc) * dt`` plus the reader's time offset,
    as MDAnalysis computes them. A batch whose record markers are not those of this layout (a
    damaged frame, or a file of the other byte order) is read by MDAnalysis frame by frame.

    Parameters
    ----------
    reader : MDAnalysis.coordinates.DCD.DCDReader
    unpacker : module
        :mod:`dihedra.trajectory._dcd`.
    """

    def __init__(self, reader, unpacker):
        f = reader._file
        n = len(f)
        super().__init__(reader, f._header_size + f._framesize * np.arange(n, dtype=np.int64),
                         np.full(n, f._framesize, dtype=np.int64))
        self._unpacker = unpacker
        self._cell_words = 14 if f.header.get("is_periodic") else 0
        header = f.header
        self._first = header["istart"] / header["nsavc"]
        self._dt = reader.ts.dt
        #: float32 words of one frame (unit cell record, x, y and z records with their markers)
        self.frame_words = int(f._framesize) // 4
        self._map = self._words_of_map = None
        self._recent, self._released = [], 0
        #: batches of frames that the pass keeps in its hands (see _release_before)
        self.batches_in_use = 3

    def layout(self, indices):
        """``(where, stride)`` of the atoms ``indices`` (any shape) in a frame's words: the
        position of each atom's x, and the distance from x to y and from y to z (one record
        with its two markers)."""
        where = self._cell_words + 1 + np.asarray(indices, dtype=np.int64)
        top = int(where.max()) + 2 * (self.n_atoms + 2) if where.size else 0
        return where.astype(np.uint32 if top < 2**32 else np.uint64), self.n_atoms + 2

    def read(self, frames, positions, dimensions, frame_out, time_out):
        """Read ``frames`` (frame numbers, ascending) into the first ``len(frames)`` rows of
        ``positions``, ``dimensions`` (NaN for a frame without a box), ``frame_out`` and
        ``time_out`` (ps), as :meth:`XTCFrames.read`."""
        frames = np.asarray(frames, dtype=np.int64)
        n = len(frames)
        if n == 0:
            return
        if positions.ndim == 2:   # the frames' words as they are (see layout)
            rows = positions[:n]
            self._read_bytes(frames, into=rows.reshape(-1).view(np.uint8))
            if not self._records_intact(rows.view(np.int32)):
                self._read_by_mdanalysis(frames, positions, dimensions, frame_out, time_out)
                return
            cell_records = rows.view(np.uint8)[:, 4:52]
        else:
            starts = self._read_bytes(frames)
            total = int(starts[-1] + self.sizes[frames[-1]])
            words = self._buf[:total].view(np.float32)
            marks = words.view(np.int32)
            first = starts // 4
            done = self._unpacker.unpack_frames(words, marks, first, self.n_atoms, self._cell_words, positions)
            cells = self._cell_words and all(int(marks[w]) == 48 for w in first)
            if done != n or (self._cell_words and not cells):
                self._read_by_mdanalysis(frames, positions, dimensions, frame_out, time_out)
                return
            cell_records = [self._buf[s + 4:s + 52] for s in starts]
        self._frame_data(frames, cell_records, dimensions, frame_out, time_out)

    def read_mapped(self, frames, dimensions, frame_out, time_out):
        """The words of ``frames`` (ascending, consecutive) as rows of a view of the file
        mapped into memory, no copy at all, with ``dimensions``, ``frame_out`` and ``time_out``
        as :meth:`read` gives them; ``None`` where that cannot be (frames not consecutive: the
        compiled torsion work takes rows that follow each other; a file that cannot be mapped, a
        damaged record: then :meth:`read`). The pages of frames
        two batches back are handed back to the system (the process's memory stays that of a
        few batches); the views are read-only."""
        frames = np.asarray(frames, dtype=np.int64)
        n = len(frames)
        if n == 0 or (n > 1 and not (np.diff(frames) == 1).all()):
            return None
        words = self._mapped_words()
        if words is None:
            return None
        start = int(self.offsets[frames[0]])
        end = int(self.offsets[frames[-1]] + self.sizes[frames[-1]])
        try:   # a file cut short since it was opened: its missing pages would end the process
            if os.stat(self.path).st_size < end:
                return None
        except OSError:
            return None
        rows = np.lib.stride_tricks.as_strided(words[start // 4:], shape=(n, self.frame_words),
                                               strides=(int(self.sizes[0]), 4), writeable=False)
        if not self._records_intact(rows.view(np.int32)):
            return None
        self._release_before(start)
        self._frame_data(frames, rows.view(np.uint8)[:, 4:52], dimensions, frame_out, time_out)
        return rows

    def _mapped_words(self):
        if self._map is None:
            import mmap

            try:
                with open(self.path, "rb") as fh:
                    self._map = mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ)
                if hasattr(mmap, "MADV_SEQUENTIAL"):
                    self._map.madvise(mmap.MADV_SEQUENTIAL)
                self._words_of_map = np.frombuffer(self._map, dtype=np.float32, count=len(self._map) // 4)
            except (OSError, ValueError):   # (a file that cannot be mapped: read() copies)
                self._map = False
        return self._words_of_map if self._map else None

    def _release_before(self, start):
        """Hand back the mapped pages before the oldest batch that may still be computed in the
        other thread (of :attr:`batches_in_use` batches, the one read that many reads ago is
        done), :data:`RELEASE_BYTES` at a time (each call costs a system call and the other
        thread's page table entries). A page handed back too early would be read again from
        the page cache and then stay: the pass sets :attr:`batches_in_use`."""
        import mmap

        recent = self._recent   # the starts of the last reads, oldest first
        keep = max(1, int(self.batches_in_use))
        upto = start if keep == 1 else (recent[1] if len(recent) == keep else None)
        if upto is not None and hasattr(mmap, "MADV_DONTNEED"):
            upto = upto // mmap.PAGESIZE * mmap.PAGESIZE
            if upto - self._released >= RELEASE_BYTES:
                self._map.madvise(mmap.MADV_DONTNEED, self._released, upto - self._released)
                self._released = upto
        self._recent = (recent + [start])[-keep:]

    def close(self):
        super().close()
        # (the mapping closes when the last view of it is gone)
        self._words_of_map = self._map = None

    def _frame_data(self, frames, cell_records, dimensions, frame_out, time_out):
        """Boxes, frame numbers and times of ``frames`` (their unit cell records' 48 bytes)."""
        n = len(frames)
        for k in range(n):
            raw = cell_records[k].tobytes() if self._cell_words else b""
            dimensions[k] = self._cached_box(raw, lambda: _dcd_dimensions(raw, self._reader))
        frame_out[:n] = frames
        for k in range(n):   # as DCDReader._frame_to_ts, then Timestep.time (time_offset added)
            time_out[k] = (int(frames[k]) + self._first) * self._dt + self._time_offset


    def _records_intact(self, marks):
        """Whether every frame (a row of ``marks``, its words as int32) has the record markers
        of this layout: 48 around the unit cell (if any), 4N around x, y and z."""
        n, c = self.n_atoms, self._cell_words
        if c and not ((marks[:, 0] == 48) & (marks[:, 13] == 48)).all():
            return False
        at = [c + k * (n + 2) + e for k in range(3) for e in (0, n + 1)]
        return bool((marks[:, at] == 4 * n).all())

    def _put(self, positions, k, xyz):
        if positions.ndim == 3:
            positions[k] = xyz
            return
        n, c = self.n_atoms, self._cell_words
        for axis in range(3):   # (the markers stay as read: the torsion work skips them)
            lo = c + 1 + axis * (n + 2)
            positions[k, lo:lo + n] = xyz[:, axis]


def _dcd_dimensions(raw, reader):
    """``ts.dimensions`` of a DCD frame whose unit cell record holds ``raw`` (six float64, or
    nothing), by the operations of MDAnalysis' ``DCDReader._frame_to_ts`` (NaN for no box)."""
    from MDAnalysis.lib.mdamath import triclinic_box

    # libdcd's unit cell when the frame has none: A, gamma, B, beta, alpha, C = 0, 90, 0, 90, 90, 0
    unitcell = (np.frombuffer(raw, dtype=np.float64).copy() if raw
                else np.array([0.0, 90.0, 0.0, 90.0, 90.0, 0.0]))
    uc = np.take(unitcell, [0, 2, 5, 4, 3, 1])
    pi_2 = np.pi / 2
    if (-1.0 <= uc[3] <= 1.0) and (-1.0 <= uc[4] <= 1.0) and (-1.0 <= uc[5] <= 1.0):
        uc[3] = 90.0 - np.arcsin(uc[3]) * 90.0 / pi_2
        uc[4] = 90.0 - np.arcsin(uc[4]) * 90.0 / pi_2
        uc[5] = 90.0 - np.arcsin(uc[5]) * 90.0 / pi_2
    elif np.any(uc < 0.0) or np.any(uc[3:] > 180.0):
        h = unitcell.copy()
        uc = triclinic_box(h[[0, 1, 3]], h[[1, 2, 4]], h[[3, 4, 5]])
    dims = np.asarray(uc, dtype=np.float32).copy()
    if (dims[:3] == 0).all():
        dims[:] = np.nan
        return dims
    reader.convert_pos_from_native(dims[:3])
    return dims


class XTCFrames(_FileFrames):
    """Frames of an XTC trajectory decoded in batches (see the module docstring).

    Parameters
    ----------
    reader : MDAnalysis.coordinates.XTC.XTCReader
        Supplies the file, the frame offsets, ``dt``, ``time_offset`` and the fallback.
    decoder : module
        :mod:`dihedra.trajectory._xtc`.
    """

    def __init__(self, reader, decoder):
        offsets = np.asarray(reader._xdr.offsets, dtype=np.int64)
        super().__init__(reader, offsets, np.diff(np.append(offsets, os.path.getsize(reader.filename))))
        self._decoder = decoder
        self._dt = reader._kwargs.get("dt")
        largest = int(self.sizes.max()) if len(self.sizes) else 0
        self._words = np.empty(largest // 8 + 1 + decoder.PAD_WORDS, dtype=np.uint64)
        self._boxes = np.empty((0, 3, 3), dtype=np.float32)
        self._steps = np.empty(0, dtype=np.int64)
        self._times = np.empty(0, dtype=np.float32)
        self.decode_seconds = 0.0

    def read(self, frames, positions, dimensions, frame_out, time_out, later=None, n_later=0):
        """Decode ``frames`` (frame numbers, ascending) into the first ``len(frames)`` rows of
        ``positions`` (float32, Angstrom), ``dimensions`` (MDAnalysis' ``ts.dimensions``,
        NaN for a frame without a box), ``frame_out`` and ``time_out`` (ps).

        With ``later`` (the batch's :class:`~dihedra.trajectory.overlap.LaterFrames`) and
        ``n_later`` > 0, the bytes of all frames are read but only the first ``len(frames) -
        n_later`` decoded: the last ones (their headers checked, their frame numbers set) are left
        to :meth:`decode_later`, which another thread calls; their positions, dimensions and
        times are set then. The seconds spent decoding here are added to :attr:`decode_seconds`
        (the caller resets them)."""
        frames = np.asarray(frames, dtype=np.int64)
        n = len(frames)
        if later is not None:
            later.n = 0
        if n == 0:
            return
        n_later = min(int(n_later), n) if later is not None else 0
        if n_later:
            total = int(self.sizes[frames].sum())
            if len(later.raw) < total:
                later.raw = np.empty(int(total * 1.25) + 64, dtype=np.uint8)
            starts = self._read_bytes(frames, into=later.raw)
            buf = later.raw[:total]
            k = n - n_later
            if self._decoder.check_frames(buf, starts[k:], self.n_atoms)[0] != self._decoder.OK:
                n_later, k = 0, n   # (decoded here: its errors are found and reported as always)
        else:
            starts = self._read_bytes(frames)
            buf = self._buf[:int(starts[-1] + self.sizes[frames[-1]])]
            k = n
        if len(self._boxes) < n:
            self._boxes = np.empty((n, 3, 3), dtype=np.float32)
            self._steps = np.empty(n, dtype=np.int64)
            self._times = np.empty(n, dtype=np.float32)
        started = time.perf_counter()
        status, bad = self._decoder.decode_frames(buf, starts[:k], self.n_atoms, positions,
                                                  self._boxes, self._steps, self._times, self._words)
        self.decode_seconds += time.perf_counter() - started
        if status != self._decoder.OK:
            self._refuse(status, frames[bad])
            self._read_by_mdanalysis(frames, positions, dimensions, frame_out, time_out)
            return
        self._boxes_and_times(frames[:k], self._boxes, self._times, dimensions, time_out)
        frame_out[:n] = frames
        if n_later:
            later.hold(frames[k:], buf, starts[k:], positions[k:n], dimensions[k:n], time_out[k:n],
                       len(self._words))

    def decode_later(self, later):
        """Decode the frames that :meth:`read` left to ``later`` (in another thread than the
        reading one: each :class:`~dihedra.trajectory.overlap.LaterFrames` has its own work space)."""
        if not later.n:
            return
        m, later.n = later.n, 0
        status, bad = self._decoder.decode_frames(later.buf, later.starts, self.n_atoms, later.positions,
                                                  later.boxes, later.steps, later.times, later.words)
        if status != self._decoder.OK:
            self._refuse(status, later.frames[bad])
            self._read_by_mdanalysis(later.frames, later.positions, later.dimensions,
                                     np.empty(m, dtype=np.int64), later.time_out)
            return
        self._boxes_and_times(later.frames, later.boxes, later.times, later.dimensions, later.time_out)

    def _refuse(self, status, frame):
        """Raise the error of a malformed frame; other statuses (a truncated file, a frame the
        decoder does not take) return: MDAnalysis then reads the frames."""
        d = self._decoder
        if status in (d.BAD_ATOMS, d.BAD_HEADER, d.BAD_DATA):
            problem = {d.BAD_ATOMS: "holds another number of atoms than frame 0",
                       d.BAD_HEADER: "has a malformed header (an overflowed coordinate range, as a "
                                     "writer leaves it for NaN coordinates, or a field out of range)",
                       }.get(status, "has damaged compressed coordinates")
            raise malformed_frame(self.path, int(frame), problem)

    def _boxes_and_times(self, frames, boxes, times, dimensions, time_out):
        """Dimensions and times (ps) of decoded ``frames`` from their boxes and header times."""
        n = len(frames)
        for k in range(n):
            dimensions[k] = self._dimensions(boxes[k])
        if self._dt is None:
            time_out[:n] = times[:n].astype(np.float64) + self._time_offset
        else:
            time_out[:n] = frames * self._dt + self._time_offset

    def _dimensions(self, box):
        """``ts.dimensions`` of a frame with this box (nm), as MDAnalysis' XTC reader sets it."""
        return self._cached_box(box.tobytes(), lambda: self._xtc_dimensions(box))

    def _xtc_dimensions(self, box):
        from MDAnalysis.lib.mdamath import triclinic_box

        dims = np.asarray(triclinic_box(*box), dtype=np.float32).copy()
        if (dims[:3] == 0).all():   # no box: ts.dimensions is None
            dims[:] = np.nan
        else:
            self._reader.convert_pos_from_native(dims[:3])
        return dims
