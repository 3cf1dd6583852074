"""Microstates: k-means clustering of frames and fast assignment of frames to centers.

:class:`Microstates` fits k-means (scikit-learn, k-means++ seeding) on every ``stride``-th
frame and labels frames with :func:`nearest_center`, which streams runs in memory-bounded
chunks and returns, for each frame, the index of the nearest center in Euclidean distance.

Assignment is exact: labels equal a brute-force float64 argmin (ties go to the lowest center
index). Two engines, chosen by dimension:

* up to ``KDTREE_MAX_DIM`` features, a KD-tree (``scipy.spatial.cKDTree``, all cores),
  queried for the two nearest centers; frames whose two distances tie within rounding are
  re-decided by brute force;
* above that, ``||c||^2 - 2 x.c`` for a block of frames in one float32 matrix product (BLAS),
  threads over blocks, and an error bound on the float32 rounding: a frame whose best and
  second-best values lie closer than the bound is re-decided by a float64 brute force.

With ``client=`` (a ``dask.distributed.Client``) assignment maps :func:`assign_pieces` over
pieces of the runs (labels identical to the in-memory result given the same centers), and
k-means runs on the cluster (:func:`fit_centers_on_cluster`): Lloyd's iterations [3]_ with
per-center sums and counts of each partition of the strided frames (the partition sums add up
to exactly the full-sample update), or mini-batch k-means [2]_ whose every batch is drawn over
all strided frames; both seed with k-means++ [1]_ on a random subsample. The strided frames
stay on the workers.

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
import warnings
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from . import _execution as execution
from ._checks import (
    as_float_trajectories,
    check_chunk_size,
    check_int,
)
from .distributed import ClusterError, n_threads, worker_threads
from .errors import DiagnosticWarning, InputError
from .io import iter_chunks

__all__ = ["Microstates", "nearest_center"]

#: Highest number of features for which the KD-tree engine is used.
KDTREE_MAX_DIM = 3
_U32 = float(np.finfo(np.float32).eps) / 2  # unit roundoff of float32
_BLOCK_ROWS = 512  # frames per matrix product (the block of distances stays in cache)


def _n_threads() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


def _brute_force(x: np.ndarray, centers: np.ndarray) -> np.ndarray:
    """Exact reference: argmin over centers of sum((x - c)^2) in float64 (lowest index wins)."""
    out = np.empty(len(x), dtype=np.intp)
    step = max(1, 2_000_000 // max(1, centers.size))
    for s in range(0, len(x), step):
        diff = x[s:s + step, None, :] - centers[None, :, :]
        out[s:s + step] = np.einsum("ijk,ijk->ij", diff, diff).argmin(axis=1)
    return out


class _Assigner:
    """Nearest-center labeling prepared once for a set of centers (see module docstring)."""

    def __init__(self, centers: np.ndarray, n_threads: int | None = None):
        centers = np.asarray(centers, dtype=np.float64)
        # Duplicate centers: keep the first of each, so ties go to the lowest index.
        _, first = np.unique(centers, axis=0, return_index=True)
        self.keep = np.sort(first)
        self.centers = np.ascontiguousarray(centers[self.keep])
        self.k, self.d = self.centers.shape
        self.n_threads = _n_threads() if n_threads is None else max(1, int(n_threads))
        if self.k == 1:
            self.engine = "single"
        elif self.d <= KDTREE_MAX_DIM:
            from scipy.spatial import cKDTree
            self.engine = "kdtree"
            self.tree = cKDTree(self.centers)
        else:
            self.engine = "gemm"
            self.shift = self.centers.mean(axis=0)
            cs = self.centers - self.shift
            cc = np.einsum("ij,ij->i", cs, cs)
            # [x, 1] @ [-2 c^T; |c|^2] = |c|^2 - 2 x.c: one product per block.
            self.caug = np.ascontiguousarray(np.vstack([-2.0 * cs.T, cc[None, :]]),
                                             dtype=np.float32)
            self.cc_max = float(cc.max())
            self.cnorm_max = float(np.sqrt(cc.max()))

    def __call__(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=np.float64)
        if self.engine == "single" or len(x) == 0:
            labels = np.zeros(len(x), dtype=np.intp)
        elif self.engine == "kdtree":
            labels = self._kdtree(x)
        else:
            labels = self._gemm(x)
        return self.keep[labels].astype(np.int32)

    def _kdtree(self, x):
        dist, idx = self.tree.query(x, k=2, workers=-1 if self.n_threads > 1 else 1)
        labels = idx[:, 0]
        # Distances are computed in float64 from differences; a near-tie is re-decided exactly.
        close = dist[:, 1] - dist[:, 0] <= 1e-12 * dist[:, 1] + 1e-300
        self._settle(x, labels, np.flatnonzero(close))
        return labels

    def _gemm_block(self, xs32: np.ndarray, xnorm: np.ndarray, labels: np.ndarray,
                    work: tuple) -> list:
        """Label one range of frames (already shifted, float32); return the unsure rows."""
        xa, dist = work
        n, d = xs32.shape
        unsure = []
        bound_const = 2.0 * (d + 4) * _U32
        for s in range(0, n, _BLOCK_ROWS):
            m = min(_BLOCK_ROWS, n - s)
            xa[:m, :d] = xs32[s:s + m]
            dm = dist[:m]
            np.matmul(xa[:m], self.caug, out=dm)
            j = dm.argmin(axis=1)
            rows = np.arange(m)
            best = dm[rows, j]
            dm[rows, j] = np.inf
            second = dm.min(axis=1)
            labels[s:s + m] = j
            # Rounding error of each float32 entry is at most (d+4) u (2|x||c| + |c|^2)
            # (dot-product error bound plus the rounding of the inputs); the winner is certain
            # when the runner-up is more than twice that above it.
            bound = bound_const * (2.0 * xnorm[s:s + m] * self.cnorm_max + self.cc_max)
            bad = np.flatnonzero((second - best) <= 2.0 * bound)
            if bad.size:
                unsure.append(bad + s)
        return unsure

    def _gemm(self, x):
        from threadpoolctl import threadpool_limits

        n = len(x)
        labels = np.empty(n, dtype=np.intp)
        xs = x - self.shift
        xnorm = np.sqrt(np.einsum("ij,ij->i", xs, xs))
        xs32 = xs.astype(np.float32)
        del xs
        n_parts = 1 if n < 8 * _BLOCK_ROWS or self.n_threads == 1 else 4 * self.n_threads
        bounds = np.linspace(0, n, n_parts + 1).astype(np.int64)

        def work(i):
            lo, hi = int(bounds[i]), int(bounds[i + 1])
            buffers = (np.ones((_BLOCK_ROWS, self.d + 1), dtype=np.float32),
                       np.empty((_BLOCK_ROWS, self.k), dtype=np.float32))
            return [u + lo for u in self._gemm_block(xs32[lo:hi], xnorm[lo:hi],
                                                     labels[lo:hi], buffers)]

        if n_parts == 1:
            unsure = work(0)
        else:
            # One BLAS thread per worker: the threads already use every core.
            with threadpool_limits(1, user_api="blas"), \
                    ThreadPoolExecutor(self.n_threads) as pool:
                unsure = [u for part in pool.map(work, range(n_parts)) for u in part]
        if unsure:
            self._settle(x, labels, np.concatenate(unsure))
        return labels

    def _settle(self, x, labels, rows):
        if rows.size:
            labels[rows] = _brute_force(x[rows], self.centers)


def nearest_center(frames, centers, *, chunk_size=None, n_threads=None) -> np.ndarray:
    """Index of the nearest center (Euclidean) for every frame.

    Parameters
    ----------
    frames : ndarray (n_frames, n_features) or a lazy run
        Read in chunks of ``chunk_size`` frames.
    centers : ndarray (n_centers, n_features)
    chunk_size : int, optional
        Frames per chunk (default about 16 MiB of float64 frames).
    n_threads : int, optional
        Threads to use (default: every core available to the process).

    Returns
    -------
    ndarray of int32 (n_frames,)
        Equal to ``argmin_j sum((x - c_j)^2)`` computed in float64; ties go to the lowest j.

    Examples
    --------
    >>> import numpy as np
    >>> nearest_center(np.array([[0.1, 0.0], [0.9, 1.0]]), np.array([[0.0, 0.0], [1.0, 1.0]]))
    array([0, 1], dtype=int32)
    """
    runs = as_float_trajectories([frames], "frames")
    centers = np.asarray(centers, dtype=np.float64)
    if centers.ndim != 2 or centers.shape[0] == 0:
        raise InputError(f"centers must be a 2-D array (n_centers x n_features) with at least "
                         f"one row, but has shape {centers.shape}")
    if not np.isfinite(centers).all():
        raise InputError("centers hold NaN or infinite values")
    if centers.shape[1] != runs[0].shape[1]:
        raise InputError(f"frames have {runs[0].shape[1]} features but centers have "
                         f"{centers.shape[1]}; use centers fitted on the same features")
    return _assign_run(runs[0], _Assigner(centers, n_threads),
                       check_chunk_size(chunk_size, centers.shape[1]))


#: Frames read and labeled at a time: the assigner's temporaries (distances, indices, a float64
#: copy: about 80 bytes a frame) and the frames read stay near 6 MB whatever the chunk size, so
#: that labeling adds little to the labels themselves (4 bytes a frame).
ASSIGN_BLOCK = 1 << 16


def _assign_run(run, assigner: _Assigner, chunk: int, bar=None) -> np.ndarray:
    out = np.empty(run.shape[0], dtype=np.int32)
    start = 0
    for block in iter_chunks(run, min(chunk, ASSIGN_BLOCK)):
        out[start:start + len(block)] = assigner(block)
        start += len(block)
        if bar is not None:
            bar.update(len(block))
    return out


def _return_freed_memory() -> None:
    """Hand memory already freed (by the clustering, by reading chunks) back to the operating
    system before the labels are allocated, where the C library supports it (glibc's
    malloc_trim; a no-op elsewhere).

    The allocator keeps freed blocks of up to tens of MB for reuse, but the labels (4 bytes a
    frame) are one large separate mapping that cannot reuse them: without this the resident
    memory of a long assignment is the labels plus everything the clustering once held.
    """
    global _TRIM
    if _TRIM is None:
        import ctypes
        import ctypes.util

        try:
            _TRIM = getattr(ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6"), "malloc_trim")
        except (OSError, AttributeError, TypeError):
            _TRIM = False
    if _TRIM:
        _TRIM(0)


_TRIM = None


def _joined_labels(pieces) -> np.ndarray:
    """The int32 labels of one run from the labels of the pieces, copied only when there are several
    (a copy of one whole run's labels would double the largest array of the step)."""
    if len(pieces) == 1:
        return pieces[0].astype(np.int32, copy=False)
    return np.concatenate(pieces).astype(np.int32, copy=False) if pieces else np.empty(0, np.int32)


def _label_counts(labels, k: int, block: int = ASSIGN_BLOCK) -> np.ndarray:
    """Frames per state over all label runs, counted in slices (no concatenated copy)."""
    counts = np.zeros(k, dtype=np.int64)
    for run in labels:
        for lo in range(0, run.size, block):
            counts += np.bincount(run[lo:lo + block], minlength=k)
    return counts


def _strided_frames(run, stride: int, chunk_size: int | None = None, start: int = 0,
                    stop: int | None = None) -> np.ndarray:
    """Frames 0, stride, 2*stride, ... of a run that lie in ``start:stop``, read chunk by chunk.

    Only one chunk of the run is held at a time besides the output (``1/stride`` of the
    frames); in-memory runs give a copy of the strided view.
    """
    n = run.shape[0]
    stop = n if stop is None else min(stop, n)
    first = -(-start // stride) * stride  # first multiple of stride at or after start
    if first >= stop:
        return np.empty((0, run.shape[1]), dtype=getattr(run, "dtype", np.float64))
    if isinstance(run, np.ndarray):
        return np.array(run[first:stop:stride])
    chunk = check_chunk_size(chunk_size, run.shape[1])
    chunk = max(stride, chunk - chunk % stride)  # whole periods per read
    out = np.empty((len(range(first, stop, stride)), run.shape[1]), dtype=run.dtype)
    k = 0
    for lo in range(first, stop, chunk):
        part = run[lo:min(lo + chunk, stop)][::stride]
        out[k:k + len(part)] = part
        k += len(part)
    return out


class Microstates:
    """Microstates by k-means clustering of frames.

    Parameters
    ----------
    n_states : int
        Number of clusters (microstates).
    method : {"kmeans", "minibatch"}
        ``"kmeans"``: Lloyd's k-means (scikit-learn ``KMeans``); ``"minibatch"``: mini-batch
        k-means [2]_, faster on many frames. Both seed with k-means++ [1]_.
    stride : int
        Fit on every ``stride``-th frame of each run (the usual choice for long data: frames
        close in time carry little new information). Labels are still given to every frame.
    seed : int, optional
        Random seed; same seed, same centers.
    max_iter : int
        Iteration limit of the clustering.
    chunk_size : int, optional
        Frames per chunk when reading and assigning (default about 16 MiB of float64 frames).
    progress : bool
        Show progress bars for reading and assignment.

    Attributes
    ----------
    centers_ : ndarray (n_states, n_features)
    labels_ : list of int32 ndarrays, one per fitted run (every frame, not only the strided ones)
    counts_ : ndarray (n_states,), frames of the fitted runs in each state
    inertia_ : float, sum of squared distances of the strided frames to their centers
    n_iter_ : int
    n_frames_fitted_ : int, strided frames the clustering saw
    n_features_in_ : int
    feature_names_in_ : tuple of str or None

    Examples
    --------
    >>> import numpy as np
    >>> x = np.concatenate([np.zeros((50, 1)), np.ones((50, 1))])
    >>> micro = Microstates(2, seed=0).fit(x)
    >>> sorted(np.bincount(micro.labels_[0]).tolist())
    [50, 50]
    """

    def __init__(self, n_states, *, method="kmeans", stride=1, seed=None, max_iter=300,
                 chunk_size=None, progress=False):
        self.n_states = n_states
        self.method = method
        self.stride = stride
        self.seed = seed
        self.max_iter = max_iter
        self.chunk_size = chunk_size
        self.progress = progress

    def _bar(self, total, desc):
        if not self.progress:
            return None
        from tqdm.auto import tqdm
        return tqdm(total=total, desc=desc, unit="frame")

    def fit(self, trajs, y=None, *, client=None) -> "Microstates":
        """Cluster every ``stride``-th frame and label all frames of ``trajs``.

        Parameters
        ----------
        trajs : 2-D array, list of 2-D arrays, or a TrajectorySet (lazy runs are streamed)
        client : dask.distributed.Client, optional
            Cluster on a dask cluster (needs the extra ``dask``): the strided frames stay on
            the workers, split into partitions, and only center arrays and per-center sums
            travel. ``method="kmeans"`` runs Lloyd iterations whose partition sums add up to
            exactly the full-sample update; ``method="minibatch"`` runs mini-batch k-means
            [2]_ with each worker drawing a share of every batch. Both seed with k-means++
            [1]_ on a random subsample of the strided frames. Centers can differ from the
            in-memory fit (another seeding); labels given the centers are identical.

        Returns
        -------
        self

        Notes
        -----
        Memory: the strided frames as float64, ``n_frames / stride * n_features * 8`` bytes
        (on a cluster: spread over the workers), plus the clustering's working memory, one
        chunk of frames while reading or assigning, and the labels, 4 bytes per frame.
        """
        from ._checks import feature_names_of

        k = check_int(self.n_states, "n_states", minimum=1)
        if self.method not in ("kmeans", "minibatch"):
            raise InputError(f"method must be 'kmeans' or 'minibatch', but got {self.method!r}")
        stride = check_int(self.stride, "stride", minimum=1)
        max_iter = check_int(self.max_iter, "max_iter", minimum=1)
        seed = None if self.seed is None else check_int(self.seed, "seed", minimum=0)
        runs = as_float_trajectories(trajs, "trajs")
        d = runs[0].shape[1]
        chunk = check_chunk_size(self.chunk_size, d)
        n_sample = sum(len(range(0, r.shape[0], stride)) for r in runs)
        if n_sample < k:
            total = sum(r.shape[0] for r in runs)
            raise InputError(f"n_states={k} is more than the {n_sample} frames available to "
                             f"cluster ({total} frames, stride={stride}); lower n_states"
                             f"{' or stride' if stride > 1 else ''}")
        if client is not None:
            fitted = fit_centers_on_cluster(client, runs, k, method=self.method, stride=stride,
                                       seed=seed, max_iter=max_iter, chunk=chunk,
                                       progress=self.progress)
            if not fitted.converged:
                warnings.warn(f"Microstates: clustering did not converge in max_iter={max_iter} "
                              f"iterations; raise max_iter", DiagnosticWarning, stacklevel=2)
            self.centers_ = fitted.centers
            self.inertia_ = fitted.inertia
            self.n_iter_ = fitted.n_iter
            self.n_frames_fitted_ = fitted.n_frames
            self.n_features_in_ = d
            self.feature_names_in_ = feature_names_of(trajs)
            return self._label_fitted(runs, chunk, k, client)

        bar = self._bar(sum(r.shape[0] for r in runs), "reading frames")
        parts = []
        for run in runs:
            parts.append(_strided_frames(run, stride, chunk))
            if bar is not None:
                bar.update(run.shape[0])
        if bar is not None:
            bar.close()
        sample = np.ascontiguousarray(np.concatenate(parts), dtype=np.float64)
        del parts
        from sklearn.cluster import KMeans, MiniBatchKMeans
        from sklearn.exceptions import ConvergenceWarning

        if self.method == "kmeans":
            model = KMeans(n_clusters=k, init="k-means++", n_init=1, max_iter=max_iter,
                           random_state=seed)
        else:
            model = MiniBatchKMeans(n_clusters=k, init="k-means++", n_init=1,
                                    max_iter=max_iter, batch_size=max(1024, 3 * k),
                                    random_state=seed)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", ConvergenceWarning)
            model.fit(sample)
        for w in caught:
            if issubclass(w.category, ConvergenceWarning):
                n_distinct = len(np.unique(sample, axis=0))
                if n_distinct < k:
                    warnings.warn(f"Microstates: only {n_distinct} distinct frames for "
                                  f"n_states={k}; some centers coincide and their states stay "
                                  f"empty; lower n_states", DiagnosticWarning, stacklevel=2)
                else:
                    warnings.warn(f"Microstates: clustering did not converge in "
                                  f"max_iter={max_iter} iterations; raise max_iter",
                                  DiagnosticWarning, stacklevel=2)
            else:
                warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)

        self.centers_ = np.asarray(model.cluster_centers_, dtype=np.float64)
        self.inertia_ = float(model.inertia_)
        self.n_iter_ = int(model.n_iter_)
        self.n_frames_fitted_ = int(len(sample))
        self.n_features_in_ = d
        self.feature_names_in_ = feature_names_of(trajs)
        del sample
        return self._label_fitted(runs, chunk, k, None)

    def _label_fitted(self, runs, chunk, k, client) -> "Microstates":
        self.labels_ = self._assign_runs(runs, chunk, client)
        self.counts_ = _label_counts(self.labels_, k)
        empty = np.flatnonzero(self.counts_ == 0)
        if empty.size:
            shown = ", ".join(map(str, empty[:10])) + (" ..." if empty.size > 10 else "")
            warnings.warn(f"Microstates: {empty.size} of {k} states received no frame "
                          f"(states {shown}); they will not appear in the label trajectories",
                          DiagnosticWarning, stacklevel=3)
        return self

    def _assign_runs(self, runs, chunk, client=None) -> list[np.ndarray]:
        if client is None:
            _return_freed_memory()
        bar = self._bar(sum(r.shape[0] for r in runs), "assigning frames")
        try:
            centers = np.ascontiguousarray(self.centers_, dtype=np.float64)
            per_run = execution.map_pieces(assign_pieces, runs, centers, chunk, client=client,
                                           minimum=min(chunk, 1 << 16), what="assignment",
                                           bar=bar, local_bar=True)
            return [_joined_labels(p) for p in per_run]
        finally:
            if bar is not None:
                bar.close()

    def assign(self, trajs, *, client=None) -> list[np.ndarray]:
        """Label every frame with the index of the nearest center.

        Parameters
        ----------
        trajs : 2-D array, list of 2-D arrays, or a TrajectorySet (streamed in chunks)
        client : dask.distributed.Client, optional
            Assign on the cluster's workers (needs the extra ``dask``): only the centers and
            file paths/offsets (or the in-memory runs) travel; long runs are split into
            pieces. Labels are identical to the in-memory result.

        Returns
        -------
        list of int32 ndarrays
            One label array per run (a list of one for a single array).
        """
        if not hasattr(self, "centers_"):
            raise InputError("this Microstates is not fitted yet: call fit(trajs) first")
        runs = as_float_trajectories(trajs, "trajs")
        d = runs[0].shape[1]
        if d != self.n_features_in_:
            raise InputError(f"trajs has {d} features, but the microstates were fitted on "
                             f"{self.n_features_in_}; assign data with the same features")
        return self._assign_runs(runs, check_chunk_size(self.chunk_size, d), client)

    def fit_transform(self, trajs, *, client=None) -> list[np.ndarray]:
        """``fit(trajs)`` and return ``labels_``."""
        return self.fit(trajs, client=client).labels_

    def __repr__(self) -> str:
        opts = [repr(self.n_states)]
        for name, default in (("method", "kmeans"), ("stride", 1), ("seed", None)):
            if getattr(self, name) != default:
                opts.append(f"{name}={getattr(self, name)!r}")
        return f"Microstates({', '.join(opts)})"


# ---------------------------------------------------------------------------------------------
# Kernels for the execution layer, and k-means on a dask cluster
# ---------------------------------------------------------------------------------------------

#: partitions of the strided frames per worker thread for k-means on the cluster
PARTITIONS_PER_THREAD = 2
#: mini-batch k-means on the cluster stops when the smoothed batch inertia has not improved
#: for this many batches (the same rule as scikit-learn's ``max_no_improvement``)
MAX_NO_IMPROVEMENT = 10


class _Range:
    """Frames ``start:stop`` of a run, read chunk by chunk (a view for in-memory runs)."""

    def __init__(self, run, start, stop):
        self.run, self.start, self.stop = run, start, stop
        self.shape = (stop - start, run.shape[1])

    def iter_chunks(self, chunk_size=None):
        size = check_chunk_size(chunk_size, self.shape[1])
        for lo in range(self.start, self.stop, size):
            yield self.run[lo:min(lo + size, self.stop)]

    def __array__(self, dtype=None, copy=None):  # pragma: no cover - not used by the tasks
        arr = np.asarray(self.run[self.start:self.stop])
        return arr if dtype is None else arr.astype(dtype)


def assign_pieces(pieces, centers, chunk, bar=None) -> list[np.ndarray]:
    """Kernel: nearest-center labels (int32) of frame ranges ``(run, start, stop)``.

    The centers are prepared once for all pieces, with the threads of the dask worker running
    the task, or every core of this machine outside a worker.
    """
    assigner = _Assigner(centers, worker_threads())
    out = []
    for run, start, stop in pieces:
        part = run if (start == 0 and stop == run.shape[0]) else _Range(run, start, stop)
        out.append(_assign_run(part, assigner, chunk, bar))
    return out


@dataclass
class FittedCenters:
    """Result of :func:`fit_centers_on_cluster`."""

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
    parts = [_strided_frames(run, stride, chunk, start, stop)
             for run, start, stop in pieces]
    return np.ascontiguousarray(np.concatenate(parts), dtype=np.float64)


def _task_stats(part):
    return len(part), part.sum(axis=0), np.einsum("ij,ij->j", part, part)


def _task_take(part, rows):
    return part[rows]


def _task_center_sums(part, centers, rows=None):
    """Per-center sums and counts of the frames of ``part`` (or of ``part[rows]``) assigned to
    their nearest center, and their squared distances (inertia)."""
    x = part if rows is None else part[rows]
    k, d = centers.shape
    assigner = _Assigner(centers, worker_threads())
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


def fit_centers_on_cluster(client, runs, k, *, method="kmeans", stride=1, seed=None, max_iter=300,
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

    placed = execution.place(runs, client)
    rng = np.random.default_rng(seed)
    threads = n_threads(client)
    sizes = [int(r.shape[0]) for r in runs]
    groups = execution.pieces_of(sizes, PARTITIONS_PER_THREAD * threads, minimum=stride)
    part_sizes = np.array([sum(_strided_count(a, b, stride) for _, a, b in g) for g in groups],
                          dtype=np.int64)
    offsets = np.concatenate([[0], np.cumsum(part_sizes)])
    n_sample = int(offsets[-1])
    what = [execution.describe_runs(runs, sorted({i for i, _, _ in g})) for g in groups]
    parts = [execution.submit(client, _task_sample, [(placed.items[i], a, b) for i, a, b in g], stride, chunk)
             for g in groups]
    futures = []
    try:
        stats = execution.gather(client, [execution.submit(client, _task_stats, p) for p in parts], what)
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
        sample = np.concatenate(execution.gather(client, [execution.submit(client, _task_take, parts[p], r)
                                                  for p, r in pieces], [what[p] for p, _ in pieces]))
        init_seed = None if seed is None else int(rng.integers(2 ** 31 - 1))
        centers, _ = kmeans_plusplus(sample, k, random_state=init_seed)
        centers = np.asarray(centers, dtype=np.float64)

        bar = None
        if progress:
            from tqdm.auto import tqdm
            bar = tqdm(desc=f"k-means on the cluster ({method})", unit="step")
        converged = False
        n_iter = 0
        try:
            if method == "kmeans":
                for n_iter in range(1, max_iter + 1):
                    futures = [execution.submit(client, _task_center_sums, p, centers) for p in parts]
                    sums, counts, _ = _sum_partials(execution.gather(client, futures, what))
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
                    futures = [execution.submit(client, _task_center_sums, parts[p], centers, r)
                               for p, r in pieces]
                    sums, counts, inertia = _sum_partials(execution.gather(client, futures,
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
        futures = [execution.submit(client, _task_center_sums, p, centers) for p in parts]
        _, counts, inertia = _sum_partials(execution.gather(client, futures, what))
        if int(counts.sum()) != n_sample:
            raise ClusterError(f"k-means: {int(counts.sum())} of {n_sample} strided frames came "
                               f"back from the final pass; run the call again")
    finally:
        execution.cancel(client, parts + futures)
    return FittedCenters(centers, float(inertia), int(n_iter), n_sample, converged)


def _sum_partials(results):
    """Add per-partition (sums, counts, inertia) in partition order (deterministic)."""
    sums = sum(r[0] for r in results)
    counts = sum(r[1] for r in results)
    inertia = sum(r[2] for r in results)
    return sums, counts, inertia
