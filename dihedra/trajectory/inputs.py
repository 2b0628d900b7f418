"""Opening topologies and trajectories with clear errors.

Every problem a user can fix becomes one :class:`~dihedra.errors.InputFileError` sentence: a missing
or unreadable file, an unknown format, a topology and trajectory with different atom counts (both
numbers given), a truncated trajectory (the last complete frame and how to stop before it). A
trajectory in a read-only folder still works: MDAnalysis cannot store its frame-offset cache beside
it and recomputes the offsets, which dihedra reports as a notice.

An XTC file is checked before MDAnalysis opens it (:func:`check_xtc`): the header of every frame
(the fields that size and steer the decoding; a writer that met NaN coordinates leaves an
overflowed integer range, on which MDAnalysis' reader corrupts its memory) and the compressed
coordinates of the first two frames (which MDAnalysis reads when it opens the file); the frames
of a pass are checked by dihedra's decoder as they are read. A file that ends inside a frame (a
run cut while writing) is analysed up to its last complete frame, with a notice.
"""

from __future__ import annotations

import contextlib
import gc
import hashlib
import os
import struct
import sys
import threading
import warnings

import numpy as np

from ..errors import InputFileError
from . import _xtc


def check_readable(path, what="file"):
    """Raise unless ``path`` is an existing, readable file."""
    path = os.fspath(path)
    if not os.path.exists(path):
        raise InputFileError(f"{what} {path} does not exist.")
    if os.path.isdir(path):
        raise InputFileError(f"{what} {path} is a folder, not a file.")
    if not os.access(path, os.R_OK):
        raise InputFileError(f"{what} {path} is not readable (check its permissions).")
    try:
        with open(path, "rb") as fh:
            fh.read(1)
    except OSError as exc:
        raise InputFileError(f"{what} {path} cannot be read: {exc.strerror}.") from None
    return path


def sha256(path, chunk=1 << 22, stop=None):
    """SHA-256 hex digest of a file, read in chunks (``stop()`` true: give up, ``None``)."""
    h = hashlib.sha256()
    buf = bytearray(chunk)
    view = memoryview(buf)
    with open(path, "rb", buffering=0) as fh:
        while True:
            if stop is not None and stop():
                return None
            n = fh.readinto(buf)
            if not n:
                break
            h.update(view[:n])
    return h.hexdigest()


#: Formats that hold coordinates only: given as a topology, they make a Universe without names or
#: bonds (MDAnalysis reads them), which no torsion specification can use.
COORDINATE_ONLY = ("xtc", "trr", "dcd", "nc", "ncdf", "netcdf", "trj", "mdcrd", "tng", "h5md", "xdr")


@contextlib.contextmanager
def quiet_teardown():
    """Silence the complaints of MDAnalysis readers that failed half-way through their
    construction while they are released (their ``__del__`` closes a file they never opened and
    Python prints "Exception ignored ..." after dihedra's own error line); the error that made
    them fail is reported by the caller, which appends it to the list yielded: only then is the
    garbage collected here (a full collection costs about 0.07 s once a large system is loaded)."""
    hook = sys.unraisablehook
    sys.unraisablehook = lambda unraisable: None
    failed = []
    try:
        yield failed
        if failed:
            gc.collect()
    finally:
        sys.unraisablehook = hook


#: Where the SHA-256 of files already hashed are kept (a JSON file): ``$DIHEDRA_CACHE_DIR``, else
#: ``$XDG_CACHE_HOME/dihedra``, else ``~/.cache/dihedra``; ``DIHEDRA_NO_HASH_CACHE=1`` turns it off.
CACHE_ENV, NO_CACHE_ENV = "DIHEDRA_CACHE_DIR", "DIHEDRA_NO_HASH_CACHE"

#: Files remembered in the cache (the least recently hashed are forgotten first).
CACHE_ENTRIES = 2000


def _cache_file():
    if os.environ.get(NO_CACHE_ENV, "") not in ("", "0"):
        return None
    folder = os.environ.get(CACHE_ENV) or os.path.join(
        os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache"), "dihedra")
    return os.path.join(folder, "sha256.json")


def _stat_key(path):
    """What identifies the content of a file without reading it: device, inode, size, and the
    times of the last change of its content (mtime) and of its inode (ctime, which no program
    can set back: any write changes it)."""
    st = os.stat(path)
    return [st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns, st.st_ctime_ns]


def cached_sha256(path, stop=None):
    """:func:`sha256` of ``path``, taken from the cache when the file has not changed since it
    was hashed (same :func:`_stat_key`: the way ``make`` or git's index tell unchanged files;
    common practice), else computed and remembered."""
    import json

    path = os.path.abspath(path)
    where = _cache_file()
    key = _stat_key(path)
    cache = {}
    if where is not None:
        try:
            with open(where) as fh:
                cache = json.load(fh)
        except (OSError, ValueError):
            cache = {}
        hit = cache.get(path)
        if isinstance(hit, list) and hit[:-1] == key:
            return hit[-1]
    digest = sha256(path, stop=stop)
    if digest is None or where is None or _stat_key(path) != key:   # stopped, or changed meanwhile
        return digest
    cache.pop(path, None)
    cache[path] = key + [digest]
    for old in list(cache)[:max(0, len(cache) - CACHE_ENTRIES)]:
        del cache[old]
    try:   # written whole or not at all: other runs may read it at the same time
        os.makedirs(os.path.dirname(where), exist_ok=True)
        tmp = f"{where}.{os.getpid()}.tmp"
        with open(tmp, "w") as fh:
            json.dump(cache, fh)
        os.replace(tmp, where)
    except OSError:
        pass
    return digest


class FileHashes:
    """SHA-256 of files, computed in a background thread while the caller goes on.

    Hashing a trajectory of gigabytes takes a second or more (about 0.55 s per GB); it runs
    while the topology is read and the torsions are selected (one thread; hashlib releases
    Python's lock), pauses while the frames are analysed (:meth:`paused`: the pass has the
    cores), and goes on while the tables are made; :meth:`get` waits for a digest. A file hashed
    before and unchanged since is not read again (:func:`cached_sha256`).
    """

    def __init__(self, paths):
        self._paths = [os.path.abspath(p) for p in paths]
        self._digests = {}
        self._error = None
        self._stop = False
        self._go = threading.Event()
        self._go.set()
        self._thread = threading.Thread(target=self._run, name="dihedra-sha256", daemon=True)
        self._thread.start()

    def _wait(self):
        self._go.wait()
        return self._stop

    def _run(self):
        try:
            for path in self._paths:
                if self._stop:
                    return
                self._digests[path] = cached_sha256(path, stop=self._wait)
        except BaseException as exc:  # noqa: BLE001 - raised by get()
            self._error = exc

    @contextlib.contextmanager
    def paused(self):
        """No hashing inside this block."""
        self._go.clear()
        try:
            yield
        finally:
            self._go.set()

    def get(self, path):
        """The hex digest of ``path`` (waits for it; computed here if it was not asked for)."""
        path = os.path.abspath(path)
        if path not in self._paths:
            return cached_sha256(path)
        self._go.set()
        self._thread.join()
        if self._error is not None:
            raise self._error
        return self._digests[path]

    def cancel(self):
        """Stop hashing (after an error) and wait for the thread."""
        self._stop = True
        self._go.set()
        self._thread.join()


#: File extensions in common use that MDAnalysis does not take as its format's name (LAMMPS writes
#: its dump files as .lammpstrj by convention).
EXTRA_EXTENSIONS = {"lammpstrj": "LAMMPSDUMP"}


def known_formats(topology, trajectory=None):
    """The ``topology_format`` and ``format`` keywords of :class:`MDAnalysis.Universe` for files
    whose extension names a format MDAnalysis reads (:func:`MDAnalysis.lib.util.guess_format`:
    the format MDAnalysis would take for a file name anyway); a file it cannot name this way is
    left out (MDAnalysis guesses as usual).

    Given explicitly, the formats spare MDAnalysis its "format hints" (the tests of in-memory
    objects of other packages, which import ParmEd and OpenMM: about 0.1 s and 15 MB a run).
    """
    from MDAnalysis.core._get_readers import _PARSERS, _READERS

    kwargs = {"topology_format": _known_format(topology, _PARSERS)}
    if trajectory is not None:
        kwargs["format"] = _known_format(trajectory, _READERS)
    return {k: v for k, v in kwargs.items() if v is not None}


def _known_format(path, registry):
    """The format of file ``path`` from its extension if ``registry`` (MDAnalysis' parsers or
    readers) has it, else ``None``."""
    from MDAnalysis.lib.util import guess_format

    if not isinstance(path, (str, os.PathLike)) or os.fspath(path).startswith("imd://"):
        return None
    extension = os.path.splitext(os.fspath(path))[1].lower().lstrip(".")
    if extension in EXTRA_EXTENSIONS and EXTRA_EXTENSIONS[extension] in registry:
        return EXTRA_EXTENSIONS[extension]
    try:
        name = guess_format(os.fspath(path))
    except (TypeError, ValueError):
        return None
    return name if name in registry else None


def _trajectory_atoms(path):
    """Atom count stored in a trajectory file (None if it cannot be told)."""
    try:
        from MDAnalysis.coordinates.core import get_reader_for
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            reader = get_reader_for(path, format=known_formats(None, path).get("format"))(path)
            n = reader.n_atoms
            reader.close()
        return n
    except Exception:  # noqa: BLE001 - only used to improve a message
        return None


def load_universe(topology, trajectory=None, notices=None):
    """An MDAnalysis Universe from a topology and an optional trajectory, with clear errors.

    Parameters
    ----------
    topology : str
    trajectory : str, optional
    notices : list, optional
        Receives notices (e.g. the read-only offset cache).
    """
    import MDAnalysis as mda

    notices = [] if notices is None else notices
    check_readable(topology, "topology")
    files = [topology]
    if trajectory is not None:
        check_readable(trajectory, "trajectory")
        files.append(trajectory)
    complete = None
    if trajectory is not None and is_xtc(trajectory):
        complete, note = check_xtc(trajectory)
        if note:
            notices.append(note)
    if os.path.splitext(os.fspath(topology))[1].lower().lstrip(".") in COORDINATE_ONLY:
        raise InputFileError(f"topology {topology} is a trajectory format (coordinates only: no atom names, "
                             "residues or bonds); give the topology first (PDB with CONECT, PSF, TPR, PRMTOP, "
                             "GRO, ...), then the trajectories.")
    error = None
    with warnings.catch_warnings(record=True) as caught, quiet_teardown() as failed:
        warnings.simplefilter("always")
        try:
            universe = mda.Universe(*files, **known_formats(topology, trajectory))
        except ValueError as exc:
            error = _reason(files, exc)
            if "number of atoms" in str(exc) and trajectory is not None:
                n_traj = _trajectory_atoms(trajectory)
                n_top = _topology_atoms(topology)
                error = (f"topology {topology} has {n_top if n_top is not None else '?'} atoms but trajectory "
                         f"{trajectory} has {n_traj if n_traj is not None else '?'}; they must describe the same "
                         "system.")
        except Exception as exc:  # MDAnalysis raises many types for unreadable files
            error = _reason(files, exc)
        if error is not None:
            failed.append(error)
    if error is not None:   # (raised here: the half-made reader is gone, and its complaints with it)
        raise InputFileError(error)
    for w in caught:
        text = str(w.message)
        if "Cannot write lock/offset file" in text:
            notices.append(f"cannot write the frame-offset cache beside {trajectory} (read-only "
                           "folder); offsets are recomputed on every run, which is slower but correct.")
    if complete is not None:
        universe.trajectory.dihedra_complete_frames = min(complete, universe.trajectory.n_frames)
    _name_atoms_by_type(universe, topology, notices)
    return universe


def _name_atoms_by_type(universe, topology, notices):
    """A topology without atom names (a LAMMPS data file) gets names from the atom types, and one
    without residue names the residue name ``MOL``, with a notice: labels and torsion types are
    made of them."""
    atoms = universe.atoms
    missing, used = [], []
    if not hasattr(atoms, "names") and hasattr(atoms, "types"):
        universe.add_TopologyAttr("names", [f"T{t}" for t in atoms.types])
        missing.append("atom names")
        used.append("names from the atom types (T1, T2, ...)")
    if not hasattr(atoms, "resnames"):
        universe.add_TopologyAttr("resnames", ["MOL"] * len(universe.residues))
        missing.append("residue names")
        used.append("the residue name MOL")
    if missing:
        notices.append(f"{os.path.basename(os.fspath(topology))} has no {' and no '.join(missing)}; torsion labels "
                       f"and types use {' and '.join(used)}.")


def usable_frames(reader):
    """Frames of a trajectory reader that can be analysed: those of MDAnalysis, less an XTC
    frame cut at the end of the file (:func:`check_xtc`)."""
    return int(getattr(reader, "dihedra_complete_frames", reader.n_frames))


def is_xtc(path):
    return os.fspath(path).lower().endswith(".xtc")


#: what a frame header status of :mod:`dihedra.trajectory._xtc` means, for messages
_XTC_PROBLEMS = {
    _xtc.BAD_MAGIC: "does not start with the XTC magic number 1995 (the file is damaged there, or is not XTC)",
    _xtc.BAD_ATOMS: "holds another number of atoms than frame 0",
    _xtc.BAD_DATA: "has damaged compressed coordinates (the bit stream runs past its atoms or its bytes)",
}


def check_xtc(path):
    """Check every frame header of an XTC file, and decode its first two frames, before any reader
    touches it; return ``(complete frames, notice or None)``.

    Raises :class:`~dihedra.errors.InputFileError` naming the first malformed frame (with the
    frames that can be read before it), or for a file without one complete frame. A file that
    ends inside its last frame gives the number of complete frames and a notice.
    """
    path = os.fspath(path)
    size = os.path.getsize(path)
    if size == 0:
        raise InputFileError(f"trajectory {path} is empty (0 bytes).")
    buf = np.memmap(path, dtype=np.uint8, mode="r")
    try:
        head = bytes(buf[:8])
        magic, n_atoms = struct.unpack(">ii", head) if len(head) == 8 else (None, None)
        if magic != 1995 or n_atoms <= 0:
            raise InputFileError(f"trajectory {path} is not an XTC file (it does not start with an XTC frame "
                                 "header); check the file and its extension.")
        status, n, offset, header = _scan_xtc(path, size, n_atoms)
        if status not in (_xtc.OK, _xtc.TRUNCATED):
            raise malformed_frame(path, n, _header_problem(header, 0, n_atoms, status))
        if n == 0:
            raise InputFileError(f"trajectory {path} holds no complete frame ({size} bytes, cut inside frame 0).")
        _decode_first_frames(path, buf, min(n, 2), n_atoms)
    finally:
        del buf
    if status == _xtc.TRUNCATED:
        return n, (f"trajectory {path} ends with an incomplete frame (frame {n} is cut after {size - int(offset)} "
                   f"bytes, as when a run is cut while writing); only the {n} complete frames are used.")
    return n, None


#: Bytes of an XTC file mapped at a time while its frame headers are checked: the pages of a map
#: count in the process's memory until it is unmapped, and reading one header maps the pages
#: around it (a whole 685 MB file was about 150 MB more at the start of a run).
SCAN_WINDOW = 32 << 20


def _scan_xtc(path, size, n_atoms):
    """:func:`_xtc.scan_frames` over the file, :data:`SCAN_WINDOW` bytes mapped at a time (a window
    twice as large for a frame larger than it): ``(status, frames, byte offset of the frame that
    is not whole or of the end, its header bytes when it is malformed)``."""
    pos, total, window = 0, 0, SCAN_WINDOW
    while True:
        length = min(size - pos, window)
        buf = np.memmap(path, dtype=np.uint8, mode="r", offset=pos, shape=(length,))
        try:
            status, n, off = _xtc.scan_frames(buf, n_atoms)
            total += int(n)
            if status in (_xtc.OK, _xtc.TRUNCATED) and pos + length < size:   # (cut by the window)
                window = window if n else 2 * window
                pos += int(off)
                continue
            header = bytes(buf[int(off):int(off) + 92]) if status not in (_xtc.OK, _xtc.TRUNCATED) else b""
            return status, total, pos + int(off), header
        finally:
            del buf


def malformed_frame(path, frame, problem):
    """The error for a malformed frame ``frame`` of a trajectory (the frames before it can be read)."""
    tail = (f"frames 0-{frame - 1} can be read: rerun with --stop {frame} to analyse them, or write the "
            "trajectory again" if frame else "write the trajectory again")
    return InputFileError(f"trajectory {path} is damaged: frame {frame} {problem}; {tail}.")


def _header_problem(buf, p, n_atoms, status):
    """What is wrong with the frame header at byte ``p`` (the status of :func:`_xtc.scan_frames`)."""
    if status != _xtc.BAD_HEADER:
        return _XTC_PROBLEMS.get(status, "is malformed")
    precision, = struct.unpack(">f", bytes(buf[p + 56:p + 60]))
    lo = struct.unpack(">3i", bytes(buf[p + 60:p + 72]))
    hi = struct.unpack(">3i", bytes(buf[p + 72:p + 84]))
    smallidx, nbytes = struct.unpack(">2i", bytes(buf[p + 84:p + 92]))
    if min(lo) < -_xtc.MAXABS - 1 or max(hi) > _xtc.MAXABS + 1:
        return (f"has an overflowed coordinate range (smallest integer {min(lo)}), as a writer leaves it for "
                "NaN or infinite coordinates (a simulation that blew up)")
    if any(h < low for low, h in zip(lo, hi)):
        return f"has a coordinate range whose maximum {list(hi)} lies below its minimum {list(lo)}"
    if not (0 < precision < float("inf")):
        return f"has precision {precision}, not a positive number"
    if nbytes < 0 or nbytes > _xtc.max_frame_bytes(n_atoms):
        return f"has a byte count of {nbytes}, impossible for {n_atoms} atoms"
    return f"has a small-integer size index {smallidx} outside the format's table"


def _decode_first_frames(path, buf, n, n_atoms):
    """Decode the first ``n`` frames with dihedra's decoder (MDAnalysis reads them when it opens the
    file, and its reader does not survive a damaged bit stream)."""
    sizes = []
    p = 0
    for _ in range(n):
        nbytes = struct.unpack(">i", bytes(buf[p + 88:p + 92]))[0] if n_atoms > 9 else 0
        size = _xtc.HEADER_BYTES + (36 + 4 * ((nbytes + 3) // 4) if n_atoms > 9 else 12 * n_atoms)
        sizes.append(size)
        p += size
    data = np.asarray(buf[:p])
    starts = np.cumsum([0] + sizes[:-1]).astype(np.int64)
    words = np.empty(max(sizes) // 8 + 1 + _xtc.PAD_WORDS, dtype=np.uint64)
    status, frame = _xtc.decode_frames(data, starts, n_atoms, np.empty((n, n_atoms, 3), np.float32),
                                       np.empty((n, 3, 3), np.float32), np.empty(n, np.int64),
                                       np.empty(n, np.float32), words)
    if status not in (_xtc.OK, _xtc.UNSUPPORTED):
        raise malformed_frame(path, int(frame), _XTC_PROBLEMS.get(status, "is malformed"))


def _topology_atoms(path):
    import MDAnalysis as mda
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return mda.Universe(path, **known_formats(path)).atoms.n_atoms
    except Exception:  # noqa: BLE001
        return None


def _reason(files, exc):
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    if isinstance(exc, TypeError) and "appropriate" in text:
        ext = os.path.splitext(files[-1])[1] or "(none)"
        return (f"cannot tell the format of {files[-1]} from its extension {ext}; use a file format "
                "MDAnalysis reads (e.g. .pdb, .psf, .gro, .tpr, .prmtop for topologies; .xtc, .trr, .dcd, "
                ".nc for trajectories).")
    return f"cannot read {' with '.join(files)}: {text}."


def _count_readable_frames(universe):
    """Frames that can be read in sequence (a truncated file stops early)."""
    n = 0
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            for _ in universe.trajectory:
                n += 1
    except Exception:  # noqa: BLE001 - the first unreadable frame ends the count
        pass
    return n


def truncated_error(trajectory, universe, exc):
    """The error for a trajectory that fails mid-run."""
    n_ok = usable_frames(universe.trajectory) if is_xtc(trajectory) else _count_readable_frames(universe)
    n_claimed = universe.trajectory.n_frames
    last = n_ok - 1
    return InputFileError(
        f"trajectory {trajectory} is truncated or corrupt: frame {n_ok} of {n_claimed} cannot be read "
        f"({str(exc).strip() or type(exc).__name__}); the last complete frame is {last}, so rerun with "
        f"--stop {n_ok}.")
