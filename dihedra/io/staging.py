"""Results folders assembled in a hidden staging folder beside their target and moved into place
in one rename (:class:`StagedFolder`), so an interrupted run never leaves a half-written folder;
staging folders of runs that died are removed the next time a run writes beside them. The rules
on what may be replaced are those of :mod:`dihedra.io.outputs`."""

from __future__ import annotations

import contextlib
import ctypes
import errno
import os
import re
import shutil
import tempfile
import time
import uuid

from ..errors import OutputExistsError
from ..trajectory.interrupts import check as check_interrupts, signals_held
from .outputs import (COMMITTED, MARKER, TMP_SUFFIX, _alive, _relative_files, _write_marker, check_folder_target,
                      foreign_files, host_tag, new_marker, read_marker)

_STAGING = re.compile(r"^\.(?P<name>.+)\.(?:partial|old)-(?P<host>[^-]+)-(?P<pid>\d+)-[0-9a-z_]+$")



def _staging_name(base, kind):
    host = host_tag()
    return f".{base}.{kind}-{host}-{os.getpid()}-"


def remove_dead_staging(parent, base):
    """Remove staging folders of earlier runs into ``parent/base`` whose process is gone (same host
    only: a run on another node of a shared file system is left alone). Returns their names."""
    host = host_tag()
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
