"""Where dihedra writes, and the rules that keep a user's files safe.

Every file dihedra writes goes through this module:

- A **results folder** is assembled in a hidden staging folder beside it
  (:class:`StagedFolder`) and moved into place in one rename at the end, so an interrupted run
  never leaves a half-written folder. Its list of files, ``dihedra-files.json`` (:data:`MARKER`),
  names every file dihedra wrote into it; analyses that add files later add their names.
- ``--overwrite`` replaces only a folder that has this list and holds nothing else (a user's
  NOTES.md or plots/ in it make dihedra refuse), never a folder that holds an input of the run, the
  current folder or one of its parents. The final move refuses to replace a folder that appeared,
  or changed hands, while the run was working (two runs into one folder: the second one fails).
- A file written into an existing folder (:func:`write_file`) goes under a temporary name and is
  renamed over its target, and only over a file that dihedra wrote there; an output set replaced
  as a whole (``dihedra figures --overwrite``) drops only files the list names
  (:func:`remove_listed_files`).
- A single file that a user names (a report, a scan, a table) replaces only a file of the same kind
  that dihedra wrote (:func:`check_single_file`), never an input or a file of another program.

Staging folders carry the host name and process id of their run; those of runs that died (a kill,
a power cut) are removed the next time a run writes beside them.
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import json
import os
import posixpath
import re
import shutil
import socket
import tempfile
import time
import uuid

from ..errors import OutputExistsError
from ..trajectory.interrupts import check as check_interrupts, signals_held

#: The list of the files dihedra wrote into a results folder (its presence marks the folder).
MARKER = "dihedra-files.json"

#: Suffix of the temporary files of :func:`write_file` (a crash may leave one; it is dihedra's).
TMP_SUFFIX = ".dihedra-tmp"

#: The results folders moved into place by this process, in order (the command line tells an
#: interrupt after a commit from one before it).
COMMITTED = []

_STAGING = re.compile(r"^\.(?P<name>.+)\.(?:partial|old)-(?P<host>[^-]+)-(?P<pid>\d+)-[0-9a-z_]+$")


# ----------------------------------------------------------------------------------------------
# The list of files of a results folder
# ----------------------------------------------------------------------------------------------

def read_marker(folder):
    """The marker of a results folder as a dict (``run_id``, ``command``, ``files``), or ``None``
    when the folder has none (or it cannot be read as one)."""
    path = os.path.join(os.fspath(folder), MARKER)
    try:
        with open(path, encoding="utf-8") as fh:
            data = json.load(fh)
    except (OSError, ValueError):
        return None
    if not isinstance(data, dict) or not isinstance(data.get("files"), list):
        return None
    return data


def _write_marker(folder, data):
    tmp = os.path.join(folder, f".{MARKER}.{uuid.uuid4().hex[:8]}{TMP_SUFFIX}")
    try:
        with open(tmp, "w", encoding="utf-8") as fh:
            json.dump(data, fh, indent=1)
            fh.write("\n")
        os.replace(tmp, os.path.join(folder, MARKER))
    finally:
        if os.path.exists(tmp):
            os.remove(tmp)


@contextlib.contextmanager
def _folder_lock(folder):
    """An exclusive lock on a folder (``flock`` on the folder itself: no lock file is left)."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX
        yield
        return
    fd = os.open(folder, os.O_RDONLY)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        yield
    finally:
        os.close(fd)


def _relative_files(folder):
    """Every file below ``folder`` as a sorted list of '/'-separated relative paths."""
    found = []
    for root, dirs, files in os.walk(folder):
        dirs.sort()
        for name in files:
            rel = os.path.relpath(os.path.join(root, name), folder)
            found.append(rel.replace(os.sep, "/"))
    return sorted(found)


def foreign_files(folder, marker=None):
    """Files below ``folder`` that its marker does not list (a user's own files), sorted.

    Without a marker every file is foreign. Temporary files of :func:`write_file` count as
    dihedra's."""
    marker = read_marker(folder) if marker is None else marker
    listed = set(marker["files"]) if marker else set()
    return [f for f in _relative_files(folder)
            if f != MARKER and f not in listed and not os.path.basename(f).endswith(TMP_SUFFIX)]


def new_marker(command, files=()):
    """A marker: who wrote the folder, a run id, and the list of files."""
    return {"written_by": "dihedra", "command": command, "run_id": uuid.uuid4().hex,
            "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
            "about": "the files dihedra wrote into this folder; 'dihedra ... --overwrite' replaces the folder "
                     "only while it holds nothing else, and dihedra replaces no file that is not listed here",
            "files": sorted(files)}


def record_files(folder, names):
    """Add ``names`` (relative paths) to the marker of ``folder``, creating the marker when the
    folder has none."""
    folder = os.fspath(folder)
    with _folder_lock(folder):
        marker = read_marker(folder) or new_marker("save")
        files = set(marker["files"]) | {n.replace(os.sep, "/") for n in names}
        marker["files"] = sorted(files)
        _write_marker(folder, marker)


def remove_listed_files(folder, names):
    """Delete those of ``names`` (relative paths) that the marker of ``folder`` lists and drop them
    from the list; return the names dropped, sorted.

    Only a listed file is ever deleted (dihedra wrote it), never one the marker does not list, a
    folder, or a name that leads out of ``folder`` (a hand-edited ``../x``, a linked subfolder). A
    listed file that is gone already is just dropped from the list."""
    folder = os.fspath(folder)
    with _folder_lock(folder):
        marker = read_marker(folder)
        listed = set(marker["files"]) if marker else set()
        dropped = []
        try:
            for rel in sorted(set(names) & listed - {MARKER}):
                path = os.path.join(folder, *rel.split("/"))
                if not _plain_relative(rel, folder) or (os.path.isdir(path) and not os.path.islink(path)):
                    continue
                with contextlib.suppress(FileNotFoundError):
                    os.remove(path)
                dropped.append(rel)
        finally:   # the list follows the files even when a removal fails half-way
            if dropped:
                marker["files"] = sorted(listed - set(dropped))
                _write_marker(folder, marker)
    return dropped


def _plain_relative(rel, folder):
    """Whether a listed name is a plain path below ``folder``: no ``..``, not absolute, and no linked
    subfolder that leads elsewhere (a marker names files, it never reaches out of its folder)."""
    if posixpath.normpath(rel) != rel or rel.startswith(("/", "../")) or rel == "..":
        return False
    return _inside(_real(os.path.dirname(os.path.join(folder, *rel.split("/")))), _real(folder))


def earlier_outputs(folder, names=(), prefixes=()):
    """The files of an analysis that an earlier run wrote into ``folder`` (listed in its marker):
    those named ``names`` or starting with one of ``prefixes``, sorted."""
    marker = read_marker(folder)
    listed = marker["files"] if marker else []
    return sorted(f for f in listed if f in set(names) or any(f.startswith(p) for p in prefixes))


def check_earlier_outputs(folder, command, overwrite=False, names=(), prefixes=(), option="--overwrite"):
    """Refuse to replace the outputs of an earlier run of an analysis without ``overwrite``: an
    analysis adds its files to a results folder, and replaces its own earlier ones only when asked
    (files of other settings, such as another coupling relation, have other names)."""
    found = earlier_outputs(folder, names, prefixes)
    if found and not overwrite:
        shown = ", ".join(found[:4]) + (f" and {len(found) - 4} more" if len(found) > 4 else "")
        raise OutputExistsError(f"{folder} already has {shown} from an earlier '{command}'; give {option} to "
                                "replace them (only those files), or work on a copy of the folder.")
    return found


# ----------------------------------------------------------------------------------------------
# Checks of a target
# ----------------------------------------------------------------------------------------------

def _real(path):
    return os.path.realpath(os.path.abspath(os.fspath(path)))


def _inside(path, folder):
    """Whether ``path`` is ``folder`` or lies below it (both real paths)."""
    return path == folder or path.startswith(folder.rstrip(os.sep) + os.sep)


def _input_paths(inputs):
    out = []
    for p in inputs or ():
        if p is None:
            continue
        p = os.fspath(p)
        if p and os.path.exists(p):
            out.append(_real(p))
    return out


def check_folder_target(out, *, overwrite=False, inputs=(), what="results folder", option="--out"):
    """Check a results folder to be written before any work; return its absolute path.

    Refused with :class:`OutputExistsError` (one sentence): an empty name; the current folder or
    one of its parents; a folder that holds (or is) an input of the run; an existing folder without
    ``overwrite`` (an empty folder is fine); with ``overwrite``, a folder dihedra did not make or
    that holds files dihedra did not write; a missing or unwritable parent folder.
    """
    if out is None or not str(os.fspath(out)).strip():
        raise OutputExistsError(f"the {what} name is empty; give {option} FOLDER.")
    path = os.path.abspath(os.fspath(out))
    real = _real(path)
    cwd = _real(os.getcwd())
    if _inside(cwd, real):
        here = "the current folder" if real == cwd else "a parent of the current folder"
        raise OutputExistsError(f"{option} {out} is {here}; dihedra writes a results folder of its own: "
                                "give a new folder name.")
    for inp in _input_paths(inputs):
        if _inside(inp, real):
            raise OutputExistsError(f"{option} {out} holds an input of this run ({inp}); dihedra never replaces "
                                    "a folder with its inputs: give a new folder name.")
    if os.path.lexists(path):
        if not os.path.isdir(path) or os.path.islink(path):
            raise OutputExistsError(f"{option} {path} exists and is not a folder; choose another name.")
        if os.listdir(path):
            if not overwrite:
                raise OutputExistsError(f"{what} {path} already exists; choose another {option} or add "
                                        "--overwrite (its contents are left untouched).")
            _check_replaceable(path, what)
    parent = os.path.dirname(path)
    if not os.path.isdir(parent):
        raise OutputExistsError(f"the parent folder of {path} does not exist; create it first.")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputExistsError(f"cannot write in {parent} (permissions).")
    return path


def _check_replaceable(path, what):
    marker = read_marker(path)
    if marker is None:
        raise OutputExistsError(f"{path} was not made by dihedra (it has no {MARKER}); --overwrite replaces only "
                                f"a {what} that dihedra wrote: choose another name.")
    foreign = foreign_files(path, marker)
    if foreign:
        shown = ", ".join(foreign[:5]) + (f" and {len(foreign) - 5} more" if len(foreign) > 5 else "")
        raise OutputExistsError(f"{path} holds files dihedra did not write ({shown}); --overwrite would lose them: "
                                "move them elsewhere or choose another name.")


def check_single_file(path, *, inputs=(), ours=None, overwrite=True, option="--out", kind="file"):
    """Check a single output file before any work; return its absolute path.

    An existing file is replaced only when ``overwrite`` is true and ``ours(path)`` says that
    dihedra wrote it (a report, a scan, a table of the same kind); never an input of the run, a
    file of a results folder (one its marker lists), a folder, or any other file. The folder of
    the file must exist.
    """
    if path is None or not str(os.fspath(path)).strip():
        raise OutputExistsError(f"the {kind} name is empty; give {option} FILE.")
    path = os.path.abspath(os.fspath(path))
    real = _real(path)
    if real in _input_paths(inputs):
        raise OutputExistsError(f"{option} {path} is an input of this run; choose another file name.")
    if os.path.isdir(path):
        raise OutputExistsError(f"{option} {path} is a folder; give a file name.")
    if os.path.lexists(path):
        listed = read_marker(os.path.dirname(path))
        if listed is not None and os.path.basename(path) in listed["files"]:
            raise OutputExistsError(f"{path} is one of the files of the results folder {os.path.dirname(path)} "
                                    f"({MARKER} lists it); it is left untouched: choose another file name.")
        if ours is None or not ours(path):
            raise OutputExistsError(f"{path} exists and was not written by dihedra as a {kind}; it is left untouched: "
                                    "choose another file name.")
        if not overwrite:
            raise OutputExistsError(f"{path} already exists; choose another {option} or add --overwrite.")
    folder = os.path.dirname(path)
    if not os.path.isdir(folder):
        raise OutputExistsError(f"the folder of {path} does not exist; create it first.")
    return path


def file_head_contains(path, text, limit=4096):
    """Whether the first ``limit`` bytes of a file contain ``text`` (a signature test for
    :func:`check_single_file`)."""
    try:
        with open(path, "rb") as fh:
            return text.encode("utf-8") in fh.read(limit)
    except OSError:
        return False


# ----------------------------------------------------------------------------------------------
# Writing files
# ----------------------------------------------------------------------------------------------

def check_replaceable_in(folder, name):
    """Raise :class:`OutputExistsError` if ``folder/name`` exists and the folder's marker does not
    list it (a file dihedra did not write); return the marker (``None`` for an unmarked folder)."""
    target = os.path.join(os.fspath(folder), name)
    rel = os.path.relpath(target, folder).replace(os.sep, "/")
    marker = read_marker(folder)
    if os.path.lexists(target) and (marker is None or rel not in marker["files"]):
        raise OutputExistsError(f"{target} exists and was not written by dihedra; it is left untouched: move it "
                                "elsewhere (or choose another output name) and run again.")
    return marker


def is_inside(path, folder):
    """Whether ``path`` is ``folder`` or lies below it (after resolving links)."""
    return _inside(_real(path), _real(folder))


def write_file(folder, name, write, *, marked=True):
    """Write ``folder/name`` through ``write(tmp_path)`` under a temporary name, then rename it
    into place; return the path.

    ``name`` may hold subfolders (``figures/x.png``; they are created). When ``marked`` (the
    default), an existing file is replaced only if the folder's marker lists it, and the name is
    added to the list (a folder without a marker gets one). ``marked=False`` is for single files
    whose target was checked by :func:`check_single_file`.
    """
    folder = os.fspath(folder)
    target = os.path.join(folder, name)
    rel = os.path.relpath(target, folder).replace(os.sep, "/")
    marker = check_replaceable_in(folder, name) if marked else None
    parent = os.path.dirname(target)
    if parent != folder:
        os.makedirs(parent, exist_ok=True)
    tmp = os.path.join(parent, f".{os.path.basename(name)}.{uuid.uuid4().hex[:8]}{TMP_SUFFIX}")
    try:
        write(tmp)
        os.replace(tmp, target)
    finally:
        if os.path.exists(tmp):
            os.remove(tmp)
    if marked and (marker is None or rel not in marker["files"]):
        record_files(folder, [rel])
    return os.path.join(folder, *rel.split("/"))


def write_text(folder, name, text, **kwargs):
    """:func:`write_file` of a UTF-8 text."""
    def write(tmp):
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(text)
    return write_file(folder, name, write, **kwargs)


# ----------------------------------------------------------------------------------------------
# A results folder assembled beside its target and moved into place
# ----------------------------------------------------------------------------------------------

def _staging_name(base, kind):
    host = re.sub(r"[^0-9A-Za-z_]", "_", socket.gethostname())[:40] or "host"
    return f".{base}.{kind}-{host}-{os.getpid()}-"


def _alive(pid):
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def remove_dead_staging(parent, base):
    """Remove staging folders of earlier runs into ``parent/base`` whose process is gone (same host
    only: a run on another node of a shared file system is left alone). Returns their names."""
    host = re.sub(r"[^0-9A-Za-z_]", "_", socket.gethostname())[:40] or "host"
    removed = []
    try:
        names = os.listdir(parent)
    except OSError:
        return removed
    for name in names:
        m = _STAGING.match(name)
        if not m or m["name"] != base or m["host"] != host or _alive(int(m["pid"])):
            continue
        shutil.rmtree(os.path.join(parent, name), ignore_errors=True)
        removed.append(name)
    return removed


class StagedFolder:
    """A results folder assembled in a hidden folder beside its target.

    >>> import os, tempfile
    >>> tmp = tempfile.TemporaryDirectory()
    >>> target = os.path.join(tmp.name, "results")
    >>> staged = StagedFolder.begin(target, overwrite=False, inputs=[], command="track")
    >>> with open(os.path.join(staged.path, "table.csv"), "w") as f:   # write into staged.path
    ...     _ = f.write("x")
    >>> staged.commit() == target   # or staged.discard() after an error
    True
    >>> sorted(os.listdir(target))
    ['dihedra-files.json', 'table.csv']
    >>> tmp.cleanup()

    :meth:`begin` checks the target (:func:`check_folder_target`) and records whether it exists
    and whose it is; :meth:`commit` writes the marker (every file of the staging folder) and moves
    the folder into place, refusing when the target appeared or changed hands in between.
    """

    def __init__(self, out, path, previous_run, command):
        self.out = out
        self.path = path
        self.previous_run = previous_run   # run id of the folder replaced, "" for an empty folder, None
        self.command = command
        self.run_id = uuid.uuid4().hex

    @classmethod
    def begin(cls, out, *, overwrite=False, inputs=(), command="track", option="--out"):
        out = check_folder_target(out, overwrite=overwrite, inputs=inputs, option=option)
        parent, base = os.path.split(out)
        remove_dead_staging(parent, base)
        previous = None
        if os.path.isdir(out):
            marker = read_marker(out)
            previous = marker.get("run_id", "") if marker else ""
        path = tempfile.mkdtemp(prefix=_staging_name(base, "partial"), dir=parent)
        mask = os.umask(0)
        os.umask(mask)
        os.chmod(path, 0o777 & ~mask)   # a folder like any other (mkdtemp makes it private)
        return cls(out, path, previous, command)

    def commit(self):
        """Write the marker and move the staging folder into place; returns the folder.

        SIGINT and SIGTERM are held while the old folder is moved aside and the new one into place
        (:func:`signals_held`): an interrupt comes before or after, never between. An interrupt
        whose raise Python swallowed earlier (in a finaliser or a fork handler) stops it here."""
        with signals_held():
            check_interrupts()
            out = self._commit()
        return out

    def _commit(self):
        marker = new_marker(self.command, _relative_files(self.path))
        marker["run_id"] = self.run_id
        _write_marker(self.path, marker)
        out = self.out
        old = None
        if self.previous_run is not None:
            old = self._move_old_aside()
        try:
            _rename_noreplace(self.path, out)
        except FileExistsError:
            if old is not None:   # give the old folder back
                with contextlib.suppress(OSError):
                    _rename_noreplace(old, out)
            raise OutputExistsError(f"{out} appeared while this run was working (another run into the same "
                                    "folder?); it is left as it is and these results were not kept: run again "
                                    "with another --out.") from None
        self.path = None
        COMMITTED.append(out)
        if old is not None:
            _remove_listed(old)
        return out

    def _move_old_aside(self):
        """Move the folder being replaced out of the way (after checking that it is still the one
        seen at the start and still holds only dihedra's files); ``None`` when there is none."""
        out = self.out
        changed = OutputExistsError(f"{out} changed while this run was working (another run, or files added); it "
                                    "is left as it is and these results were not kept: run again.")
        if not os.path.isdir(out):
            if self.previous_run:
                raise OutputExistsError(f"{out} was removed while this run was working; these results were not "
                                        "kept: run again.")
            return None
        if not self.previous_run:   # an empty folder at the start: it must still be empty
            try:
                os.rmdir(out)
            except OSError:
                raise changed from None
            return None
        marker = read_marker(out)
        if marker is None or marker.get("run_id") != self.previous_run or foreign_files(out, marker):
            raise changed
        parent, base = os.path.split(out)
        old = tempfile.mkdtemp(prefix=_staging_name(base, "old"), dir=parent)
        os.rmdir(old)
        os.rename(out, old)
        return old

    def discard(self):
        """Remove the staging folder (after an error or an interrupt). Workers of a cluster may
        still be writing a file into it meanwhile: it is tried again for a second."""
        if self.path is not None:
            for _ in range(5):
                shutil.rmtree(self.path, ignore_errors=True)
                if not os.path.exists(self.path):
                    break
                time.sleep(0.2)
            self.path = None


def _remove_listed(old):
    """Delete the files the marker of ``old`` lists, then its empty folders; a file that is not
    listed (added in the last instant) is kept, and so is the folder, with a visible name."""
    marker = read_marker(old) or {"files": []}
    for rel in marker["files"] + [MARKER]:
        with contextlib.suppress(OSError):
            os.remove(os.path.join(old, *rel.split("/")))
    for root, dirs, files in os.walk(old, topdown=False):
        for name in files:
            if name.endswith(TMP_SUFFIX):
                with contextlib.suppress(OSError):
                    os.remove(os.path.join(root, name))
        with contextlib.suppress(OSError):
            os.rmdir(root)
    if os.path.isdir(old):   # files a user added at the last moment: keep them where they can be seen
        parent, name = os.path.split(old)
        kept = os.path.join(parent, f"{_STAGING.match(name)['name']}.kept-{uuid.uuid4().hex[:6]}")
        with contextlib.suppress(OSError):
            os.rename(old, kept)


def _rename_noreplace(src, dst):
    """Rename ``src`` to ``dst`` unless ``dst`` exists (``FileExistsError``); atomic on Linux
    (``renameat2`` with ``RENAME_NOREPLACE``), a check and a rename elsewhere."""
    fn = None
    with contextlib.suppress(OSError, AttributeError):
        fn = ctypes.CDLL(None, use_errno=True).renameat2
    if fn is not None:
        at_fdcwd, noreplace = -100, 1
        fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
        if fn(at_fdcwd, os.fsencode(src), at_fdcwd, os.fsencode(dst), noreplace) == 0:
            return
        err = ctypes.get_errno()
        if err in (errno.EEXIST, errno.ENOTEMPTY):
            raise FileExistsError(err, os.strerror(err), dst)
        if err not in (errno.ENOSYS, errno.EINVAL, errno.ENOTSUP):
            raise OSError(err, os.strerror(err), dst)
    if os.path.lexists(dst):
        raise FileExistsError(errno.EEXIST, os.strerror(errno.EEXIST), dst)
    os.rename(src, dst)
