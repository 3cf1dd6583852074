"""The dask back end: the functions that walk over runs, mapped over a dask cluster.

Every public function that walks over runs takes ``client=`` (a ``dask.distributed.Client``):
:func:`~msmkit.io.load_trajectories`, :meth:`TrajectorySet.check_values`, :class:`~msmkit.TICA`
``fit`` / ``transform``, :class:`~msmkit.Microstates` ``fit`` / ``assign``,
:func:`~msmkit.count_transitions`, :func:`~msmkit.lag_scan` and
:func:`~msmkit.chapman_kolmogorov`. With ``client=None`` (the
default) nothing here runs and dask is never imported; this module holds the dask plumbing
only, and the tasks call the same numerical helpers as the in-memory path.

What travels
------------
Runs read from files travel as plain descriptions -- the file path, the byte offset of the
data, shape and dtype -- and the workers read the frames themselves (every worker must see the
same paths, e.g. on a shared filesystem). In-memory runs are scattered to the workers once per
call. Centers, projections and moments travel as arrays; no estimator object is sent.

How results come back
---------------------
* TICA: each run's frame and lagged-pair sums (:func:`msmkit.reduce.run_moments`) are summed on
  the client in run order, exactly as in memory (equal to rounding; BLAS may round differently
  in another process).
* Counts: per-run count vectors summed (integers: identical).
* Labels: runs are cut into pieces of similar size, one task per group of pieces; labels are
  identical to the in-memory result given the same centers.
* k-means on the cluster: Lloyd's iterations with per-center sums and counts of each partition
  of the strided frames (the partition sums add up to exactly the full-sample update), or
  mini-batch k-means [2]_ whose every batch is drawn over all strided frames and split among
  the partitions that hold them; both seed with k-means++ [1]_ on a random subsample (as
  scikit-learn seeds the mini-batch k-means). The strided frames stay on the workers.
* Bootstrap samples of :func:`~msmkit.lag_scan` and :func:`~msmkit.chapman_kolmogorov`:
  batches of samples as tasks (:func:`map_sample_batches`), the same samples as in memory.

Failures
--------
A worker that dies is replaced and the tasks it was running run again (dask reruns them up to
``distributed.scheduler.allowed-failures`` times; file-backed runs are simply read again).
A task that keeps killing workers, or in-memory data lost with a dead worker, raises
:class:`ClusterError` naming the runs concerned; results are checked run by run (every run
must come back with the expected number of frames), so a run is never silently missing. Errors
in the data (a vanished file, NaN frames) come back as the usual
:class:`~msmkit.errors.InputError`. :func:`connect` turns an unreachable scheduler into an
InputError.

References
----------
.. [1] D. Arthur and S. Vassilvitskii, "k-means++: the advantages of careful seeding",
       SODA 2007.
.. [2] D. Sculley, "Web-scale k-means clustering", WWW 2010 (mini-batch k-means: per-center
       learning rate 1/count, i.e. each center is the running mean of the frames it received).
.. [3] S. P. Lloyd, "Least squares quantization in PCM", IEEE Trans. Inf. Theory 28, 129 (1982).
"""
from __future__ import annotations

import math
import os
from dataclasses import dataclass

import numpy as np

from ._checks import _short, is_lazy_run, require_optional
from .errors import InputError

__all__ = ["ClusterError", "check_client", "connect"]

#: groups of pieces per worker thread for frame-wise work (assignment, projection): enough to
#: balance uneven runs, few enough to keep the per-task overhead small
TASKS_PER_THREAD = 4
#: partitions of the strided frames per worker thread for k-means on the cluster
PARTITIONS_PER_THREAD = 2
#: mini-batch k-means stops when the smoothed batch inertia has not improved for this many
#: batches (the same rule as scikit-learn's ``max_no_improvement``)
MAX_NO_IMPROVEMENT = 10


class ClusterError(RuntimeError):
    """The cluster could not deliver a result (a task kept killing workers, data was lost with a
    worker, or a run's result did not come back complete)."""


def _distributed():
    return require_optional("distributed", "dask", "Running msmkit on a dask cluster")


# ---------------------------------------------------------------------------------------------
# Connecting and checking the client
# ---------------------------------------------------------------------------------------------

def connect(address, *, timeout: float = 10.0, **client_options):
    """A ``dask.distributed.Client`` connected to the scheduler at ``address``.

    Parameters
    ----------
    address : str
        Scheduler address, e.g. ``"tcp://10.0.0.5:8786"``.
    timeout : float
        Seconds to wait for the scheduler to answer.
    **client_options
        Passed to ``dask.distributed.Client``.

    Returns
    -------
    dask.distributed.Client

    Raises
    ------
    InputError
        No scheduler answered at ``address`` within ``timeout`` (nothing is created).
    ImportError
        dask is not installed (``pip install 'msmkit[dask]'``).

    Examples
    --------
    >>> client = connect("tcp://127.0.0.1:8786")  # doctest: +SKIP
    """
    dist = _distributed()
    if not isinstance(address, str) or not address.strip():
        raise InputError(f"address must be a scheduler address such as 'tcp://host:8786', "
                         f"but got {_short(address)}")
    if isinstance(timeout, bool) or not isinstance(timeout, (int, float)) or not timeout > 0:
        raise InputError(f"timeout must be a positive number of seconds, but got {_short(timeout)}")
    _probe_scheduler(address.strip(), timeout)
    try:
        return dist.Client(address.strip(), timeout=timeout, **client_options)
    except (OSError, TimeoutError, ValueError) as err:
        raise InputError(f"address: no dask scheduler answered at {address.strip()!r} within "
                         f"{timeout:g} s ({type(err).__name__}: {err}); start one (`dask "
                         f"scheduler`), check host and port, or raise timeout") from None


#: a dask scheduler's first message (its handshake) is far smaller than this
HANDSHAKE_MAX_BYTES = 1 << 26


def _probe_scheduler(address: str, timeout: float) -> None:
    """For a plain TCP address, check within ``timeout`` that the server speaks first with a
    message of plausible size, as a dask scheduler does (it sends a handshake on accept).

    A server that accepts and stays silent would otherwise hang the client far past ``timeout``;
    one that sends other bytes makes it read a giant length prefix (a MemoryError of exbibytes).
    """
    import socket
    import struct
    import time

    rest = address[len("tcp://"):] if address.startswith("tcp://") else address
    if "://" in rest:
        return  # tls, inproc, ucx, ...: left to dask
    host, _, port = rest.rpartition(":")
    host = host.strip("[]")
    if not host or not port.isdigit():
        return
    deadline = time.monotonic() + timeout
    try:
        with socket.create_connection((host, int(port)), timeout=timeout) as sock:
            first = b""
            while len(first) < 8:
                sock.settimeout(max(deadline - time.monotonic(), 1e-3))
                got = sock.recv(8 - len(first))
                if not got:
                    raise ConnectionError("the server closed the connection without a word")
                first += got
    except socket.timeout:
        raise InputError(f"address: the server at {address!r} accepts connections but sent nothing within "
                         f"{timeout:g} s, so it is not a dask scheduler; check the port, or raise timeout") from None
    except OSError as err:
        raise InputError(f"address: no dask scheduler answered at {address!r} within {timeout:g} s "
                         f"({type(err).__name__}: {err}); start one (`dask scheduler`), check host and port, "
                         f"or raise timeout") from None
    (size,) = struct.unpack("<Q", first)
    if size > HANDSHAKE_MAX_BYTES:
        raise InputError(f"address: the server at {address!r} does not speak the dask protocol (the first "
                         f"message claims {size} bytes); check that the port is the scheduler's")


def check_client(client) -> None:
    """Raise InputError unless ``client`` is a running ``dask.distributed.Client``."""
    if isinstance(client, (str, bytes, os.PathLike)):
        raise InputError(f"client must be a dask.distributed.Client, but got the address "
                         f"{_short(client)}; connect first: "
                         f"client = msmkit.distributed.connect({_short(client)})")
    dist = _distributed()
    if not isinstance(client, dist.Client):
        raise InputError(f"client must be a dask.distributed.Client (or None to compute here), "
                         f"but got {type(client).__name__}")
    if client.status != "running":
        raise InputError(f"client is {client.status}, not running; connect a new one "
                         f"(msmkit.distributed.connect(address)) or pass client=None")


def _n_threads(client) -> int:
    try:
        return max(1, sum(client.nthreads().values()))
    except Exception:  # pragma: no cover - an unusual client; one partition per run is fine
        return 1


# ---------------------------------------------------------------------------------------------
# Runs as plain descriptions
# ---------------------------------------------------------------------------------------------

def run_spec(run):
    """A plain description of a lazy run that a worker can open: paths, offsets, arrays.

    ``("npy", path, offset, shape, dtype, fortran)``, ``("hdf5", path, key, shape, dtype)``,
    ``("projected", base, mean, projection, chunk)``; other lazy runs (user classes) are sent
    as they are (``("object", run)``, pickled by dask).
    """
    from .io import _HDF5Run, _NpyRun
    from .reduce import _ProjectedRun

    if isinstance(run, np.ndarray):
        return run
    if isinstance(run, _NpyRun):
        return ("npy", run.source, run._offset, run._shape, run._dtype.str, run._fortran)
    if isinstance(run, _HDF5Run):
        return ("hdf5", run._path, run._key, run._shape, run._dtype.str)
    if isinstance(run, _ProjectedRun):
        return ("projected", run_spec(run.base), run.mean, run.projection, run.chunk)
    return ("object", run)


def open_run(item):
    """The run described by ``item`` (see :func:`run_spec`); arrays are returned as they are."""
    if isinstance(item, np.ndarray):
        return item
    kind = item[0]
    if kind == "npy":
        from .io import _NpyRun
        _, path, offset, shape, dtype, fortran = item
        return _NpyRun(path, offset, shape, np.dtype(dtype), fortran)
    if kind == "hdf5":
        from .io import _HDF5Run
        _, path, key, shape, dtype = item
        return _HDF5Run(path, key, shape, np.dtype(dtype))
    if kind == "projected":
        from .reduce import _ProjectedRun
        _, base, mean, projection, chunk = item
        return _ProjectedRun(open_run(base), mean, projection, chunk)
    if kind == "object":
        return item[1]
    raise ValueError(f"unknown run description {kind!r}")  # pragma: no cover - internal


def _items(client, runs) -> list:
    """One item per run for the tasks: a description for lazy runs, a scattered future for
    in-memory arrays (sent once, then moved between workers by dask as needed)."""
    items = [None] * len(runs)
    arrays = [i for i, r in enumerate(runs) if not is_lazy_run(r)]
    for i, r in enumerate(runs):
        if is_lazy_run(r):
            items[i] = run_spec(r)
    if arrays:
        try:
            futures = client.scatter([np.asarray(runs[i]) for i in arrays], hash=False)
        except (OSError, TimeoutError) as err:  # CommClosedError is an OSError: a worker went away
            raise ClusterError(f"sending {len(arrays)} in-memory run(s) to the workers failed "
                               f"({type(err).__name__}: {err}); a worker was probably lost: check the "
                               f"cluster and run the call again") from None
        for i, f in zip(arrays, futures):
            items[i] = f
    return items


def _describe(runs, indices) -> str:
    names = []
    for i in indices[:5]:
        src = getattr(runs[i], "source", None)
        names.append(f"run {i}" + (f" ({src})" if src else ""))
    more = f" and {len(indices) - 5} more" if len(indices) > 5 else ""
    return ", ".join(names) + more


# ---------------------------------------------------------------------------------------------
# Planning: whole runs in groups, or runs cut into pieces
# ---------------------------------------------------------------------------------------------

def _groups(sizes, n_groups: int) -> list[list[int]]:
    """Consecutive runs in about ``n_groups`` groups of similar total size (run order kept)."""
    total = max(1, int(sum(sizes)))
    target = total / max(1, n_groups)
    groups, current, filled = [], [], 0
    for i, n in enumerate(sizes):
        current.append(i)
        filled += n
        if filled >= target:
            groups.append(current)
            current, filled = [], 0
    if current:
        groups.append(current)
    return groups


def _pieces(sizes, n_groups: int, minimum: int = 1) -> list[list[tuple[int, int, int]]]:
    """Frame ranges ``(run, start, stop)`` in about ``n_groups`` groups of similar size; long
    runs are cut, short ones grouped; concatenating the groups gives every run in order."""
    total = int(sum(sizes))
    target = max(int(minimum), math.ceil(total / max(1, n_groups)))
    groups, current, filled = [], [], 0
    for i, n in enumerate(sizes):
        start = 0
        while start < n:
            stop = min(n, start + target - filled)
            current.append((i, start, stop))
            filled += stop - start
            start = stop
            if filled >= target:
                groups.append(current)
                current, filled = [], 0
    if current:
        groups.append(current)
    return groups


# ---------------------------------------------------------------------------------------------
# Submitting and collecting
# ---------------------------------------------------------------------------------------------

def _collect(client, futures, what: list[str], bar=None, weights=None) -> list:
    """Results of ``futures`` in order, every one checked; cancel the rest on any failure.

    ``what[i]`` says which runs future ``i`` works on (for error messages); ``weights[i]`` is
    what it adds to the progress bar.
    """
    dist = _distributed()
    try:
        if bar is not None:
            where = {f.key: i for i, f in enumerate(futures)}
            for f in dist.as_completed(futures):
                if f.status != "finished":
                    break
                bar.update(weights[where[f.key]] if weights is not None else 1)
        try:
            results = client.gather(futures)
        except Exception as err:
            _explain_failure(dist, futures, what, err)
            raise
    except BaseException:
        client.cancel(futures)
        raise
    if len(results) != len(futures):  # pragma: no cover - dask guarantees this
        raise ClusterError(f"{len(futures)} tasks were sent but {len(results)} results came back")
    return results


def _explain_failure(dist, futures, what, err) -> None:
    """Turn a failed gather into a ClusterError naming the runs; errors raised by the task
    itself (InputError for bad data, ...) are left to propagate unchanged."""
    killed = [label for f, label in zip(futures, what)
              if f.status == "error" and isinstance(f.exception(), dist.KilledWorker)]
    if isinstance(err, dist.KilledWorker) or killed:
        raise ClusterError(f"the task for {'; '.join(killed[:5]) or 'some runs'} kept killing dask "
                           f"workers and was given up ({' '.join(str(err).split())}); check the "
                           f"workers' memory limit and logs, or lower chunk_size") from err
    lost = [label for f, label in zip(futures, what) if f.status in ("cancelled", "lost")]
    if lost or isinstance(err, (dist.client.FuturesCancelledError, dist.CancelledError)):
        raise ClusterError(f"the tasks for {'; '.join(lost[:5]) or 'some runs'} were cancelled "
                           f"({' '.join(str(err).split())}); data held only by a worker that died "
                           f"is lost (in-memory runs are sent once and cannot be recomputed; runs "
                           f"read from files are): run the call again") from err


def _check_lengths(runs, per_run_lengths, what: str) -> None:
    expected = [int(r.shape[0]) for r in runs]
    bad = [i for i, (a, b) in enumerate(zip(expected, per_run_lengths)) if a != b]
    if len(per_run_lengths) != len(expected) or bad:
        raise ClusterError(f"{what}: results for {_describe(runs, bad or list(range(len(runs))))} "
                           f"did not come back complete (frames expected {expected[:5]}, got "
                           f"{list(per_run_lengths)[:5]}); run the call again")


def _worker_threads() -> int:
    """Threads of the worker running the current task (one core each)."""
    try:
        from distributed import get_worker
        return max(1, int(get_worker().state.nthreads))
    except Exception:  # pragma: no cover - outside a worker
        return 1


def _progress_bar(enabled, total, desc, unit):
    if not enabled:
        return None
    from tqdm.auto import tqdm
    return tqdm(total=total, desc=desc, unit=unit)


# ---------------------------------------------------------------------------------------------
# Reading files
# ---------------------------------------------------------------------------------------------

def _task_read_file(path, options):
    from .io import _reader_for
    runs, names = _reader_for(path)(path, **options)
    return [run_spec(r) if is_lazy_run(r) else r for r in runs], names


def read_files(client, paths, options, *, progress=False) -> dict:
    """Open and check every file on the workers: ``{path: (runs, feature names or None)}``."""
    check_client(client)
    unique = list(dict.fromkeys(paths))
    futures = [client.submit(_task_read_file, p, options, pure=False) for p in unique]
    bar = _progress_bar(progress and len(unique) > 1, len(unique), "reading trajectories", "file")
    try:
        got = _collect(client, futures, [f"file {p}" for p in unique], bar)
    finally:
        if bar is not None:
            bar.close()
    return {p: ([open_run(r) for r in runs], names) for p, (runs, names) in zip(unique, got)}


def _task_check(items, chunk):
    from .io import iter_chunks
    n = []
    for item in items:
        run = open_run(item)
        n.append(sum(len(b) for b in iter_chunks(run, chunk)))
    return n


def check_values(client, runs, chunk) -> None:
    """Read every lazy run on the workers (InputError at the first NaN/infinite frame)."""
    check_client(client)
    if not runs:
        return
    groups = _groups([r.shape[0] for r in runs], TASKS_PER_THREAD * _n_threads(client))
    items = _items(client, runs)
    futures = [client.submit(_task_check, [items[i] for i in g], chunk, pure=False) for g in groups]
    got = _collect(client, futures, [_describe(runs, g) for g in groups])
    _check_lengths(runs, [n for part in got for n in part], "check_values")


# ---------------------------------------------------------------------------------------------
# TICA
# ---------------------------------------------------------------------------------------------

def _task_first_frame(item):
    return np.array(open_run(item)[0], dtype=np.float64)


def first_frame(client, run) -> np.ndarray:
    """Frame 0 of a run, read by a worker (the client need not see the files)."""
    check_client(client)
    if not is_lazy_run(run):
        return np.array(np.asarray(run)[0], dtype=np.float64)
    return _collect(client, [client.submit(_task_first_frame, run_spec(run), pure=False)],
                    [_describe([run], [0])])[0]


def _task_moments(items, lag, shift, chunk):
    from .reduce import run_moments
    return [run_moments(open_run(item), lag, shift, chunk) for item in items]


def run_moments_each(client, runs, lag, shift, chunk, bar=None) -> list:
    """:func:`msmkit.reduce.run_moments` of every run, computed on the workers, in run order."""
    check_client(client)
    sizes = [r.shape[0] for r in runs]
    groups = _groups(sizes, TASKS_PER_THREAD * _n_threads(client))
    items = _items(client, runs)
    futures = [client.submit(_task_moments, [items[i] for i in g], lag, shift, chunk, pure=False)
               for g in groups]
    got = _collect(client, futures, [_describe(runs, g) for g in groups], bar,
                   [sum(sizes[i] for i in g) for g in groups])
    moments = [m for part in got for m in part]
    _check_lengths(runs, [m.n_frames for m in moments], "TICA.fit")
    return moments


def _task_project(items, mean, proj, chunk, paths):
    from .reduce import _project_run
    if paths is None:
        return [_project_run(open_run(item), mean, proj, chunk) for item in items]
    return [_project_run(open_run(item), mean, proj, chunk, path) for item, path in zip(items, paths)]


def project_runs(client, runs, mean, proj, chunk, paths=None, bar=None) -> list:
    """TICA projection of every run on the workers: arrays, or written to ``paths``."""
    check_client(client)
    sizes = [r.shape[0] for r in runs]
    groups = _groups(sizes, TASKS_PER_THREAD * _n_threads(client))
    items = _items(client, runs)
    futures = [client.submit(_task_project, [items[i] for i in g], mean, proj, chunk,
                             None if paths is None else [paths[i] for i in g], pure=False)
               for g in groups]
    got = [x for part in _collect(client, futures, [_describe(runs, g) for g in groups], bar,
                                  [sum(sizes[i] for i in g) for g in groups]) for x in part]
    _check_lengths(runs, [len(x) if paths is None else x for x in got], "TICA.transform")
    return got


# ---------------------------------------------------------------------------------------------
# Assignment and counting
# ---------------------------------------------------------------------------------------------

def _task_assign(pieces, centers, chunk):
    from .states import _Assigner, _assign_run
    assigner = _Assigner(centers, _worker_threads())
    out = []
    for item, start, stop in pieces:
        run = open_run(item)
        part = run if (start == 0 and stop == run.shape[0]) else _Range(run, start, stop)
        out.append(_assign_run(part, assigner, chunk))
    return out


class _Range:
    """Frames ``start:stop`` of a run, read chunk by chunk (a view for in-memory runs)."""

    def __init__(self, run, start, stop):
        self.run, self.start, self.stop = run, start, stop
        self.shape = (stop - start, run.shape[1])

    def iter_chunks(self, chunk_size=None):
        from ._checks import check_chunk_size
        size = check_chunk_size(chunk_size, self.shape[1])
        for lo in range(self.start, self.stop, size):
            yield self.run[lo:min(lo + size, self.stop)]

    def __array__(self, dtype=None, copy=None):  # pragma: no cover - not used by the tasks
        arr = np.asarray(self.run[self.start:self.stop])
        return arr if dtype is None else arr.astype(dtype)


def assign_runs(client, runs, centers, chunk, bar=None) -> list[np.ndarray]:
    """Nearest-center labels (int32) of every frame of every run, computed on the workers."""
    check_client(client)
    sizes = [int(r.shape[0]) for r in runs]
    groups = _pieces(sizes, TASKS_PER_THREAD * _n_threads(client), minimum=min(chunk, 1 << 16))
    items = _items(client, runs)
    centers = np.ascontiguousarray(centers, dtype=np.float64)
    futures = [client.submit(_task_assign, [(items[i], a, b) for i, a, b in g], centers, chunk,
                             pure=False) for g in groups]
    got = _collect(client, futures, [_describe(runs, sorted({i for i, _, _ in g})) for g in groups],
                   bar, [sum(b - a for _, a, b in g) for g in groups])
    per_run = [[] for _ in runs]
    for g, labels in zip(groups, got):
        for (i, a, b), lab in zip(g, labels):
            if lab.shape != (b - a,):
                raise ClusterError(f"assignment: {_describe(runs, [i])} frames {a}..{b - 1} came "
                                   f"back with {lab.shape[0]} labels; run the call again")
            per_run[i].append(lab)
    out = [np.concatenate(p).astype(np.int32, copy=False) if p else np.empty(0, np.int32)
           for p in per_run]
    _check_lengths(runs, [o.size for o in out], "assignment")
    return out


def _task_count(items, lag, n_states, every_frame):
    from .counts import _count_flat
    flat = _count_flat(list(items), lag, n_states, every_frame)
    nz = np.flatnonzero(flat)
    return nz, flat[nz], [int(np.asarray(r).size) for r in items]


def count_flat(client, runs, lag, n_states, every_frame) -> np.ndarray:
    """The summed flat count vector of :func:`msmkit.counts._count_flat`, runs counted on the
    workers (whole runs: pairs never span two tasks)."""
    check_client(client)
    groups = _groups([r.size for r in runs], TASKS_PER_THREAD * _n_threads(client))
    items = _items(client, runs)
    futures = [client.submit(_task_count, [items[i] for i in g], lag, n_states, every_frame, pure=False)
               for g in groups]
    got = _collect(client, futures, [f"label runs {g[0]}..{g[-1]}" for g in groups])
    _check_label_lengths(runs, [n for _, _, sizes in got for n in sizes], "count_transitions")
    flat = np.zeros(n_states * n_states, dtype=np.int64)
    for nz, values, _ in got:
        flat[nz] += values
    return flat


def _check_label_lengths(runs, lengths, what):
    expected = [int(r.size) for r in runs]
    if list(lengths) != expected:
        bad = [i for i, (a, b) in enumerate(zip(expected, lengths)) if a != b] or list(range(len(runs)))
        raise ClusterError(f"{what}: label runs {bad[:10]} did not come back complete; run the "
                           f"call again")


def scatter_labels(client, runs) -> list:
    """Label runs sent to the workers once, for several calls of :func:`count_rows`."""
    check_client(client)
    return _items(client, runs)


def _task_rows(items, lag, n_states, every_frame, blocks):
    from .counts import _run_rows
    return [_run_rows(item, lag, n_states, every_frame, blocks) for item in items]


def count_rows(client, items, sizes, lag, n_states, every_frame, blocks):
    """:func:`msmkit.counts.run_count_rows` with the runs counted on the workers."""
    from .counts import _stack_rows
    groups = _groups(sizes, TASKS_PER_THREAD * _n_threads(client))
    futures = [client.submit(_task_rows, [items[i] for i in g], lag, n_states, every_frame, blocks,
                             pure=False) for g in groups]
    per_run = [r for part in _collect(client, futures, [f"label runs {g[0]}..{g[-1]}" for g in groups])
               for r in part]
    if len(per_run) != len(sizes) or any(len(r) != blocks for r in per_run):
        raise ClusterError("lag_scan: the count rows of some runs did not come back; run the call again")
    return _stack_rows(per_run, n_states)


def _task_bootstrap(rows, n, lag, dt, reversible, initial, k):
    from .lagscan import _sample_timescales
    out = np.full((rows.shape[0], k), np.nan)
    for b in range(rows.shape[0]):
        got = _sample_timescales(rows.getrow(b), n, lag, dt, reversible, initial, k)
        out[b, :got.size] = got
    return out


def map_sample_batches(client, sampled, task, *args, what="bootstrap samples", bar=None) -> list:
    """Apply ``task(rows, *args)`` to batches of rows of ``sampled`` (one bootstrap sample per
    row, e.g. from :func:`msmkit._bootstrap.sample_rows`) on the workers; the results in batch
    order. ``task`` must be a module-level function; ``args`` should be arrays and numbers."""
    check_client(client)
    n_samples = sampled.shape[0]
    n_batches = max(1, min(n_samples, TASKS_PER_THREAD * _n_threads(client)))
    edges = np.linspace(0, n_samples, n_batches + 1).astype(int)
    futures = [client.submit(task, sampled[a:b], *args, pure=False)
               for a, b in zip(edges[:-1], edges[1:])]
    return _collect(client, futures, [f"{what} {a}..{b - 1}" for a, b in zip(edges[:-1], edges[1:])],
                    bar, list(np.diff(edges)))


def bootstrap_timescales(client, sampled, n, lag, dt, reversible, initial, k, bar=None) -> np.ndarray:
    """Timescales of every bootstrap sample (rows of ``sampled``), batches of samples as tasks;
    ``(n_samples, k)``, NaN where a sample has fewer processes."""
    got = map_sample_batches(client, sampled, _task_bootstrap, n, lag, dt, reversible, initial, k,
                             what=f"bootstrap samples at lag {lag}", bar=bar)
    out = np.concatenate(got, axis=0)
    if out.shape != (sampled.shape[0], k):
        raise ClusterError(f"lag_scan: {out.shape[0]} of {sampled.shape[0]} bootstrap samples "
                           f"came back")
    return out


# ---------------------------------------------------------------------------------------------
# k-means on the cluster
# ---------------------------------------------------------------------------------------------

@dataclass
class FittedCenters:
    """Result of :func:`fit_centers`."""

    centers: np.ndarray
    inertia: float
    n_iter: int
    n_frames: int
    converged: bool


def _strided_count(start: int, stop: int, stride: int) -> int:
    first = -(-start // stride) * stride
    return len(range(first, stop, stride))


def _task_sample(pieces, stride, chunk):
    """The strided frames of a group of pieces (a partition; it stays on the worker)."""
    from .states import _strided_frames
    parts = [_strided_frames(open_run(item), stride, chunk, start, stop)
             for item, start, stop in pieces]
    return np.ascontiguousarray(np.concatenate(parts), dtype=np.float64)


def _task_stats(part):
    return len(part), part.sum(axis=0), np.einsum("ij,ij->j", part, part)


def _task_take(part, rows):
    return part[rows]


def _task_center_sums(part, centers, rows=None):
    """Per-center sums and counts of the frames of ``part`` (or of ``part[rows]``) assigned to
    their nearest center, and their squared distances (inertia)."""
    from .states import _Assigner
    x = part if rows is None else part[rows]
    k, d = centers.shape
    assigner = _Assigner(centers, _worker_threads())
    sums = np.zeros((k, d))
    counts = np.zeros(k, dtype=np.int64)
    inertia = 0.0
    step = 1 << 16
    for s in range(0, len(x), step):
        xb = x[s:s + step]
        lab = assigner(xb)
        counts += np.bincount(lab, minlength=k)
        for j in range(d):
            sums[:, j] += np.bincount(lab, weights=xb[:, j], minlength=k)
        diff = xb - centers[lab]
        inertia += float(np.einsum("ij,ij->", diff, diff))
    return sums, counts, inertia


def fit_centers(client, runs, k, *, method="kmeans", stride=1, seed=None, max_iter=300,
                chunk=None, tol=1e-4, progress=False) -> FittedCenters:
    """k-means centers of the strided frames of ``runs``, computed on the cluster.

    ``method="kmeans"``: Lloyd's iterations [3]_; each partition returns per-center sums and
    counts and the client forms the means, until the centers move by less than ``tol`` times
    the mean feature variance (squared distance summed over centers, scikit-learn's rule) or
    after ``max_iter`` iterations. Empty clusters keep their center.

    ``method="minibatch"``: mini-batch k-means [2]_ with batches of ``max(1024, 3 k)`` frames
    drawn with replacement from all strided frames; each center moves to the running mean of
    the frames it has received (learning rate 1/count). Stops when the smoothed batch inertia
    has not improved for 10 batches, or after ``max_iter`` passes over the strided frames.

    Seeding: k-means++ [1]_ (scikit-learn's ``kmeans_plusplus``) on at most
    ``max(10 k, 3 * batch)`` strided frames drawn without replacement. The draws are over the
    strided frames in run order, not over partitions, so the result does not depend on the
    number of workers (beyond rounding).
    """
    from sklearn.cluster import kmeans_plusplus

    check_client(client)
    rng = np.random.default_rng(seed)
    threads = _n_threads(client)
    sizes = [int(r.shape[0]) for r in runs]
    groups = _pieces(sizes, PARTITIONS_PER_THREAD * threads, minimum=stride)
    items = _items(client, runs)
    part_sizes = np.array([sum(_strided_count(a, b, stride) for _, a, b in g) for g in groups],
                          dtype=np.int64)
    offsets = np.concatenate([[0], np.cumsum(part_sizes)])
    n_sample = int(offsets[-1])
    what = [_describe(runs, sorted({i for i, _, _ in g})) for g in groups]
    parts = [client.submit(_task_sample, [(items[i], a, b) for i, a, b in g], stride, chunk,
                           pure=False) for g in groups]
    futures = []
    try:
        stats = _collect(client, [client.submit(_task_stats, p, pure=False) for p in parts], what)
        got_sizes = [s[0] for s in stats]
        if list(got_sizes) != part_sizes.tolist():
            raise ClusterError(f"k-means: partitions came back with {got_sizes} strided frames, "
                               f"expected {part_sizes.tolist()}; run the call again")
        total = sum(s[1] for s in stats)
        total_sq = sum(s[2] for s in stats)
        variance = total_sq / n_sample - (total / n_sample) ** 2
        tol_abs = tol * float(np.mean(np.maximum(variance, 0)))

        def rows_by_partition(global_rows):
            """Split sorted global row numbers into (partition, local rows) pairs."""
            global_rows = np.sort(global_rows)
            cut = np.searchsorted(global_rows, offsets)
            return [(p, global_rows[cut[p]:cut[p + 1]] - offsets[p])
                    for p in range(len(parts)) if cut[p + 1] > cut[p]]

        batch = max(1024, 3 * k)
        n_init = min(n_sample, max(10 * k, 3 * batch))
        init_rows = rng.choice(n_sample, size=n_init, replace=False)
        pieces = rows_by_partition(init_rows)
        sample = np.concatenate(_collect(client, [client.submit(_task_take, parts[p], r, pure=False)
                                                  for p, r in pieces], [what[p] for p, _ in pieces]))
        init_seed = None if seed is None else int(rng.integers(2 ** 31 - 1))
        centers, _ = kmeans_plusplus(sample, k, random_state=init_seed)
        centers = np.asarray(centers, dtype=np.float64)

        bar = _progress_bar(progress, None, f"k-means on the cluster ({method})", "step")
        converged = False
        n_iter = 0
        try:
            if method == "kmeans":
                for n_iter in range(1, max_iter + 1):
                    futures = [client.submit(_task_center_sums, p, centers, pure=False) for p in parts]
                    sums, counts, _ = _sum_partials(_collect(client, futures, what))
                    new = centers.copy()
                    filled = counts > 0
                    new[filled] = sums[filled] / counts[filled, None]
                    shift = float(((new - centers) ** 2).sum())
                    centers = new
                    if bar is not None:
                        bar.update(1)
                    if shift <= tol_abs:
                        converged = True
                        break
            else:
                seen = np.zeros(k)
                best, ewa, stale = np.inf, None, 0
                alpha = min(1.0, 2.0 * batch / (n_sample + 1))
                max_steps = max_iter * math.ceil(n_sample / batch)
                for n_iter in range(1, max_steps + 1):
                    pieces = rows_by_partition(rng.integers(0, n_sample, batch))
                    futures = [client.submit(_task_center_sums, parts[p], centers, r, pure=False)
                               for p, r in pieces]
                    sums, counts, inertia = _sum_partials(_collect(client, futures,
                                                                   [what[p] for p, _ in pieces]))
                    seen += counts
                    moved = counts > 0
                    centers[moved] += ((sums[moved] - counts[moved, None] * centers[moved])
                                       / seen[moved, None])
                    if bar is not None:
                        bar.update(1)
                    ewa = inertia / batch if ewa is None else (1 - alpha) * ewa + alpha * inertia / batch
                    if ewa < best:
                        best, stale = ewa, 0
                    else:
                        stale += 1
                        if stale >= MAX_NO_IMPROVEMENT:
                            converged = True
                            break
        finally:
            if bar is not None:
                bar.close()
        futures = [client.submit(_task_center_sums, p, centers, pure=False) for p in parts]
        _, counts, inertia = _sum_partials(_collect(client, futures, what))
        if int(counts.sum()) != n_sample:
            raise ClusterError(f"k-means: {int(counts.sum())} of {n_sample} strided frames came "
                               f"back from the final pass; run the call again")
    finally:
        client.cancel(parts + futures)
    return FittedCenters(centers, float(inertia), int(n_iter), n_sample, converged)


def _sum_partials(results):
    """Add per-partition (sums, counts, inertia) in partition order (deterministic)."""
    sums = sum(r[0] for r in results)
    counts = sum(r[1] for r in results)
    inertia = sum(r[2] for r in results)
    return sums, counts, inertia
