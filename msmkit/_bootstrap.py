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
from .estimate import CountPattern, estimate_transition_matrix
from .spectral import FlowSpectrum, eigen_decomposition, flow_eigenvalues, implied_timescales

#: with fewer runs than this, the bootstrap resamples contiguous blocks instead of whole runs
MIN_RUNS_FOR_RUN_BOOTSTRAP = 5
#: target number of resampling units when blocks are used
BLOCK_UNITS = 20
#: relative accuracy of a bootstrap sample's shift-inverted eigenvalues (see
#: FlowSpectrum.eigenvalues): its timescales to about 1e-10 relative, far inside the spread of
#: the samples (percent) and the 1e-8 checked against a dense solve in tests/test_lagscan.py
EIGEN_TOL = 1e-10


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


#: below this many crossings of the slowest process intervals rest on few independent events and
#: the posterior's 95 % intervals were measured to cover less than stated (bench/bench_coverage.py
#: --study kinetics, bench/bench_posterior_coverage.py)
FEW_CROSSINGS = 100


def few_crossings_note(where: str, crossings: float, uncertainty: str) -> list[str]:
    """The caution for intervals over data that cross the slowest process fewer than
    :data:`FEW_CROSSINGS` times ([] when there are enough crossings).

    The figures quoted are measured for nominal 95 % intervals with 200 samples, 10 runs of
    4-state chains with 33 and 54 crossings (200 and 400 replicates; bench/bench_coverage.py
    --study kinetics --chain four, bench/bench_posterior_coverage.py --chain pairs)."""
    if not crossings < FEW_CROSSINGS:
        return []
    measured = {"bootstrap": "bootstrap intervals covered 0.93-0.96 of the truth, posterior ones "
                             "(uncertainty='bayes') 0.915-0.97",
                "bayes": "posterior intervals (uncertainty='bayes') covered 0.915-0.97 of the truth (passage "
                         "times and rates the least), bootstrap ones 0.93-0.96"}[uncertainty]
    return [f"{where} the data cross the slowest process only {crossings:.3g} times, fewer than {FEW_CROSSINGS}: "
            f"every interval rests on so few independent events (measured on test chains with 10 runs and "
            f"33-54 crossings, nominal 95%: {measured}; real data with unsampled states or slower "
            f"processes fare worse). More or longer runs help."]


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


class SampleTimescales:
    """Implied timescales of resampled count matrices on one model's states: the per-lag kernel
    of the bootstrap (and of anything else that makes many count matrices on that pattern).

    A matrix is given by the values on the pattern of a :class:`StateCounts` (rows of
    :meth:`StateCounts.values`). A reversible sample is fitted on the largest connected set
    (all the model's states, whose pattern is prepared once per lag, or the states it connects,
    prepared for that sample) by :meth:`msmkit.estimate.CountPattern.reversible_fit` -- the
    maximum-likelihood estimate, warm-started from the model's stationary vector, with sparse
    Newton steps -- and the eigenvalues come from :class:`msmkit.spectral.FlowSpectrum`,
    shift-inverted about a point just above 1 chosen from the model's spectrum and started from
    the model's slow modes, to the relative accuracy :data:`EIGEN_TOL` (timescales to about
    1e-10 relative). A non-reversible estimate, or a fit that did not converge in
    ``max_steps``, takes the general route: :func:`fit_sample`
    (:func:`~msmkit.estimate.estimate_transition_matrix`) and a dense eigen-solve. Both give the
    same maximum-likelihood estimate to the tolerance of the fit
    (``tests/test_lagscan.py``). The object is small and picklable (it is sent to dask workers).

    Parameters
    ----------
    on_states : StateCounts
    model : MarkovModel
        The full-data model at this lag (with the states of ``on_states``).
    k : int
        Timescales per sample (slowest first).
    max_steps : int
        Newton steps before a sample is handed to the general route.
    """

    def __init__(self, on_states: "StateCounts", model, k: int, max_steps: int = 50):
        row = np.asarray(model.transition_counts.sum(axis=1)).ravel()
        self.pattern = CountPattern(on_states._rows_of, on_states._cols_of, on_states.n_states,
                                    anchor=int(np.argmax(row)))
        self.spectrum = FlowSpectrum(self.pattern.sym_i, self.pattern.sym_j, on_states.n_states)
        self.equilibrium = np.asarray(model.equilibrium, dtype=float)
        self.reversible, self.lag, self.dt, self.k = bool(model.reversible), int(model.lag), float(model.dt), int(k)
        self.max_steps = int(max_steps)
        n_eig = min(self.k + 1, on_states.n_states)
        if self.reversible:
            w = np.real(model.spectrum(n_eig))
            # just above 1 by a hundredth of the gap 1 - lambda_k of the full data: the slow
            # eigenvalues of a sample are then the best separated ones after the inversion
            self.shift = 1.0 + max(1e-2 * (1.0 - float(w[-1])), 1e-10)
            self.start = (np.real(model.modes(n_eig)) * np.sqrt(self.equilibrium)[:, None]).sum(axis=1)
        else:
            self.shift, self.start = None, None

    def __call__(self, values) -> np.ndarray:
        """Timescales (slowest first, in the model's time unit) of one matrix given by the values
        on the pattern; NaN-free, shorter than ``k`` when the sample has fewer processes."""
        values = np.asarray(values, dtype=np.float64)
        n_eig = min(self.k + 1, self.pattern.n)
        if self.reversible:
            route = self._fast_route(values)
            if route is None:
                return np.empty(0)
            pattern, spectrum, vals, init, start = route
            fit = pattern.reversible_fit(vals, init, max_steps=self.max_steps)
            if fit.converged:
                w = spectrum.eigenvalues(fit.flows, min(n_eig, pattern.n), shift=self.shift, start=start,
                                         tol=EIGEN_TOL)
                return implied_timescales(w[1:], self.lag, self.dt)
        fit = fit_sample(self.pattern.matrix(values), reversible=self.reversible, initial=self.equilibrium)
        if fit is None:
            return np.empty(0)
        _, T, pi = fit
        n_eig = min(n_eig, T.shape[0])
        if self.reversible:
            X = pi[:, None] * T
            w = flow_eigenvalues(sp.csr_matrix(0.5 * (X + X.T)), n_eig)
        else:
            w = eigen_decomposition(T, pi, k=n_eig, reversible=False)
        return implied_timescales(w[1:], self.lag, self.dt)

    def _fast_route(self, values):
        """(pattern, spectrum, values, warm start, start vector) of the sample on the largest
        connected set: the prepared ones when it connects all the model's states, else made
        for the states it connects (a sample of few runs often leaves some states out); None
        when fewer than two states remain."""
        p = self.pattern
        if p.is_connected(values):
            return p, self.spectrum, values, self.equilibrium, self.start
        keep = kept_states(p.matrix(values))
        if keep.size < 2:
            return None
        pos = np.full(p.n, -1, dtype=np.intp)
        pos[keep] = np.arange(keep.size)
        inside = (pos[p.rows] >= 0) & (pos[p.cols] >= 0)
        rows, cols, vals = pos[p.rows[inside]], pos[p.cols[inside]], values[inside]
        anchor = int(np.argmax(np.bincount(rows, weights=vals, minlength=keep.size)))
        sub = CountPattern(rows, cols, keep.size, anchor=anchor)
        return sub, FlowSpectrum(sub.sym_i, sub.sym_j, keep.size), vals, self.equilibrium[keep], self.start[keep]

    def batch(self, values) -> np.ndarray:
        """Timescales of many matrices (one row of values each), (n, k), NaN where a sample has
        fewer processes."""
        values = np.atleast_2d(values)
        out = np.full((values.shape[0], self.k), np.nan)
        for b in range(values.shape[0]):
            got = self(values[b])
            out[b, :got.size] = got
        return out


def sample_timescales_batch(values, kernel: SampleTimescales) -> np.ndarray:
    """Kernel of the bootstrap on a cluster: :meth:`SampleTimescales.batch` of a batch of rows."""
    return kernel.batch(values)


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
        ``percentile``: the sample quantiles at (1 -+ confidence) / 2 (the (m + 1) p rule of
        :func:`_quantiles`); ``bc``: those levels
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
    # the Student t quantile from scipy.special (what scipy.stats.t.ppf evaluates), sparing the
    # import of scipy.stats: most of a second, the time of several model builds
    from scipy.special import ndtr, ndtri, stdtrit
    x = np.moveaxis(np.asarray(samples, dtype=float), axis, -1)
    est = np.asarray(estimate, dtype=float)[..., None]
    if method not in ("percentile", "bc", "bca"):
        raise ValueError(f"unknown interval method {method!r}")
    upper_z = ndtri((1 + confidence) / 2)
    if n_units is not None and n_units > 1:
        upper_z = np.sqrt(n_units / (n_units - 1)) * stdtrit(n_units - 1, (1 + confidence) / 2)
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
    """Quantiles of the finite values of each row of ``x`` (samples on the last axis) at that
    row's two ``levels``, by the (m + 1) p rule: the p-quantile of m samples is their (m + 1) p-th
    smallest, interpolated linearly between order statistics and held at the extremes (numpy's
    ``method="weibull"``).

    Of m draws from a continuous law, the k-th smallest lies below a fresh draw with probability
    k / (m + 1), so the levels (m + 1) p and (m + 1)(1 - p) hold 1 - 2p of the law on average; the
    default rule (m - 1) p + 1 puts the ends about one sample inside that (Davison & Hinkley,
    Bootstrap Methods and their Application (1997), sec. 5.2, from memory): with 200 samples a
    95 % interval holds 94 %.
    """
    xs = np.sort(np.where(np.isfinite(x), x, np.inf), axis=-1)
    m = np.isfinite(xs).sum(axis=-1)
    out = []
    for j in range(2):
        with np.errstate(invalid="ignore"):
            h = np.clip(np.clip(levels[..., j], 0.0, 1.0) * (m + 1) - 1, 0, np.maximum(m - 1, 0))
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
    """Equal-tailed interval of ``samples`` at ``confidence`` by the (m + 1) p rule of
    :func:`_quantiles`, ignoring NaN samples (all-NaN -> NaN)."""
    x = np.moveaxis(np.asarray(samples, dtype=float), axis, -1)
    levels = np.broadcast_to(np.array([(1 - confidence) / 2, (1 + confidence) / 2]), x.shape[:-1] + (2,))
    return _quantiles(x, levels)


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
