"""Mapping a per-run kernel over runs, in this process or on a dask cluster.

Each numeric module owns the kernels of the work it does: plain module-level functions that take one run (or one
group of runs, or a batch of bootstrap samples) and return a partial result. The functions
here apply a kernel to every run and hand back the partial results in run order; the caller
reduces them (sums moments or counts, concatenates labels). With ``client=None`` the kernel
runs here, on the calling thread; with a ``dask.distributed.Client`` the runs are grouped into
tasks of similar size and mapped over the workers. Either way the same kernel computes the
numbers, so the two paths agree (integers exactly, floating sums to rounding).

What travels
------------
Runs read from files (:class:`~msmkit.io.LazyRun`) travel as themselves: they hold only a path,
an offset, a shape and a dtype, and every worker reads the frames itself (every worker must see
the same paths, e.g. on a shared filesystem). In-memory arrays are scattered to the workers
once per call (or once for several calls, :func:`place`).

Failures (all checked here)
---------------------------
* A task that kept killing workers: :class:`~msmkit.distributed.ClusterError` naming the runs of that task.
* Tasks cancelled or data lost with a dead worker (in-memory runs cannot be recomputed):
  ClusterError naming the runs; run the call again.
* A result that did not come back complete (fewer frames, a missing run): ClusterError.
* Errors of the data (a file vanished after loading, NaN frames) are raised by the kernel as
  :class:`~msmkit.errors.InputError` and come back unchanged, on either path.
"""
from __future__ import annotations

import math
import os
from dataclasses import dataclass

import numpy as np

from ._checks import is_lazy_run
from .distributed import ClusterError, check_client, dask_distributed, n_threads

__all__ = ["Placed", "cancel", "check_complete", "describe_runs", "gather", "map_groups", "map_pieces",
           "map_runs", "map_sample_batches", "place", "submit"]

#: groups of runs (or pieces of runs) per worker thread: enough to balance uneven runs, few
#: enough to keep the per-task overhead small
TASKS_PER_THREAD = 4


# ---------------------------------------------------------------------------------------------
# Placing runs where the kernels run
# ---------------------------------------------------------------------------------------------

@dataclass
class Placed:
    """Runs made ready for a client: ``items[i]`` stands for ``runs[i]`` in a task (the run itself
    if it is read from a file or computed, a future of the scattered array otherwise)."""

    runs: list
    items: list
    client: object = None


def place(runs, client=None) -> Placed:
    """Runs ready to be mapped over (arrays sent to the workers once if ``client`` is given;
    lazy runs and file paths travel as they are)."""
    runs = list(runs)
    if client is None:
        return Placed(runs, runs, None)
    check_client(client)
    items = list(runs)
    arrays = [i for i, r in enumerate(runs) if not (is_lazy_run(r) or isinstance(r, (str, os.PathLike)))]
    if arrays:
        try:
            futures = client.scatter([np.asarray(runs[i]) for i in arrays], hash=False)
        except (OSError, TimeoutError) as err:  # dask's CommClosedError is an OSError: a worker went away
            raise ClusterError(f"sending {len(arrays)} in-memory run(s) to the workers failed "
                               f"({type(err).__name__}: {err}); a worker was probably lost: check the "
                               f"cluster and run the call again") from None
        for i, f in zip(arrays, futures):
            items[i] = f
    return Placed(runs, items, client)


def _placed(runs, client) -> Placed:
    if isinstance(runs, Placed):
        if client is not None and runs.client is not client:
            raise ValueError("runs were placed for another client")  # pragma: no cover - internal
        return runs
    return place(runs, client)


def describe_runs(runs, indices) -> str:
    """``"run 0 (path), run 3 (path) and 2 more"`` for error messages."""
    names = []
    for i in list(indices)[:5]:
        src = getattr(runs[i], "source", None)
        names.append(f"run {i}" + (f" ({src})" if src else ""))
    more = f" and {len(indices) - 5} more" if len(indices) > 5 else ""
    return ", ".join(names) + more


def _length(run) -> int:
    return int(run.shape[0])


# ---------------------------------------------------------------------------------------------
# Planning: whole runs in groups, or runs cut into pieces
# ---------------------------------------------------------------------------------------------

def groups_of(sizes, n_groups: int) -> list[list[int]]:
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


def pieces_of(sizes, n_groups: int, minimum: int = 1) -> list[list[tuple[int, int, int]]]:
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
# Submitting and collecting (the dask path)
# ---------------------------------------------------------------------------------------------

def submit(client, kernel, *args):
    """``client.submit(kernel, *args)``, never cached (``pure=False``: kernels read files)."""
    return client.submit(kernel, *args, pure=False)


def cancel(client, futures) -> None:
    """Drop ``futures`` and whatever the workers hold for them."""
    if futures:
        client.cancel(list(futures))


def gather(client, futures, what: list[str], bar=None, weights=None) -> list:
    """Results of ``futures`` in order, every one checked; the rest cancelled on any failure.

    ``what[i]`` says which runs future ``i`` works on (for error messages); ``weights[i]`` is
    what it adds to the progress bar.
    """
    dist = dask_distributed()
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
    """Turn a failed gather into a ClusterError naming the runs; errors raised by the kernel
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


def check_complete(runs, lengths, what: str, length=_length) -> None:
    """ClusterError unless result ``i`` covers all ``length(runs[i])`` frames of run ``i``."""
    expected = [length(r) for r in runs]
    lengths = list(lengths)
    bad = [i for i, (a, b) in enumerate(zip(expected, lengths)) if a != b]
    if len(lengths) != len(expected) or bad:
        raise ClusterError(f"{what}: results for {describe_runs(runs, bad or list(range(len(runs))))} "
                           f"did not come back complete (frames expected {expected[:5]}, got "
                           f"{lengths[:5]}); run the call again")


# ---------------------------------------------------------------------------------------------
# Mapping kernels
# ---------------------------------------------------------------------------------------------

def _apply_each(kernel, items, args, extras=None):
    """The task body of :func:`map_runs`: ``kernel(item, *args)`` for each item of a group."""
    if extras is None:
        return [kernel(item, *args) for item in items]
    return [kernel(item, *args, extra) for item, extra in zip(items, extras)]


def map_runs(kernel, runs, *args, client=None, what: str = "runs", bar=None, frames=None,
             length=_length, per_run=None, local_bar=False) -> list:
    """``[kernel(run, *args) for run in runs]``, here or on the cluster.

    Parameters
    ----------
    kernel : callable
        A module-level function ``kernel(run, *args)`` (dask pickles it by reference).
    runs : sequence of runs, or :class:`Placed`
    client : dask.distributed.Client, optional
        Map over the workers (runs grouped into tasks of similar size); None: here, run by run.
    what : str
        The call, for error messages (e.g. ``"TICA.fit"``).
    bar : progress bar, optional
        Advanced by each run's frames as it finishes.
    frames : callable, optional
        ``frames(result)``: the number of frames a result covers, checked against the run's
        ``length`` (ClusterError if short on the cluster).
    per_run : list, optional
        One more argument per run, passed after ``args`` (e.g. an output path).
    local_bar : bool
        In this process, pass ``bar=`` to the kernel (finer progress) instead of advancing it
        after each run.

    Returns
    -------
    list
        One result per run, in run order.
    """
    placed = _placed(runs, client)
    runs = placed.runs
    sizes = [length(r) for r in runs]
    extras = [()] * len(runs) if per_run is None else [(x,) for x in per_run]
    if placed.client is None:
        out = []
        for run, n, extra in zip(runs, sizes, extras):
            if local_bar:
                out.append(kernel(run, *args, *extra, bar=bar))
                continue
            out.append(kernel(run, *args, *extra))
            if bar is not None:
                bar.update(n)
        return out
    client = placed.client
    groups = groups_of(sizes, TASKS_PER_THREAD * n_threads(client))
    futures = [submit(client, _apply_each, kernel, [placed.items[i] for i in g], args,
                      None if per_run is None else [per_run[i] for i in g]) for g in groups]
    got = gather(client, futures, [describe_runs(runs, g) for g in groups], bar,
                 [sum(sizes[i] for i in g) for g in groups])
    out = [x for part in got for x in part]
    if frames is not None:
        check_complete(runs, [frames(x) for x in out], what, length)
    elif len(out) != len(runs):  # pragma: no cover - one result per item by construction
        raise ClusterError(f"{what}: {len(out)} of {len(runs)} results came back")
    return out


def map_groups(kernel, runs, *args, client=None, what: str = "runs", length=_length) -> list:
    """``kernel(group, *args)`` for groups of whole runs: one group of every run here, groups of
    similar size on the cluster (a pair of frames never spans two groups). The results, one per
    group in run order, are for the caller to reduce; each must be ``(partial, sizes)`` with
    ``sizes`` the lengths of the runs it saw, which are checked."""
    placed = _placed(runs, client)
    runs = placed.runs
    if placed.client is None:
        return [kernel(list(runs), *args)[0]]
    client = placed.client
    sizes = [length(r) for r in runs]
    groups = groups_of(sizes, TASKS_PER_THREAD * n_threads(client))
    futures = [submit(client, kernel, [placed.items[i] for i in g], *args) for g in groups]
    got = gather(client, futures, [describe_runs(runs, g) for g in groups])
    check_complete(runs, [n for _, seen in got for n in seen], what, length)
    return [part for part, _ in got]


def map_pieces(kernel, runs, *args, client=None, minimum: int = 1, what: str = "runs",
               bar=None, local_bar=False) -> list[list]:
    """``kernel(pieces, *args)`` over frame ranges: ``pieces`` is a list of ``(run, start,
    stop)`` and the kernel returns one array per piece (first axis: frames). Here: one call
    with every whole run; on the cluster: runs cut into pieces of similar size, at least
    ``minimum`` frames each. Returns, per run, the list of the arrays of the pieces of that run in frame order,
    checked to cover every frame. ``local_bar``: as in :func:`map_runs`."""
    placed = _placed(runs, client)
    runs = placed.runs
    sizes = [_length(r) for r in runs]
    if placed.client is None:
        whole = [(r, 0, n) for r, n in zip(runs, sizes)]
        if local_bar:
            return [[x] for x in kernel(whole, *args, bar=bar)]
        got = kernel(whole, *args)
        if bar is not None:
            bar.update(sum(sizes))
        return [[x] for x in got]
    client = placed.client
    groups = pieces_of(sizes, TASKS_PER_THREAD * n_threads(client), minimum=minimum)
    futures = [submit(client, kernel, [(placed.items[i], a, b) for i, a, b in g], *args)
               for g in groups]
    got = gather(client, futures, [describe_runs(runs, sorted({i for i, _, _ in g})) for g in groups],
                 bar, [sum(b - a for _, a, b in g) for g in groups])
    per_run = [[] for _ in runs]
    for g, parts in zip(groups, got):
        if len(parts) != len(g):
            raise ClusterError(f"{what}: a task for {describe_runs(runs, sorted({i for i, _, _ in g}))} "
                               f"returned {len(parts)} of {len(g)} pieces; run the call again")
        for (i, a, b), x in zip(g, parts):
            if len(x) != b - a:
                raise ClusterError(f"{what}: {describe_runs(runs, [i])} frames {a}..{b - 1} came "
                                   f"back with {len(x)} results; run the call again")
            per_run[i].append(x)
    check_complete(runs, [sum(len(x) for x in p) for p in per_run], what)
    return per_run


def map_sample_batches(kernel, sampled, *args, client, what: str = "bootstrap samples",
                       bar=None) -> np.ndarray:
    """``kernel(rows, *args)`` on batches of rows of ``sampled`` (one bootstrap sample per row)
    on the workers, concatenated in sample order; the kernel returns one result row per sample
    and the number of rows that come back is checked."""
    check_client(client)
    n_samples = sampled.shape[0]
    n_batches = max(1, min(n_samples, TASKS_PER_THREAD * n_threads(client)))
    edges = np.linspace(0, n_samples, n_batches + 1).astype(int)
    futures = [submit(client, kernel, sampled[a:b], *args) for a, b in zip(edges[:-1], edges[1:])]
    got = gather(client, futures, [f"{what} {a}..{b - 1}" for a, b in zip(edges[:-1], edges[1:])],
                 bar, list(np.diff(edges)))
    out = np.concatenate(got, axis=0)
    if out.shape[0] != n_samples:
        raise ClusterError(f"{what}: {out.shape[0]} of {n_samples} samples came back; run the "
                           f"call again")
    return out
