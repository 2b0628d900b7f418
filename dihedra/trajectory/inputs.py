"""Opening topologies and trajectories with clear errors.

Every problem a user can fix becomes one :class:`~dihedra.errors.InputFileError` sentence: a missing
or unreadable file, an unknown format, a topology and trajectory with different atom counts (both
numbers given), a truncated trajectory (the last complete frame and how to stop before it). A
trajectory in a read-only folder still works: MDAnalysis cannot store its frame-offset cache beside
it and recomputes the offsets, which dihedra reports as a notice.
"""

from __future__ import annotations

import hashlib
import os
import warnings

from ..errors import InputFileError


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


def sha256(path, chunk=1 << 22):
    """SHA-256 hex digest of a file, read in chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(chunk), b""):
            h.update(block)
    return h.hexdigest()


def _trajectory_atoms(path):
    """Atom count stored in a trajectory file (None if it cannot be told)."""
    try:
        from MDAnalysis.coordinates.core import get_reader_for
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            reader = get_reader_for(path)(path)
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
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            universe = mda.Universe(*files)
        except ValueError as exc:
            if "number of atoms" in str(exc) and trajectory is not None:
                n_traj = _trajectory_atoms(trajectory)
                n_top = _topology_atoms(topology)
                raise InputFileError(
                    f"topology {topology} has {n_top if n_top is not None else '?'} atoms but trajectory "
                    f"{trajectory} has {n_traj if n_traj is not None else '?'}; they must describe the same "
                    "system.") from None
            raise InputFileError(_reason(files, exc)) from None
        except Exception as exc:  # MDAnalysis raises many types for unreadable files
            raise InputFileError(_reason(files, exc)) from None
    for w in caught:
        text = str(w.message)
        if "Cannot write lock/offset file" in text:
            notices.append(f"cannot write the frame-offset cache beside {trajectory} (read-only "
                           "folder); offsets are recomputed on every run, which is slower but correct.")
    if trajectory is not None:
        _check_trailing_bytes(universe, trajectory, notices)
    return universe


def _check_trailing_bytes(universe, trajectory, notices):
    """Notice for an XTC file that ends with an incomplete frame after its last complete one (a run
    cut while writing): MDAnalysis then silently uses the complete frames only.

    The end of the last frame follows from the XTC frame layout (XDR, big-endian): for more than 9
    atoms a 88-byte header ends with the byte count of the compressed coordinates, padded to 4 bytes.
    """
    reader = universe.trajectory
    offsets = getattr(getattr(reader, "_xdr", None), "offsets", None)
    if offsets is None or len(offsets) == 0 or not str(trajectory).lower().endswith(".xtc"):
        return
    if reader.n_atoms <= 9:
        return
    last = int(offsets[-1])
    try:
        with open(trajectory, "rb") as fh:
            fh.seek(last + 88)
            raw = fh.read(4)
    except OSError:
        return
    if len(raw) < 4:
        return  # the last frame itself is cut: reported when the run reaches it
    n_bytes = int.from_bytes(raw, "big")
    end = last + 92 + 4 * ((n_bytes + 3) // 4)
    size = os.path.getsize(trajectory)
    if end < size:
        notices.append(f"trajectory {trajectory} ends with an incomplete frame ({size - end} bytes after "
                       f"frame {reader.n_frames - 1}), as when a run is cut while writing; only the "
                       f"{reader.n_frames} complete frames are used.")


def _topology_atoms(path):
    import MDAnalysis as mda
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return mda.Universe(path).atoms.n_atoms
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
    n_ok = _count_readable_frames(universe)
    n_claimed = universe.trajectory.n_frames
    last = n_ok - 1
    return InputFileError(
        f"trajectory {trajectory} is truncated or corrupt: frame {n_ok} of {n_claimed} cannot be read "
        f"({str(exc).strip() or type(exc).__name__}); the last complete frame is {last}, so rerun with "
        f"--stop {n_ok}.")
