"""Running the trajectory pass on a dask.distributed cluster.

MDAnalysis splits an analysis into *computation groups* (equal, contiguous slices of the analysed
frames) and hands them to a backend whose ``apply(func, groups)`` returns one partial analysis
per group; the partial results are then merged exactly (sums of counts, see
:mod:`dihedra.trajectory.trackpass`). MDAnalysis' own ``dask`` backend runs the groups with
``dask.compute(..., scheduler="processes")`` on the local machine and never uses a
``distributed.Client``. :class:`DistributedBackend` is a backend object
(:class:`MDAnalysis.analysis.backends.BackendBase`) whose :meth:`~DistributedBackend.apply` maps
the groups through a client of an existing scheduler instead, so the frames of a trajectory are
spread over every worker of the cluster (one group per worker thread). Replicas are analysed one
after another, each spread over all workers.

Requirements of the cluster
---------------------------
* Every worker must read the topology and trajectory files under the same paths as the calling
  process (the Universe travels to the workers pickled, and re-opens its files there).
* Every worker must write into the folder being written (beside ``--out``, or the system
  temporary folder without ``--out``): the workers write the files of the time series of their
  frames there, and their block sums for the calling process to read. Same machine, or a file
  system shared by all nodes.
* The workers need the same dihedra, MDAnalysis, NumPy, numba and pyarrow as the calling process.

Example
-------
A scheduler started by a site's job system (``dask scheduler`` and ``dask worker ADDRESS`` on the
nodes) is used with ``dihedra track ... --scheduler tcp://node01:8786``, or from Python::

    from dihedra import track
    res = track("top.pdb", ["md.xtc"], scheduler="tcp://node01:8786", out="res")
"""

from __future__ import annotations

import pickle
import socket

from MDAnalysis.analysis.backends import BackendBase, BackendDask, BackendMultiprocessing

from ..errors import DihedraError
from . import interrupts

INSTALL_HINT = 'install dask.distributed to use a scheduler: pip install "dihedra[cluster]"'


def _import_distributed():
    try:
        import distributed
    except ImportError:  # pragma: no cover - depends on the environment
        raise DihedraError(f"the dask.distributed package is not installed; {INSTALL_HINT}.") from None
    return distributed


def connect(scheduler, timeout_s=30):
    """A ``distributed.Client`` for ``scheduler`` (an address or an existing client).

    Returns
    -------
    client : distributed.Client
    owned : bool
        True when the client was opened here (the caller closes it).
    """
    distributed = _import_distributed()
    if isinstance(scheduler, distributed.Client):
        return scheduler, False
    address = str(scheduler)
    _probe(address)
    try:
        client = distributed.Client(address, timeout=timeout_s, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        raise DihedraError(f"cannot reach a dask scheduler at {address!r} ({exc}); start one with "
                           "'dask scheduler' (and workers with 'dask worker ADDRESS'), and give its "
                           "address, e.g. tcp://host:8786.") from None
    return client, True


def _probe(address, timeout_s=3.0):
    """Fail at once (one clear error) when nothing listens at a ``tcp://host:port`` address,
    instead of letting a client retry for its whole timeout."""
    rest = address.split("://", 1)[1] if "://" in address else address
    if "://" in address and not address.startswith("tcp://"):
        return   # tls://, ucx://, inproc://: the client's own connection decides
    host, _, port = rest.rstrip("/").rpartition(":")
    if not host or not port.isdigit():
        raise DihedraError(f"the scheduler address {address!r} is not of the form tcp://host:port.")
    try:
        with socket.create_connection((host.strip("[]"), int(port)), timeout=timeout_s):
            pass
    except OSError as exc:
        raise DihedraError(f"cannot reach a dask scheduler at {address!r} ({exc.strerror or exc}); start one with "
                           "'dask scheduler' (and workers with 'dask worker ADDRESS'), and give its address, e.g. "
                           "tcp://host:8786.") from None


def _ignore_interrupts():
    """In a worker process: Ctrl-C at the terminal reaches the whole process group; the parent
    stops the workers itself (no traceback from each of them)."""
    import signal

    signal.signal(signal.SIGINT, signal.SIG_IGN)


class LocalProcessBackend(BackendMultiprocessing):
    """MDAnalysis' ``multiprocessing`` backend (the computation groups mapped over worker processes,
    results in order) on a ``ProcessPoolExecutor`` whose workers are killed at once when the run
    is interrupted or fails. MDAnalysis' own ``multiprocessing.Pool`` can deadlock when it is
    terminated while it is still sending the groups (large pickles) to its workers."""

    def apply(self, func, computations):
        import multiprocessing
        from concurrent.futures import FIRST_EXCEPTION, ProcessPoolExecutor, wait

        pool = ProcessPoolExecutor(self.n_workers, mp_context=multiprocessing.get_context(),
                                   initializer=_ignore_interrupts)
        try:
            with interrupts.signals_held():   # the workers start (fork) here: no signal in between
                futures = [pool.submit(func, group) for group in computations]
            pending = futures
            while pending:
                done, pending = wait(pending, timeout=0.5, return_when=FIRST_EXCEPTION)
                interrupts.check()
                if any(f.exception() is not None for f in done):
                    break
            results = [f.result() for f in futures]
        except BaseException:
            stop_pool(pool)
            raise
        pool.shutdown()
        return results


class LocalDaskBackend(BackendDask):
    """MDAnalysis' ``dask`` backend (``dask.compute`` with local worker processes) that stops its
    workers at once when the run is interrupted or fails: dask's own pool would wait for the
    running groups (a whole slice of the trajectory each) before it returns."""

    def apply(self, func, computations):
        import multiprocessing

        import dask
        from concurrent.futures import ProcessPoolExecutor
        from dask.delayed import delayed

        pool = ProcessPoolExecutor(self.n_workers, mp_context=multiprocessing.get_context(),
                                   initializer=_ignore_interrupts)
        try:
            start_workers(pool, self.n_workers)
            results = dask.compute([delayed(func)(task) for task in computations], scheduler="processes",
                                   pool=pool, chunksize=1)[0]
        except BaseException:
            stop_pool(pool)
            raise
        pool.shutdown()
        return results


def backend_kwargs(backend, n_workers):
    """The keyword arguments of ``AnalysisBase.run`` for a parallel ``backend``: the names
    ``multiprocessing`` and ``dask`` become the local backends of this module (their workers stop
    at once on an interrupt), any other name is MDAnalysis' own with ``n_workers``, and a backend
    object (:class:`DistributedBackend`) is used as it is, with its own workers."""
    if backend == "multiprocessing":
        backend = LocalProcessBackend(n_workers)
    elif backend == "dask":
        backend = LocalDaskBackend(n_workers)
    return dict(backend=backend, n_workers=n_workers if isinstance(backend, str) else None,
                unsupported_backend=not isinstance(backend, str))


def start_workers(pool, n):
    """Start the ``n`` worker processes of a ``ProcessPoolExecutor`` now, with signals held: a
    pool forks them when work is first handed to it, and a signal whose raise lands in the fork
    handlers of the ``logging`` module is reported and swallowed there."""
    from concurrent.futures import wait

    with interrupts.signals_held():
        warm = [pool.submit(int) for _ in range(n)]
    wait(warm)
    interrupts.check()


def stop_pool(pool):
    """Kill the worker processes of a ``ProcessPoolExecutor`` and let it go (no waiting for the
    work in hand). The thread that feeds the workers may be stuck writing a large task into a pipe
    that no worker reads any more: it is not waited for (its queue is told not to join it), or
    the pool's own clean-up, and then the interpreter's exit, would wait for ever."""
    call_queue = getattr(pool, "_call_queue", None)
    if call_queue is not None:
        call_queue.cancel_join_thread()
    for proc in list((getattr(pool, "_processes", None) or {}).values()):
        try:
            proc.kill()
        except (OSError, AttributeError):
            pass
    pool.shutdown(wait=False, cancel_futures=True)


def _run_group(func_bytes, group):
    # every group gets its own copy of the analysis, also on threads of one worker process
    return pickle.loads(func_bytes)(group)


class DistributedBackend(BackendBase):
    """MDAnalysis backend that runs computation groups on a dask.distributed cluster.

    Parameters
    ----------
    client : distributed.Client
        Client of the scheduler.
    n_workers : int, optional
        Number of computation groups per analysis; default the number of worker threads of the
        cluster when the backend is made.

    Examples
    --------
    >>> from distributed import Client, LocalCluster            # doctest: +SKIP
    >>> client = Client(LocalCluster(n_workers=2, processes=False))  # doctest: +SKIP
    >>> TorsionPass(u, tset, scheme).run(backend=DistributedBackend(client),
    ...                                  unsupported_backend=True)   # doctest: +SKIP
    """

    def __init__(self, client, n_workers=None):
        self.client = client
        if n_workers is None:
            n_workers = int(sum(client.nthreads().values()))
        if n_workers < 1:
            raise DihedraError(f"the dask scheduler at {client.scheduler.address} has no workers; "
                               "start some with 'dask worker ADDRESS' and run again.")
        super().__init__(n_workers=int(n_workers))

    def apply(self, func, computations):
        """Map ``func`` over the computation groups on the cluster, results in group order."""
        payload = self.client.scatter(pickle.dumps(func), broadcast=True)
        futures = self.client.map(_run_group, [payload] * len(computations), list(computations),
                                  pure=False)
        try:
            return self.client.gather(futures)
        except BaseException:   # an interrupt or a failed group: the cluster drops the rest of the work
            _abandon(self.client, futures)
            raise


def _abandon(client, futures):
    """Cancel the groups not yet run (a shared cluster is not kept busy for nothing). The client's
    event loop still holds the tasks of the interrupted gather, which asyncio would report as
    "Task exception was never retrieved" tracebacks when they are collected: its logger is quieted."""
    import logging

    logging.getLogger("asyncio").setLevel(logging.CRITICAL)
    try:
        client.cancel(futures)
    except Exception:  # noqa: BLE001 - the scheduler may be gone; the error that stopped the run stands
        pass
