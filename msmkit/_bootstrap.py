"""Shared pieces of the bootstrap over whole runs (or contiguous blocks of few runs).

Counts are computed once per lag and per resampling unit (:func:`msmkit.counts.run_count_rows`);
a bootstrap sample is a vector of multiplicities over the units, so all samples at one lag are
one sparse product ``weights @ rows``. Every resampling function of the package (lag scans,
Chapman–Kolmogorov tests) draws the weights here, so the same seed gives the same resampled
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
from .errors import Cancelled, DiagnosticWarning, InputError
from .estimate import estimate_transition_matrix

#: with fewer runs than this, the bootstrap resamples contiguous blocks instead of whole runs
MIN_RUNS_FOR_RUN_BOOTSTRAP = 5
#: target number of resampling units when blocks are used
BLOCK_UNITS = 20


#: interval methods of :func:`bootstrap_interval`
INTERVALS = ("bca", "bc", "percentile")
#: expected number of samples beyond each end of the interval below which a warning is issued
TAIL_SAMPLES = 5


def check_interval(interval) -> str:
    """The interval method, or InputError naming the choices."""
    if not isinstance(interval, str) or interval not in INTERVALS:
        raise InputError(f"interval must be one of {', '.join(map(repr, INTERVALS))}, but got {interval!r}")
    return interval


def samples_needed(confidence: float) -> int:
    """Fewest bootstrap samples that leave :data:`TAIL_SAMPLES` samples expected beyond each end
    of an interval at ``confidence`` (200 at 0.95)."""
    return int(math.ceil(TAIL_SAMPLES / ((1 - confidence) / 2) - 1e-9))


def warn_few_samples(n_samples: int, confidence: float, where: str, stacklevel: int = 2) -> None:
    """DiagnosticWarning when ``0 < n_samples`` is too few for intervals at ``confidence``."""
    need = samples_needed(confidence)
    if 0 < n_samples < need:
        warnings.warn(f"{where}: {n_samples} bootstrap samples are too few for {100 * confidence:g}% intervals: "
                      f"their ends rest on fewer than {TAIL_SAMPLES} samples each, and such intervals cover the "
                      f"truth less often than stated; use n_samples >= {need}.", DiagnosticWarning,
                      stacklevel=stacklevel + 1)


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


class StateCounts:
    """Per-unit count rows of one lag restricted to a model's states, on their common pattern.

    Built once per lag: the flattened (n * n) rows of :func:`msmkit.counts.run_count_rows` are
    cut to the pairs (i, j) of ``states`` that occur in any unit, so that all bootstrap samples
    are one product ``weights @ rows`` over that short pattern and a sample's count matrix is
    made without sorting or re-indexing (:meth:`matrix`).

    Parameters
    ----------
    rows : scipy.sparse matrix, shape (n_units, n * n)
    n : int
        Number of labels of the flattened rows.
    states : ndarray of int
        The model's states (labels), in the order of the model's rows.
    """

    def __init__(self, rows, n: int, states):
        states = np.asarray(states, dtype=np.intp)
        m = states.size
        pos = np.full(n, -1, dtype=np.intp)
        pos[states] = np.arange(m)
        R = sp.csr_matrix(rows)
        i, j = pos[R.indices // n], pos[R.indices % n]
        ok = (i >= 0) & (j >= 0)
        code = i[ok] * m + j[ok]
        self.pattern = np.unique(code)
        unit = np.repeat(np.arange(R.shape[0]), np.diff(R.indptr))[ok]
        self.rows = sp.csr_matrix((R.data[ok].astype(np.float64), (unit, np.searchsorted(self.pattern, code))),
                                  shape=(R.shape[0], self.pattern.size))
        self.n_states = m
        self._rows_of = (self.pattern // m).astype(np.int32)
        self._cols_of = (self.pattern % m).astype(np.int32)

    def values(self, weights: np.ndarray) -> np.ndarray:
        """Counts on the pattern of every sample, shape (n_samples, pattern size)."""
        return (sp.csr_matrix(np.asarray(weights, dtype=np.float64)) @ self.rows).toarray()

    def matrix(self, values: np.ndarray) -> sp.csr_matrix:
        """One sample's count matrix among the states (m x m CSR, sorted, no stored zeros);
        new arrays every call, so that samples can be made on several threads."""
        values = np.asarray(values, dtype=np.float64)
        nz = np.flatnonzero(values)
        indptr = np.zeros(self.n_states + 1, dtype=np.int32)
        np.cumsum(np.bincount(self._rows_of[nz], minlength=self.n_states), out=indptr[1:])
        return sp.csr_matrix((values[nz], self._cols_of[nz], indptr), shape=(self.n_states, self.n_states))


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
    Ck = C if keep.size == C.shape[0] else C[keep][:, keep]
    init = None if initial is None else np.asarray(initial)[keep]
    if init is not None and not np.all(init > 0):
        init = None
    # no warnings.catch_warnings here: samples run on threads, and the filters are process-wide
    T, info = estimate_transition_matrix(Ck, reversible=reversible, return_info=True, initial=init, warn=False)
    return keep, T, info.equilibrium


def bootstrap_interval(samples: np.ndarray, estimate, confidence: float, *, method: str = "percentile",
                       jackknife=None, n_units: int | None = None, axis: int = 0):
    """Bootstrap interval of a quantity at ``confidence``, ignoring NaN samples.

    Parameters
    ----------
    samples : ndarray
        Bootstrap values, samples along ``axis``.
    estimate : ndarray
        The full-data value, shaped like ``samples`` without ``axis``.
    confidence : float
    method : {"percentile", "bc", "bca"}
        ``percentile``: the sample quantiles at (1 -+ confidence) / 2; ``bc``: those levels
        shifted by the median bias z0 = Phi^-1(share of samples below the estimate); ``bca``:
        also corrected for skewness with the acceleration from ``jackknife`` (Efron, J. Am.
        Stat. Assoc. 82, 171 (1987); Efron & Tibshirani, An Introduction to the Bootstrap
        (1993), ch. 14).
    jackknife : ndarray, optional
        Leave-one-unit-out values, units along ``axis`` (needed for ``bca``).
    n_units : int, optional
        Number of resampled units (runs). When given, the levels are expanded for the
        narrowness of the bootstrap with few units: the normal quantile z is replaced by
        sqrt(n / (n - 1)) t_{n-1} (Hesterberg, Am. Stat. 69, 371 (2015), the expanded
        percentile interval).

    Returns
    -------
    (lower, upper), shaped like ``estimate``; NaN where no sample or no estimate is finite.
    """
    from scipy.special import ndtr, ndtri
    from scipy.stats import t as student_t
    x = np.moveaxis(np.asarray(samples, dtype=float), axis, -1)
    est = np.asarray(estimate, dtype=float)[..., None]
    if method not in ("percentile", "bc", "bca"):
        raise ValueError(f"unknown interval method {method!r}")
    upper_z = ndtri((1 + confidence) / 2)
    if n_units is not None and n_units > 1:
        upper_z = np.sqrt(n_units / (n_units - 1)) * student_t.ppf((1 + confidence) / 2, n_units - 1)
    z = np.array([-upper_z, upper_z])
    z0 = np.zeros(x.shape[:-1])
    a = np.zeros_like(z0)
    if method in ("bc", "bca"):
        valid = np.isfinite(x)
        n_valid = np.maximum(valid.sum(axis=-1), 1)
        below = np.sum(valid & (x < est), axis=-1) + 0.5 * np.sum(valid & (x == est), axis=-1)
        z0 = ndtri(np.clip(below / n_valid, 0.5 / n_valid, 1 - 0.5 / n_valid))
        z0 = np.where(np.isfinite(est[..., 0]), z0, np.nan)
    if method == "bca":
        if jackknife is None:
            raise ValueError("method='bca' needs the jackknife values")
        jk = np.moveaxis(np.asarray(jackknife, dtype=float), axis, -1)
        with np.errstate(invalid="ignore", divide="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            d = np.nanmean(jk, axis=-1, keepdims=True) - jk
            a = np.nansum(d ** 3, axis=-1) / (6 * np.nansum(d ** 2, axis=-1) ** 1.5)
        a = np.where(np.isfinite(a), a, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        shifted = z0[..., None] + (z0[..., None] + z) / (1 - a[..., None] * (z0[..., None] + z))
    return _quantiles(x, ndtr(shifted))


def _quantiles(x: np.ndarray, levels: np.ndarray):
    """Linear-interpolation quantiles (as numpy's default) of the finite values of each row of
    ``x`` (samples on the last axis) at that row's two ``levels``."""
    xs = np.sort(np.where(np.isfinite(x), x, np.inf), axis=-1)
    m = np.isfinite(xs).sum(axis=-1)
    out = []
    for j in range(2):
        with np.errstate(invalid="ignore"):
            h = np.clip(levels[..., j], 0.0, 1.0) * (m - 1)
        h = np.where(np.isfinite(h), h, 0.0)
        f = np.floor(h).astype(np.intp)
        c = np.minimum(f + 1, np.maximum(m - 1, 0))
        lo_v = np.take_along_axis(xs, f[..., None], axis=-1)[..., 0]
        hi_v = np.take_along_axis(xs, c[..., None], axis=-1)[..., 0]
        with np.errstate(invalid="ignore"):
            q = lo_v + (h - f) * (hi_v - lo_v)
        out.append(np.where(m > 0, np.where(hi_v == lo_v, lo_v, q), np.nan))
    return out[0], out[1]


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
