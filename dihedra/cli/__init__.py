"""The ``dihedra`` command line: a thin layer over the Python API.

Each subcommand lives in its own module of this package with ``register(subparsers)``; modules are
discovered by name, so adding a subcommand never edits this file. User errors
(:class:`dihedra.errors.DihedraError`) and failures of the system (a full disk, a read-only
folder: any ``OSError``) print as one line without a traceback and exit with 2; an output whose
reader has gone (``dihedra torsions TOP | head``) ends the command without a word, with the exit
status of a process that SIGPIPE ended (141). Ctrl-C (SIGINT) and SIGTERM stop a command at any
point along the same path: the run's threads and worker processes are stopped, its staging folder
removed, and one line is printed (exit 130 or 143).
"""

from __future__ import annotations

import argparse
import contextlib
import gc
import importlib
import os
import pkgutil
import signal
import sys
import threading
import warnings

from .. import EARLY_SIGINT
from .._version import __version__
from ..errors import DihedraError

#: Preferred order of subcommands in --help; others follow alphabetically.
ORDER = ["demo", "run", "torsions", "track", "convergence", "profile", "compare", "scan", "kinetics", "couplings", "refit",
         "windows", "figures", "report"]
_SKIP = {"common"}


class _Parser(argparse.ArgumentParser):
    """An argument parser whose errors are one ``dihedra: error:`` line (exit 2), like every other:
    a subcommand's name its own (``dihedra: error: dihedra track: ...``), the top-level parser's
    none (``dihedra: error: unrecognized arguments: -q``), each pointing to the help of the
    command given."""

    #: The command whose ``--help`` an error points to, when not this parser's own (the top-level
    #: parser reports options that no parser took, after a subcommand was named).
    help_command = None

    def parse_known_args(self, args=None, namespace=None):
        self.given = list(sys.argv[1:] if args is None else args)   # (for the hint of error())
        return super().parse_known_args(args, namespace)

    def error(self, message):
        where = f"{self.prog}: " if self.prog != "dihedra" else ""
        self.exit(2, f"dihedra: error: {where}{message}{self._many_values_hint(message)} "
                     f"(see '{self.help_command or self.prog} --help').\n")

    def _many_values_hint(self, message):
        """Why a required argument is missing when an option that takes several values was given
        (``dihedra figures --types 'ALA:*' DIR``: DIR is read as one more type), and the two ways
        out; "" otherwise."""
        if not message.startswith("the following arguments are required:"):
            return ""
        named = [n.strip() for n in message.split(":", 1)[1].split(",")]
        missing = [argparse._get_action_name(a) for a in self._actions
                   if not a.option_strings and argparse._get_action_name(a) in named]
        given = getattr(self, "given", [])
        many = [o for a in self._actions if a.option_strings and a.nargs in ("+", "*")
                for o in a.option_strings if o in given]
        if not missing or not many:
            return ""
        name, option = " ".join(missing), many[-1]
        return (f"; {option} takes every value that follows it, so a {name} given after them is read as one "
                f"of them: give {name} before {option}, or end its values with -- "
                f"('{self.prog} {option} ... -- {name}')")


def build_parser(command=None):
    """The parser of the command line; with ``command`` (a subcommand's name) only that
    subcommand's module is imported, so that a run does not pay for loading the others."""
    parser = _Parser(
        prog="dihedra",
        description="Conformer-aware torsion analysis of molecular-dynamics trajectories: torsion "
                    "states and populations with honest errors, free-energy profiles, comparison with "
                    "static scans and experiment, kinetics, figures and reports.",
        epilog="Run 'dihedra COMMAND --help' for the options of a command. Start with 'dihedra demo'.")
    parser.add_argument("--version", action="version", version=f"dihedra {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    names = [m.name for m in pkgutil.iter_modules(__path__) if m.name not in _SKIP]
    names.sort(key=lambda n: (ORDER.index(n) if n in ORDER else len(ORDER), n))
    if command in names:
        names = [command]
        parser.help_command = f"dihedra {command}"
    for name in names:
        module = importlib.import_module(f"{__name__}.{name}")
        if hasattr(module, "register"):
            module.register(sub)
    return parser


def main(argv=None):
    """Run the command line (``argv``, default this process's own) and return the exit status.

    As the command line of this process (``argv`` None), a command that failed or was interrupted
    ends the process at once once its line is printed and its clean-up done: worker processes
    killed in the middle of handing back their results can leave threads of the process pools
    waiting for ever, and the interpreter would wait for them on its way out."""
    if "pyarrow" not in sys.modules:   # Arrow on the system heap: see trajectory.result.arrow_on_system_heap
        os.environ.setdefault("ARROW_DEFAULT_MEMORY_POOL", "system")
    given = sys.argv[1:] if argv is None else argv
    if "numpy" not in sys.modules and next((a for a in given if not a.startswith("-")), None) in ("track", "kinetics"):
        # one BLAS thread: the pass's own threads use the cores, and OpenBLAS' idle threads spin
        # for a while after every call (on 2 cores, about 0.1-0.2 s of a 6,000-frame run); the
        # small Markov matrices of kinetics gain nothing from threads, and on a busy machine its
        # conformer models took 27 s instead of 2.3 s with them
        os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    try:
        if argv is None:
            _note_early_interrupts()
        status = _main(argv)
    except KeyboardInterrupt:   # Ctrl-C while the commands were still being loaded: nothing was done
        print("dihedra: interrupted (SIGINT); stopped before any work (nothing was written).", file=sys.stderr)
        status = 128 + signal.SIGINT
    if argv is None and not status and not _flushed():
        status = 128 + signal.SIGPIPE
    if argv is None and status not in (None, 0):
        _release_process_resources()
        sys.stdout.flush()
        sys.stderr.flush()
        os._exit(status)
    if argv is None:
        _quick_exit()
    return status


def import_mdanalysis_without_rdkit():
    """Import MDAnalysis without the RDKit it loads for its converter when RDKit is installed
    (43 MB and 0.08 s: a tenth of the memory ``dihedra track`` may use), for a command that never
    converts to RDKit: while MDAnalysis is imported, ``import rdkit`` fails (MDAnalysis then
    leaves its RDKit converter out); afterwards RDKit imports as usual. Nothing is done when
    MDAnalysis or RDKit is already loaded."""
    if "MDAnalysis" in sys.modules or "rdkit" in sys.modules:
        return
    sys.modules["rdkit"] = None
    try:
        import MDAnalysis  # noqa: F401
    finally:
        del sys.modules["rdkit"]


def _quick_exit():
    """End a command that succeeded without the interpreter's teardown of every module and object
    (about 0.1 s after a run that loaded MDAnalysis, pandas and numba): the exit handlers run as
    on a normal exit (logging, multiprocessing, finalisers of temporary folders), the output is
    flushed, and the process ends with status 0. Only when no other thread but daemons is left
    (a normal exit would wait for it), no profiler or debugger watches (it reports once the
    command has returned: ``python -m cProfile -m dihedra ...``) and the output could be flushed;
    else the exit is normal."""
    import atexit
    import threading

    if any(t is not threading.main_thread() and t.is_alive() and not t.daemon for t in threading.enumerate()):
        return
    if sys.getprofile() is not None or sys.gettrace() is not None:
        return
    try:
        sys.stdout.flush()
        sys.stderr.flush()
    except (OSError, ValueError):   # a closed pipe: the normal exit reports it
        return
    atexit._run_exitfuncs()
    try:
        sys.stdout.flush()
        sys.stderr.flush()
    finally:
        os._exit(0)


def _release_process_resources():
    """What multiprocessing would release on a normal exit (the semaphores of stopped pools;
    else its resource tracker reports them as leaked), without joining any thread."""
    if "multiprocessing.util" in sys.modules:
        try:
            sys.modules["multiprocessing.util"]._run_finalizers()
        except Exception:  # noqa: BLE001 - the exit goes on
            pass


#: SIGINT received while the command's modules were loading (see :func:`_note_early_interrupts`;
#: the package notes those that come while it is imported as the command line).
_EARLY = EARLY_SIGINT


def _note_early_interrupts():
    """While the modules of a command load (a second or so), SIGINT is noted, not raised: a
    ``KeyboardInterrupt`` raised inside the import machinery can land in one of its callbacks,
    where Python prints "Exception ignored" and goes on, and the command would then run as if
    never interrupted. The command stops, before any work, as soon as its modules are loaded."""
    if threading.current_thread() is threading.main_thread():
        signal.signal(signal.SIGINT, lambda signum, frame: _EARLY.append(signum))


def _main(argv):
    given = sys.argv[1:] if argv is None else argv
    command = next((a for a in given if not a.startswith("-")), None)
    with _collector_paused(argv is None):
        if command == "track":   # (here, where an early Ctrl-C is noted, not raised)
            import_mdanalysis_without_rdkit()
        parser = build_parser(command)
        try:
            args = parser.parse_args(argv)
        except SystemExit as exc:   # --help, --version (0) or a usage error (2, one line printed)
            return exc.code
    if _EARLY:   # Ctrl-C while the modules loaded: nothing done yet
        raise KeyboardInterrupt()
    if not getattr(args, "func", None):
        parser.print_help()
        return 0
    warnings.filterwarnings("ignore", category=DeprecationWarning)
    warnings.filterwarnings("ignore", module="MDAnalysis")
    from ..io.outputs import COMMITTED
    from .common import expand_types_option

    committed = len(COMMITTED)
    finished = False
    with stop_signals(restore=argv is not None) as received:
        try:
            expand_types_option(args)
            status = args.func(args)
            if received:   # a signal whose raise Python swallowed: the command still ends as interrupted
                finished = True
                raise KeyboardInterrupt()
        except DihedraError as exc:
            return _error(str(exc))
        except OSError as exc:   # a full disk, a read-only folder, a file that went away
            if output_closed(exc):   # '| head' had what it wanted: ended as by SIGPIPE, without a word
                return 128 + signal.SIGPIPE
            return _error(describe_os_error(exc))
        except KeyboardInterrupt:
            name = signal.Signals(received[0]).name if received else "SIGINT"
            done = COMMITTED[committed:]
            what = (f"after writing {done[-1]}: that is complete, what came after it did not finish" if done else
                    "after the command had finished: its output is complete" if finished else
                    "what it was writing was discarded; files written before are as they were")
            print(f"dihedra: interrupted ({name}); stopped ({what}).", file=sys.stderr)
            return 128 + (received[0] if received else signal.SIGINT)
    return 0 if status is None else int(status)


@contextlib.contextmanager
def _collector_paused(own_process):
    """As this process's own command line: no garbage collection while the command's modules are
    imported (MDAnalysis, pandas, numba: over 10^5 objects, each full collection of which scans
    them all again), and then those objects are left out of every later full collection
    (``gc.freeze``, meant for this: they live as long as the process); about 0.1 s less at the
    start and more during a run. Not for main() called from another program, whose objects are
    not ours to pin."""
    if not own_process:
        yield
        return
    gc.disable()
    try:
        yield
    finally:
        gc.freeze()
        gc.enable()


def _error(text):
    print(f"dihedra: error: {text}", file=sys.stderr)
    sys.stderr.flush()
    return 2


def output_closed(exc):
    """Whether ``exc`` is a write to a standard output or error whose reader has gone (``dihedra
    torsions TOP | head`` once head has its lines): a pipe no process reads. That stream is then
    pointed at /dev/null, so that the flushes still to come (at the exit) end quietly too."""
    import select

    if not isinstance(exc, BrokenPipeError):
        return False
    closed = False
    for stream in (sys.stdout, sys.stderr):
        try:
            fd = stream.fileno()
            poller = select.poll()
            poller.register(fd, select.POLLOUT)
            if not any(events & (select.POLLERR | select.POLLHUP) for _, events in poller.poll(0)):
                continue
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, fd)
            os.close(devnull)
            closed = True
        except (AttributeError, OSError, ValueError):   # not a file (a test's capture) or no poll
            continue
    return closed


def _flushed():
    """Flush the output of a command that succeeded: False when its reader had gone (see
    :func:`output_closed`)."""
    try:
        sys.stdout.flush()
    except OSError as exc:
        return not output_closed(exc)
    return True


def describe_os_error(exc):
    """One sentence for an ``OSError`` of the system: what failed, where, and what to do."""
    import errno

    where = f" ({exc.filename})" if getattr(exc, "filename", None) else ""
    reason = exc.strerror or str(exc) or type(exc).__name__
    hints = {errno.ENOSPC: "free some space or write elsewhere", errno.EDQUOT: "free some space or write elsewhere",
             errno.EROFS: "the folder is on a read-only file system: write elsewhere",
             errno.EACCES: "check the permissions, or write elsewhere",
             errno.EPERM: "check the permissions, or write elsewhere",
             errno.EFBIG: "the file is larger than this process may write"}
    hint = hints.get(exc.errno, "check the file and the disk")
    return f"{reason}{where}; {hint}."


class _Interrupted(KeyboardInterrupt):
    """SIGTERM, raised as Ctrl-C is, so that one path cleans up after both."""


@contextlib.contextmanager
def stop_signals(restore=True):
    """SIGINT and SIGTERM raise ``KeyboardInterrupt`` in this process (the signal's number is
    appended to the list yielded, :data:`dihedra.trajectory.interrupts.received`, where long
    loops, the final move of a results folder and the end of the command look too: a raise that
    Python swallowed, in a finaliser or a fork handler, is not lost, and is not reported as
    "Exception ignored" either); the first one only: later signals arrive while the run cleans
    up, which takes a second or two, and are ignored. A worker process forked from this one
    (multiprocessing) ends at once and quietly on either signal: this process removes what it
    wrote. Outside the main thread (dihedra called from a thread of another program), nothing
    changes. At the end the previous handlers come back, or with ``restore=False`` (the command
    line of this process: its work is done, its exit status stands) both signals are ignored
    while the interpreter shuts down."""
    import threading

    from ..trajectory import interrupts

    received = interrupts.received
    received.clear()
    if threading.current_thread() is not threading.main_thread():
        yield received
        return
    me = os.getpid()

    def handler(signum, frame):
        if os.getpid() != me:
            os._exit(128 + signum)
        if received:
            return
        received.append(signum)
        raise _Interrupted() if signum == signal.SIGTERM else KeyboardInterrupt()

    hook = sys.unraisablehook

    def quiet(unraisable):   # the raise of a noted signal, swallowed in a finaliser or a fork handler
        if received and isinstance(unraisable.exc_value, KeyboardInterrupt):
            return
        hook(unraisable)

    previous = {sig: signal.signal(sig, handler) for sig in (signal.SIGINT, signal.SIGTERM)}
    sys.unraisablehook = quiet
    try:
        yield received
    finally:
        for sig, old in previous.items():
            signal.signal(sig, old if restore else signal.SIG_IGN)
        if restore:
            received.clear()
            sys.unraisablehook = hook


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
