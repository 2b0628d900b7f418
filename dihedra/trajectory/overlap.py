"""Threads of the trajectory pass: batches of frames handed from the reading thread to a second
thread that computes them (:class:`Overlap`), the frames of a batch left to that thread to decode
(:class:`LaterFrames`), and two futures waited for as one (:class:`Both`)."""

from __future__ import annotations

import numpy as np


class Both:
    """Two futures waited for as one (the first one's error first)."""

    def __init__(self, first, second):
        self._futures = [f for f in (first, second) if f is not None]

    def result(self):
        try:
            for f in self._futures:
                f.result()
        finally:
            for f in self._futures:   # the second one too, whatever happened to the first
                f.exception()


class Batch:
    """Coordinates, boxes, frame numbers, times and frame positions of a few frames."""

    def __init__(self, size, n_atoms, words=None):
        # one row per frame: atoms x 3, or ``words`` float32 words as a batch reader lays a
        # frame out (see FrameWork.use_layout)
        self.positions = self.buffer = np.empty((size, n_atoms, 3) if words is None else (size, words),
                                                dtype=np.float32)
        self.dimensions = np.empty((max(size, 1), 6), dtype=np.float32)
        self.frame = np.empty(max(size, 1), dtype=np.int64)
        self.time = np.empty(max(size, 1), dtype=np.float64)
        self.index = np.empty(max(size, 1), dtype=np.intp)
        self.n = 0
        # set by the torsion work (dihedra.trajectory.frame_work): box parameters, the torsions
        # the reading thread computed, and the angle, bin and code rows of both parts
        self.boxes, self.split, self.outputs = None, 0, None
        # the frames whose decoding the reading thread left to the computing one (LaterFrames)
        self.later = None


class LaterFrames:
    """The last frames of a batch whose bytes were read but not decoded, left to another thread
    (:meth:`XTCFrames.read <dihedra.trajectory.trajread.XTCFrames.read>` and
    :meth:`~dihedra.trajectory.trajread.XTCFrames.decode_later`): the bytes, where the frames go,
    and that thread's own work space. ``n`` is the number of frames still to decode (0: none)."""

    def __init__(self):
        self.raw = np.empty(0, dtype=np.uint8)
        self.n = 0
        self.words = None
        self.boxes = np.empty((0, 3, 3), dtype=np.float32)

    def hold(self, frames, buf, starts, positions, dimensions, time_out, n_words):
        """Keep ``frames`` (their bytes at ``starts`` of ``buf``) for decoding into the rows
        ``positions``, ``dimensions`` and ``time_out``, with ``n_words`` words of work space."""
        m = len(frames)
        self.frames, self.buf, self.starts = frames, buf, starts
        self.positions, self.dimensions, self.time_out = positions, dimensions, time_out
        if self.words is None or len(self.words) < n_words:
            self.words = np.empty(n_words, dtype=np.uint64)
        if len(self.boxes) < m:
            self.boxes = np.empty((m, 3, 3), dtype=np.float32)
            self.steps = np.empty(m, dtype=np.int64)
            self.times = np.empty(m, dtype=np.float32)
        self.n = m


class Overlap:
    """A second thread that processes batches of frames while the calling thread reads.

    Batches go through a queue in order; finished batches come back for reuse, so at most
    ``len(batches)`` are in memory. An error in the thread is raised in the calling thread at
    the next :meth:`submit` or at :meth:`finish`.
    """

    def __init__(self, process, batches):
        import queue
        import threading

        self._process = process
        self._todo = queue.Queue()
        self._free = queue.Queue()
        for b in batches:
            self._free.put(b)
        self._error = None
        self._abandon = False
        self._thread = threading.Thread(target=self._run, name="dihedra-pass", daemon=True)
        self._thread.start()

    def _run(self):
        while True:
            batch = self._todo.get()
            if batch is None:
                return
            try:
                if self._error is None and not self._abandon:
                    self._process(batch)
            except BaseException as exc:  # noqa: BLE001 - handed to the calling thread
                self._error = exc
            batch.n = 0
            self._free.put(batch)

    def _check(self):
        if self._error is not None:
            raise self._error

    def take(self):
        """An empty batch (waits until the thread has finished one)."""
        batch = self._free.get()
        self._check()
        return batch

    def submit(self, batch):
        """Queue a full batch and return an empty one."""
        self._check()
        self._todo.put(batch)
        return self.take()

    def finish(self, batch):
        """Queue the last (partial) batch and wait until every batch is processed."""
        if batch is not None and batch.n:
            self._todo.put(batch)
        self.stop()
        self._check()

    def stop(self, abandon=False):
        """End the thread; with ``abandon`` (after an error or an interrupt) the batches still
        queued are dropped, so it ends after the batch in hand."""
        if abandon:
            self._abandon = True
        if self._thread.is_alive():
            self._todo.put(None)
            self._thread.join()
