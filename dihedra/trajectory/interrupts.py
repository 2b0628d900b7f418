"""Interrupts of a running command (SIGINT, SIGTERM) that cannot be lost.

The command line turns the first signal into ``KeyboardInterrupt`` in its main thread and notes it
here (:data:`received`). Python may swallow an exception raised by a signal handler at an unlucky
moment (inside a callback it only reports, such as the handlers the ``logging`` module runs
around every ``fork``), and the run would then go on to the end. So the places that run for long
look here too (:func:`check`: every batch of frames, every replica, while waiting for worker
processes), and the steps that must not be cut in two (starting worker processes, moving a
results folder into place) hold the signals until they are done (:func:`signals_held`).
"""

from __future__ import annotations

import contextlib

#: The signals received by this process's command line (its handler appends them).
received = []


def check():
    """Raise ``KeyboardInterrupt`` if the command was interrupted."""
    if received:
        raise KeyboardInterrupt()


@contextlib.contextmanager
def signals_held():
    """Hold SIGINT and SIGTERM during a short step that must not be cut in two (in the main thread
    of a POSIX system; elsewhere nothing changes): a signal that comes meanwhile is delivered when
    the step is done."""
    import signal
    import threading

    if threading.current_thread() is not threading.main_thread() or not hasattr(signal, "pthread_sigmask"):
        yield
        return
    old = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT, signal.SIGTERM})
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, old)
