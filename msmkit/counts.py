"""Transition counting at a lag time, and communicating classes of states.

References
----------
Prinz et al., J. Chem. Phys. 134, 174105 (2011): sliding-window counting, connectivity.
"""
from __future__ import annotations

import os
import queue
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import scipy.sparse as sp
from scipy.sparse import csgraph

from . import _execution as execution
from ._checks import as_label_trajectories, check_bool, check_int, check_lag
from .distributed import ClusterError, worker_threads
from .errors import InputError

__all__ = ["count_transitions", "communicating_classes", "kept_states", "run_count_rows"]

#: count matrices of at most this many cells (n_states**2, 32 MiB of int64) may be tallied densely;
#: larger ones by sorting the pair codes, so that memory follows the pairs seen, not the largest label
DENSE_MAX_CELLS = 1 << 22
#: largest count matrix side: its CSR row pointers alone take 8 bytes per state (128 MiB here)
MAX_STATES = 1 << 24

#: frames of a piece inspected to decide whether run-length encoding pays off, and the change rate below which it does
RLE_PROBE = 1 << 13
RLE_CHANGE_FRACTION = 0.35


def _pair_codes(run: np.ndarray, lag: int, n_states: int, every_frame: bool) -> np.ndarray:
    """Flat codes ``i * n_states + j`` of the counted pairs (i at t, j at t + lag) of one run.

    Pairs with either end labeled -1 are left out. Returns an intp array.
    """
    if run.size <= lag:
        return np.empty(0, dtype=np.intp)
    step = 1 if every_frame else lag
    start = run[:-lag:step]
    end = run[lag::step]
    codes = start.astype(np.intp)
    codes *= n_states
    codes += end
    if run.min() < 0:
        codes = codes[(start >= 0) & (end >= 0)]
    return codes


def prepare_counting(labels, lag, n_states):
    """Checked label runs, lag and number of states for counting (InputError naming the
    argument when the lag is not shorter than every run, no frame is assigned, or
    ``n_states`` does not exceed the largest label).

    Returns
    -------
    runs : list of int32 ndarray
    lag : int
    n_states : int
    """
    runs = as_label_trajectories(labels)
    lag = check_lag(lag)
    longest = max(r.size for r in runs)
    if lag >= longest:
        raise InputError(f"lag must be shorter than the longest trajectory ({longest} frames), but got "
                         f"{lag}; choose a smaller lag or supply longer trajectories")
    largest = max((int(r.max()) for r in runs if r.size), default=-1)
    if largest < 0:
        raise InputError("labels hold no assigned frame: every label is -1")
    if n_states is None:
        if largest >= MAX_STATES:
            raise InputError(f"labels go up to {largest}, which would make a count matrix of {largest + 1} rows; "
                             f"labels must be below {MAX_STATES}: renumber the visited states 0..n-1 first "
                             f"(e.g. np.unique(labels, return_inverse=True))")
        n_states = largest + 1
    else:
        n_states = check_int(n_states, "n_states", minimum=1, maximum=MAX_STATES)
        if n_states <= largest:
            raise InputError(f"n_states must exceed the largest label ({largest}), but got {n_states}; "
                             f"leave n_states=None to infer it")
    return runs, lag, n_states


def count_transitions(labels, lag, *, n_states=None, every_frame=True, client=None) -> sp.csr_matrix:
    """Count transitions between states at a lag time.

    Parameters
    ----------
    labels : array_like of int, or list of them
        One label trajectory (1-D, one state label per frame) or several runs of any length.
        Labels are 0..n-1; -1 marks an unassigned frame, and a pair with either end -1 is not
        counted.
    lag : int
        Lag time in frames (>= 1). Runs no longer than the lag contribute nothing.
    n_states : int, optional
        Size of the count matrix; default is the largest label + 1.
    every_frame : bool, default True
        Count every pair (t, t + lag) (sliding window); otherwise only t = 0, lag, 2 lag, ...
        (strided, statistically independent counts for a Markov chain).
    client : dask.distributed.Client, optional
        Count each run on the cluster's workers and sum the matrices (needs the extra
        ``dask``); the counts are identical to the in-memory result.

    Returns
    -------
    scipy.sparse.csr_matrix of int64, shape (n_states, n_states)
        ``C[i, j]`` is the number of observed transitions from state i to state j within
        ``lag`` frames.

    Examples
    --------
    >>> import msmkit as mk
    >>> mk.count_transitions([0, 0, 1, 1, 0], lag=1).toarray()
    array([[1, 1],
           [1, 1]])
    """
    runs, lag, n_states = prepare_counting(labels, lag, n_states)
    every_frame = check_bool(every_frame, "every_frame")
    parts = execution.map_groups(count_codes, runs, lag, n_states, every_frame, client=client,
                                 what="count_transitions", length=np.size)
    if len(parts) == 1:
        return codes_to_csr(*parts[0], n_states)
    codes, inverse = np.unique(np.concatenate([c for c, _ in parts]), return_inverse=True)
    counts = np.bincount(inverse, weights=np.concatenate([n for _, n in parts]), minlength=codes.size)
    return codes_to_csr(codes, counts.astype(np.int64), n_states)


def count_flat(runs, lag, n_states, every_frame=True) -> np.ndarray:
    """Counts of checked label runs (see :func:`prepare_counting`) as one flat row-major int64
    vector of length ``n_states**2``: entry ``i * n_states + j`` counts transitions i -> j."""
    return _count_flat(_pieces(runs, lag, every_frame), n_states)


def count_pairs(runs, lag, n_states, every_frame=True):
    """Counts of checked label runs as (sorted distinct flat codes ``i * n_states + j``, int64
    counts).

    A dense tally (one int64 cell per possible pair) when the count matrix has at most
    :data:`DENSE_MAX_CELLS` cells -- inside a dask worker only if it also has no more cells than
    there are pairs to count, so that a task of a few runs over many states stays as small as the
    input; otherwise sorted pair codes, so that memory follows the pairs seen, never
    ``n_states**2``.
    """
    pieces = _pieces(runs, lag, every_frame)
    n_pairs = sum(p.size - d for p, d in pieces)
    cells = n_states * n_states
    if cells <= DENSE_MAX_CELLS and (cells <= n_pairs or worker_threads() is None):
        flat = _count_flat(pieces, n_states)
        codes = np.flatnonzero(flat)
        return codes, flat[codes]
    return _count_sparse(pieces, n_states)


def count_csr(runs, lag, n_states, every_frame=True) -> sp.csr_matrix:
    """Counts of checked label runs as an int64 CSR matrix (memory follows the pairs seen)."""
    return codes_to_csr(*count_pairs(runs, lag, n_states, every_frame), n_states)


def count_codes(runs, lag, n_states, every_frame=True):
    """Kernel of :func:`count_transitions` for a group of whole runs.

    Returns
    -------
    (codes, counts), sizes
        The nonzero counts as sorted flat codes ``i * n_states + j`` with their int64 counts
        (:func:`count_pairs`), and the number of frames of each run seen (checked by the caller).
    """
    return count_pairs(runs, lag, n_states, every_frame), [int(np.asarray(r).size) for r in runs]


#: Pairs counted at once, over all counting threads: each thread holds the codes of at most
#: ``COUNT_BLOCK / threads`` pairs (8 bytes each) and a few bytes a pair of comparisons, so the
#: temporaries stay near 4 MiB however many frames are counted (the int32 labels themselves
#: take 4 bytes per frame).
COUNT_BLOCK = 1 << 18
#: pairs per counting thread below which counting stays on fewer threads
PARALLEL_MIN_PAIRS = 1 << 20
#: most counting threads (each adds an ``n_states**2`` int64 tally)
MAX_COUNT_THREADS = 4


def _pieces(runs, lag, every_frame, block=None) -> list:
    """The runs cut into pieces ``(labels, d)`` whose pairs ``(labels[t], labels[t + d])`` are
    every counted pair exactly once; a piece holds at most ``block`` pairs (default
    :data:`COUNT_BLOCK`) and overlaps the next by ``d`` frames. Strided counting is sliding
    counting at lag 1 on every ``lag``-th frame (a view, nothing is copied)."""
    block = max(1, COUNT_BLOCK if block is None else int(block))
    out = []
    for run in runs:
        seq, d = (run, lag) if every_frame else (run[::lag], 1)
        for lo in range(0, seq.size - d, block):
            out.append((seq[lo:lo + block + d], d))
    return out


def _count_threads(n_pairs: int, cells: int) -> int:
    """Threads for a dense tally of ``n_pairs`` pairs into ``cells`` cells: one inside a dask
    worker (the worker's other threads run other tasks) or for small inputs; else up to every
    core, each thread given at least :data:`PARALLEL_MIN_PAIRS` pairs, and the tallies of all
    threads together holding no more cells than there are pairs."""
    cores = worker_threads()
    if cores is not None:
        return 1
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not on Linux
        cores = os.cpu_count() or 1
    return max(1, min(cores, MAX_COUNT_THREADS, n_pairs // max(1, PARALLEL_MIN_PAIRS),
                      n_pairs // max(1, cells)))


def _count_flat(pieces, n_states) -> np.ndarray:
    """Counts of all pieces (see :func:`_pieces`) as one flat int64 vector of length n_states**2.

    Large inputs are counted on several threads, each pulling pieces from a shared queue into
    a tally of the thread alone; the tallies add up exactly. The work per piece -- comparisons
    of neighbouring labels, pair codes, index gathering -- runs in numpy loops that release the
    interpreter lock; only the histogram update (np.add.at) holds it, so the threads overlap.
    """
    size = n_states * n_states
    n_pairs = sum(p.size - d for p, d in pieces)
    threads = _count_threads(n_pairs, size)
    block = max(1, COUNT_BLOCK // threads)
    if threads == 1:
        return _tally(_split(pieces, block), n_states, block)
    todo = queue.SimpleQueue()
    for piece in _split(pieces, block):
        todo.put(piece)
    with ThreadPoolExecutor(threads) as pool:
        tallies = list(pool.map(lambda _: _tally(_drain(todo), n_states, block), range(threads)))
    total = tallies[0]
    for other in tallies[1:]:
        total += other
    return total


def _split(pieces, block):
    """Pieces cut further to at most ``block`` pairs each (same pairs, in order)."""
    for piece, d in pieces:
        for lo in range(0, piece.size - d, block):
            yield piece[lo:lo + block + d], d


def _drain(todo: queue.SimpleQueue):
    """Items of a filled queue until it is empty (several threads may drain it at once)."""
    while True:
        try:
            yield todo.get_nowait()
        except queue.Empty:
            return


def _tally(pieces, n_states, block) -> np.ndarray:
    """Dense int64 tally (length n_states**2) of the pairs of ``pieces``, on this thread.

    Pair codes of plain pieces, and stretches (code, length) of sticky ones, are gathered
    until as many as the buffer holds, then added: by np.bincount once they are at least half
    as many as the cells (the pass of bincount over every cell then costs less than the slower
    np.add.at), else by np.add.at. The buffer holds ``block`` codes, or up to two per cell
    (at most :data:`PLAIN_BATCH_MAX`): no more than twice the tally itself.
    """
    size = n_states * n_states
    total = np.zeros(size, dtype=np.int64)
    buf = np.empty(max(block, min(2 * size, PLAIN_BATCH_MAX)), dtype=np.intp)
    filled = 0
    stretches, weights_held, held = [], [], 0
    for piece, d in pieces:
        if filled + piece.size - d > buf.size:
            _add_codes(total, buf[:filled])
            filled = 0
        codes, weights = _piece_codes(piece, d, n_states, buf[filled:])
        if weights is None:
            filled += codes.size
            continue
        stretches.append(codes)
        weights_held.append(weights)
        held += codes.size
        if held >= buf.size:
            _add_codes(total, np.concatenate(stretches), np.concatenate(weights_held))
            stretches, weights_held, held = [], [], 0
    _add_codes(total, buf[:filled])
    if stretches:
        _add_codes(total, np.concatenate(stretches), np.concatenate(weights_held))
    return total


#: most pair codes gathered by a counting thread before they are added to the tally of the thread (16 MiB)
PLAIN_BATCH_MAX = 1 << 21


def _add_codes(total: np.ndarray, codes: np.ndarray, weights=None) -> None:
    """``total[c] += w`` for every code c with weight w (1 by default; repeats included)."""
    if 2 * codes.size >= total.size:  # float64 sums of integer weights are exact below 2**53
        total += np.bincount(codes, weights, minlength=total.size).astype(np.int64, copy=False)
    elif codes.size:
        np.add.at(total, codes, 1 if weights is None else weights)


def _count_sparse(pieces, n_states):
    """Counts of all pieces as (sorted distinct pair codes, how often each occurs), both int64.

    Memory follows the number of distinct pairs seen (plus one piece of codes), whatever the
    largest label: each piece is reduced to the distinct codes in it by sorting, and the pieces'
    tallies are merged the same way at the end.
    """
    buf = np.empty(max((p.size - d for p, d in pieces), default=1), dtype=np.intp)
    codes, counts = [], []
    for piece, d in pieces:
        u, c = _distinct_counts(*_piece_codes(piece, d, n_states, buf))
        codes.append(u)
        counts.append(c)
    if not codes:
        return np.empty(0, np.int64), np.empty(0, np.int64)
    if len(codes) == 1:
        return codes[0], counts[0]
    u, inverse = np.unique(np.concatenate(codes), return_inverse=True)
    return u, np.bincount(inverse, weights=np.concatenate(counts), minlength=u.size).astype(np.int64)


def _distinct_counts(codes: np.ndarray, weights=None):
    """Sorted distinct values of ``codes`` and their total weight (1 per code by default)."""
    u, inverse = np.unique(codes, return_inverse=True)
    counts = np.bincount(inverse, weights=weights, minlength=u.size).astype(np.int64)
    return u.astype(np.int64, copy=False), counts


def _is_sticky(seq: np.ndarray) -> bool:
    """True when labels change rarely enough (judged on the first :data:`RLE_PROBE` frames) that
    stretches of repeated pairs are worth finding: a pair changes when either end changes."""
    probe = seq[:RLE_PROBE]
    if probe.size < 2:
        return False
    return 2 * np.count_nonzero(probe[1:] != probe[:-1]) < RLE_CHANGE_FRACTION * (probe.size - 1)


def _piece_codes(piece: np.ndarray, d: int, n_states: int, buf: np.ndarray):
    """Pair codes ``i * n_states + j`` of the pairs ``(piece[t], piece[t + d])`` of one piece,
    as ``(codes, weights)``, leaving out pairs with an end labeled -1.

    Sticky pieces (see :func:`_is_sticky`) give the stretches of equal pairs with their lengths
    as weights; others one code per pair (weights None), written to the start of ``buf`` (at
    least ``piece.size - d`` long) by in-place passes: the codes are a view of ``buf``.
    """
    if _is_sticky(piece):
        return _stretches(piece, d, n_states)
    m = piece.size - d
    start, end = piece[:m], piece[d:]
    codes = buf[:m]
    np.multiply(start, n_states, out=codes, dtype=np.intp, casting="unsafe")
    codes += end
    if piece.min() < 0:  # leave out pairs with an end labeled -1, keeping the codes in buf
        kept = codes[(start >= 0) & (end >= 0)]
        codes = codes[:kept.size]
        codes[:] = kept
    return codes, None


def _stretches(piece: np.ndarray, d: int, n_states: int):
    """Codes and lengths of the maximal stretches of equal pairs (piece[t], piece[t + d]),
    leaving out the stretches whose pair has an end labeled -1.

    Pair t differs from pair t - 1 exactly when piece[t] != piece[t - 1] or
    piece[t + d] != piece[t + d - 1], so one comparison of neighbouring labels serves both ends:
    for sticky labels this touches each frame once (1 byte of comparison result per frame) and
    leaves a histogram over the few stretches instead of every pair.
    """
    m = piece.size - d
    changed = piece[1:] != piece[:-1]
    begins = np.empty(m, dtype=bool)  # pair t begins a stretch; written in place, no temporaries
    begins[0] = True
    np.bitwise_or(changed[:m - 1], changed[d:d + m - 1], out=begins[1:])
    starts = np.flatnonzero(begins)
    lengths = np.empty_like(starts)  # np.diff(starts, append=m) without its temporaries
    np.subtract(starts[1:], starts[:-1], out=lengths[:-1])
    lengths[-1] = m - starts[-1]
    first, second = piece[starts], piece[d:][starts]
    codes = np.multiply(first, n_states, dtype=np.intp)
    codes += second
    # every frame is the first (or second) end of the stretch holding its pair, so a -1 in the
    # piece shows in the stretches' ends: checking them is cheaper than checking every frame
    if first.min() < 0 or second.min() < 0:
        keep = (first >= 0) & (second >= 0)
        codes, lengths = codes[keep], lengths[keep]
    return codes, lengths


def flat_counts_to_csr(flat: np.ndarray, n_states: int) -> sp.csr_matrix:
    """The flat row-major count vector of :func:`count_flat` as an (n_states, n_states) CSR."""
    nz = np.flatnonzero(flat)
    return codes_to_csr(nz, flat[nz], n_states)


def codes_to_csr(codes: np.ndarray, counts: np.ndarray, n_states: int) -> sp.csr_matrix:
    """Sorted flat codes ``i * n_states + j`` and their counts as an int64 CSR matrix (the
    codes are already in CSR order, so no sorting is needed)."""
    indptr = np.searchsorted(codes, np.arange(n_states + 1, dtype=np.int64) * n_states)
    return sp.csr_matrix((counts.astype(np.int64, copy=False), codes % n_states, indptr),
                         shape=(n_states, n_states))


def run_count_rows(labels, lag, *, n_states=None, every_frame=True, blocks_per_run=1, client=None):
    """Per-run (or per-block) count matrices, stacked as rows of one sparse matrix.

    Row r holds the flattened (n_states * n_states) count matrix of run r, so that a
    weighted sum of runs -- a bootstrap sample -- is one sparse product ``w @ rows``.
    With ``blocks_per_run > 1`` each run is cut into contiguous blocks by the start frame
    of each pair; the blocks' counts add up exactly to the run's counts.

    ``labels`` may also be runs placed for ``client`` once for several calls
    (:func:`msmkit._execution.place`); with a ``client`` each run is counted on a worker.

    Returns
    -------
    rows : scipy.sparse.csr_matrix of int64, shape (n_runs * blocks_per_run, n_states**2)
    n_states : int
    """
    placed = labels if isinstance(labels, execution.Placed) else None
    runs, lag, n_states = prepare_counting(labels if placed is None else placed.runs, lag, n_states)
    every_frame = check_bool(every_frame, "every_frame")
    blocks_per_run = check_int(blocks_per_run, "blocks_per_run", minimum=1)
    per_run = execution.map_runs(count_rows_of_run, runs if placed is None or client is None else placed,
                                 lag, n_states, every_frame, blocks_per_run, client=client,
                                 what="run_count_rows", length=np.size)
    if any(len(r) != blocks_per_run for r in per_run):
        raise ClusterError("run_count_rows: the count rows of some runs did not come back; run the "
                           "call again")
    return stack_count_rows(per_run, n_states), n_states


def count_rows_of_run(run, lag, n_states, every_frame, blocks_per_run) -> list:
    """Kernel of :func:`run_count_rows` for one run: one (codes, counts) pair per block."""
    out = []
    n_pairs = max(run.size - lag, 0)
    edges = np.linspace(0, n_pairs, blocks_per_run + 1).astype(np.intp)
    for b in range(blocks_per_run):
        start = int(edges[b])
        if not every_frame:  # stay on the strided grid t = 0, lag, 2 lag, ... of the whole run
            start = -(-start // lag) * lag
        piece = run[start: edges[b + 1] + lag] if edges[b + 1] > start else run[:0]
        out.append(np.unique(_pair_codes(piece, lag, n_states, every_frame), return_counts=True))
    return out


def stack_count_rows(per_run, n_states) -> sp.csr_matrix:
    """Stack the (codes, counts) blocks of :func:`count_rows_of_run`, run after run, as CSR rows."""
    pieces = [p for run in per_run for p in run]
    indptr = np.concatenate([[0], np.cumsum([u.size for u, _ in pieces])]).astype(np.int64)
    return sp.csr_matrix((np.concatenate([c for _, c in pieces]).astype(np.int64),
                          np.concatenate([u for u, _ in pieces]), indptr),
                         shape=(len(pieces), n_states * n_states))


def communicating_classes(counts) -> list[np.ndarray]:
    """Communicating classes of the count graph, largest number of counts first.

    States with no counts at all are left out. Ties in counts go to the set holding the
    lowest label.

    Parameters
    ----------
    counts : scipy.sparse matrix or ndarray, shape (n, n)

    Returns
    -------
    list of ndarray of int
        The states (indices of ``counts``) of each set, sorted ascending.
    """
    C = sp.csr_matrix(counts)
    C.eliminate_zeros()
    # work on the visited states only: memory follows the pairs seen, not the largest label
    visited = np.union1d(np.repeat(np.arange(C.shape[0]), np.diff(C.indptr)), C.indices)
    if visited.size == 0:
        return []
    sub = C[visited][:, visited]
    n = visited.size
    n_comp, comp = csgraph.connected_components(sub, directed=True, connection="strong")
    count_in = np.zeros(n_comp)
    # counts inside each component: C[i, j] with comp[i] == comp[j]
    coo = sub.tocoo()
    same = comp[coo.row] == comp[coo.col]
    np.add.at(count_in, comp[coo.row[same]], coo.data[same])
    lowest = np.full(n_comp, n, dtype=np.int64)
    np.minimum.at(lowest, comp, np.arange(n))
    order = sorted(range(n_comp), key=lambda k: (-count_in[k], lowest[k]))
    members = np.argsort(comp, kind="stable")
    bounds = np.searchsorted(comp[members], np.arange(n_comp + 1))
    return [visited[members[bounds[k]:bounds[k + 1]]] for k in order]


def kept_states(counts) -> np.ndarray:
    """The strongly connected set holding the most transition counts (ties: lowest label)."""
    sets = communicating_classes(counts)
    if not sets:
        raise InputError("counts hold no transitions: there is no connected set of states")
    return sets[0]
