"""Where dihedra writes, and the rules that keep a user's files safe.

Every file dihedra writes goes through this module:

- A **results folder** is assembled in a hidden staging folder beside it
  (:class:`~dihedra.io.staging.StagedFolder`) and moved into place in one rename at the end, so an
  interrupted run never leaves a half-written folder. Its list of files, ``dihedra-files.json`` (:data:`MARKER`),
  names every file dihedra wrote into it; analyses that add files later add their names.
- ``--overwrite`` replaces only a folder that has this list and holds nothing else (a user's
  NOTES.md or plots/ in it make dihedra refuse), never a folder that holds an input of the run, the
  current folder or one of its parents. The final move refuses to replace a folder that appeared,
  or changed hands, while the run was working (two runs into one folder: the second one fails).
- A file written into an existing folder (:func:`write_file`) goes under a temporary name and is
  renamed over its target, and only over a file that dihedra wrote there; the files of one analysis
  (:func:`file_set`) are all written first and renamed together, so an interruption leaves the
  earlier set whole; an output set replaced
  as a whole (``dihedra figures --overwrite``) drops only files the list names
  (:func:`remove_listed_files`).
- A single file that a user names (a report, a scan, a table) replaces only a file of the same kind
  that dihedra wrote (:func:`check_single_file`), never an input or a file of another program.

Staging folders (:mod:`dihedra.io.staging`) carry the host name and process id of their run;
those of runs that died (a kill, a power cut) are removed the next time a run writes beside them.
"""

from __future__ import annotations

import contextlib
import json
import os
import posixpath
import re
import socket
import threading
import time
import uuid

from ..errors import OutputExistsError, name_list
from ..trajectory.interrupts import signals_held

#: The list of the files dihedra wrote into a results folder (its presence marks the folder).
MARKER = "dihedra-files.json"

#: What this process put into place, in order: results folders moved into place, and sets of files
#: renamed into place together (the command line tells an interrupt after it from one before it).
COMMITTED = []

#: Suffix of the temporary files of :func:`write_file` (a crash may leave one; it is dihedra's).
TMP_SUFFIX = ".dihedra-tmp"



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
    """The files of an analysis that an earlier run wrote into ``folder`` (listed in its marker,
    and still there): those named ``names`` or starting with one of ``prefixes``, sorted."""
    marker = read_marker(folder)
    listed = marker["files"] if marker else []
    return sorted(f for f in listed if (f in set(names) or any(f.startswith(p) for p in prefixes))
                  and os.path.lexists(os.path.join(os.fspath(folder), *f.split("/"))))


def check_earlier_outputs(folder, command, overwrite=False, names=(), prefixes=(), option="--overwrite"):
    """Refuse to replace the outputs of an earlier run of an analysis without ``overwrite``: an
    analysis adds its files to a results folder, and replaces its own earlier ones only when asked
    (files of other settings, such as another coupling relation, have other names)."""
    found = earlier_outputs(folder, names, prefixes)
    if found and not overwrite:
        shown = name_list(found, 4)
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
        shown = name_list(foreign, 5)
        raise OutputExistsError(f"{path} holds files dihedra did not write ({shown}); replacing it would lose them: "
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


def host_tag():
    """This machine's name as it goes into the names of staging folders and temporary files."""
    return re.sub(r"[^0-9A-Za-z_]", "_", socket.gethostname())[:40] or "host"


def _alive(pid):
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _remove_dead_temporaries(parent, base):
    """Remove the temporary files of ``base`` in ``parent`` that a process of this machine left
    when it died (a kill -9 while it wrote): their names carry the host and process id."""
    pattern = re.compile(rf"^\.{re.escape(base)}\.(?P<host>[0-9A-Za-z_]+)-(?P<pid>\d+)-[0-9a-f]{{8}}"
                         rf"{re.escape(TMP_SUFFIX)}$")
    host = host_tag()
    with contextlib.suppress(OSError):
        for name in os.listdir(parent):
            m = pattern.match(name)
            if m and m["host"] == host and not _alive(int(m["pid"])):
                with contextlib.suppress(OSError):
                    os.remove(os.path.join(parent, name))


_SETS = threading.local()


@contextlib.contextmanager
def file_set(folder):
    """Within the block, the files :func:`write_file` writes into ``folder`` go to temporary names;
    at its end they are renamed into place together, with SIGINT and SIGTERM held, so that the
    folder shows either the earlier set or the new one whole. An error or an interruption
    inside the block removes the temporary files and leaves every earlier file as it was. Nested
    blocks on one folder are one set."""
    key = os.path.realpath(os.fspath(folder))
    sets = _SETS.__dict__.setdefault("sets", {})
    if key in sets:
        yield
        return
    pending = sets[key] = []
    done = False
    try:
        yield
        with signals_held():
            for tmp, target, _ in pending:
                os.replace(tmp, target)
            done = True
            if pending:
                COMMITTED.append(f"{len(pending)} new file(s) in {os.fspath(folder)}")
        new = [rel for _, _, rel in pending if rel is not None]
        if new:
            record_files(folder, new)
    finally:
        del sets[key]
        if not done:
            for tmp, _, _ in pending:
                if os.path.exists(tmp):
                    os.remove(tmp)


def _pending_set(folder):
    return getattr(_SETS, "sets", {}).get(os.path.realpath(os.fspath(folder)))


def write_file(folder, name, write, *, marked=True):
    """Write ``folder/name`` through ``write(tmp_path)`` under a temporary name, then rename it
    into place; return the path.

    ``name`` may hold subfolders (``figures/x.png``; they are created, as is ``folder``). When
    ``marked`` (the default), an existing file is replaced only if the folder's marker lists it, and the name is
    added to the list (a folder without a marker gets one). ``marked=False`` is for single files
    whose target was checked by :func:`check_single_file`.
    """
    folder = os.fspath(folder)
    target = os.path.join(folder, name)
    rel = os.path.relpath(target, folder).replace(os.sep, "/")
    marker = check_replaceable_in(folder, name) if marked else None
    parent = os.path.dirname(target)
    os.makedirs(parent, exist_ok=True)   # (a new folder for save(), or a subfolder such as figures/)
    base = os.path.basename(name)
    _remove_dead_temporaries(parent, base)
    tmp = os.path.join(parent, f".{base}.{host_tag()}-{os.getpid()}-{uuid.uuid4().hex[:8]}{TMP_SUFFIX}")
    pending = _pending_set(folder)
    unlisted = marked and (marker is None or rel not in marker["files"])
    try:
        write(tmp)
        if pending is not None:   # (renamed with the rest of its set: file_set)
            pending.append((tmp, target, rel if unlisted else None))
            tmp = None
        else:
            os.replace(tmp, target)
    finally:
        if tmp is not None and os.path.exists(tmp):
            os.remove(tmp)
    if unlisted and pending is None:
        record_files(folder, [rel])
    return os.path.join(folder, *rel.split("/"))


def write_text(folder, name, text, **kwargs):
    """:func:`write_file` of a UTF-8 text."""
    def write(tmp):
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(text)
    return write_file(folder, name, write, **kwargs)
