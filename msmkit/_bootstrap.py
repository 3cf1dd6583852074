"""Shared pieces of the bootstrap over whole runs (or contiguous blocks of few runs).

Counts are computed once per lag and per resampling unit (:func:`msmkit.counts.run_count_rows`);
a bootstrap sample is a vector of multiplicities over the units, so all samples at one lag are
one sparse product ``weights @ rows``. Every resampling function of the package (lag scans,
Chapman-Kolmogorov tests) draws the weights here, so the same seed gives the same resampled
runs everywhere.

References
----------
Efron, Ann. Stat. 7, 1 (1979): the bootstrap.
"""
from __future__ import annotations

import math
import warnings

import numpy as np
import scipy.sparse as sp

from .counts import kept_states
from .errors import Cancelled, InputError
from .estimate import estimate_transition_matrix

#: with fewer runs than this, the bootstrap resamples contiguous blocks instead of whole runs
MIN_RUNS_FOR_RUN_BOOTSTRAP = 5
#: target number of resampling units when blocks are used
BLOCK_UNITS = 20


def resampling_plan(n_runs: int, n_samples: int, rng) -> tuple[int, np.ndarray, list[str]]:
    """Blocks per run, bootstrap weights and the note to show the user.

    Whole runs are resampled with replacement; with fewer than ``MIN_RUNS_FOR_RUN_BOOTSTRAP``
    runs each run is cut into contiguous blocks (about ``BLOCK_UNITS`` units in all).

    Returns
    -------
    blocks_per_run : int
    weights : ndarray, shape (n_samples, n_runs * blocks_per_run)
        How often each unit is drawn in each sample.
    notes : list of str
        Empty, or the caution that blocks were resampled.
    """
    notes = []
    blocks = 1
    if n_runs < MIN_RUNS_FOR_RUN_BOOTSTRAP and n_samples:
        blocks = math.ceil(BLOCK_UNITS / n_runs)
        notes.append(f"Only {n_runs} run(s): the bootstrap resamples {blocks} contiguous blocks per run "
                     f"instead of whole runs; blocks of one run are correlated, so the intervals may be "
                     f"too narrow.")
    n_units = n_runs * blocks
    weights = np.stack([np.bincount(rng.integers(0, n_units, n_units), minlength=n_units)
                        for _ in range(n_samples)]) if n_samples else np.zeros((0, n_units))
    return blocks, weights, notes


def sample_rows(weights: np.ndarray, rows: sp.csr_matrix) -> sp.csr_matrix:
    """Flattened count matrices of all bootstrap samples, one row per sample (one sparse product)."""
    return sp.csr_matrix(weights) @ rows


def unflatten(flat, n: int) -> sp.csr_matrix:
    """A flattened (n * n) count vector -- dense, or one row of a sparse matrix -- as an n x n CSR."""
    if sp.issparse(flat):
        row = flat.tocoo()
        return sp.csr_matrix((row.data, (row.col // n, row.col % n)), shape=(n, n))
    flat = np.asarray(flat).ravel()
    nz = np.flatnonzero(flat)
    return sp.csr_matrix((flat[nz], (nz // n, nz % n)), shape=(n, n))


def fit_sample(C: sp.csr_matrix, *, reversible: bool, initial=None):
    """Estimate a transition matrix on the largest connected set of a (resampled) count matrix.

    Diagnostics are not issued (a resample is not shown to the user). ``initial`` (a stationary
    vector over the rows of ``C``) warm-starts the reversible estimate where it is positive.

    Returns
    -------
    (keep, T, pi) with ``keep`` the indices of the connected set, or None when fewer than two
    states remain.
    """
    keep = kept_states(C) if C.nnz else np.empty(0, dtype=np.intp)
    if keep.size < 2:
        return None
    Ck = C[keep][:, keep]
    init = None if initial is None else np.asarray(initial)[keep]
    if init is not None and not np.all(init > 0):
        init = None
    # no warnings.catch_warnings here: samples run on threads, and the filters are process-wide
    T, info = estimate_transition_matrix(Ck, reversible=reversible, return_info=True, initial=init, warn=False)
    return keep, T, info.equilibrium


def percentile_interval(samples: np.ndarray, confidence: float, axis: int = 0):
    """Percentile bootstrap interval at ``confidence``, ignoring NaN samples (all-NaN -> NaN)."""
    lo, hi = 100 * (1 - confidence) / 2, 100 * (1 + confidence) / 2
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN slices -> NaN
        return np.nanpercentile(samples, lo, axis=axis), np.nanpercentile(samples, hi, axis=axis)


def progress_bar(total: int, enabled: bool, desc: str, cancel=None):
    """A tqdm.auto bar, disabled unless ``enabled``.

    ``cancel``: None, or an object with ``is_set()`` (e.g. ``threading.Event``), asked before
    every update, i.e. between two units of work; once it is set, the update raises
    :class:`~msmkit.errors.Cancelled`.
    """
    from tqdm.auto import tqdm
    bar = tqdm(total=total, disable=not enabled, desc=desc, leave=False)
    return bar if cancel is None else _CancellableBar(bar, cancel, desc)


class _CancellableBar:
    """A progress bar whose updates are the points where a computation may be cancelled."""

    def __init__(self, bar, cancel, desc):
        if not callable(getattr(cancel, "is_set", None)):
            raise InputError(f"cancel must be None or an object with an is_set() method, such as "
                             f"threading.Event(), but got {type(cancel).__name__}")
        self._bar, self._cancel, self._desc = bar, cancel, desc

    def update(self, n=1):
        if self._cancel.is_set():
            raise Cancelled(f"{self._desc}: cancelled on request")
        return self._bar.update(n)

    def __getattr__(self, name):
        return getattr(self._bar, name)
