"""Bayesian posterior of reversible transition matrices, sampled on the symmetric flux matrix.

A reversible transition matrix T with equilibrium pi is the same thing as a symmetric,
non-negative flux matrix X with X_ij = pi_i T_ij (so T_ij = X_ij / x_i, x_i = sum_k X_ik and
pi_i = x_i / sum_ij X_ij). The sampler walks on the unique elements of X on the sparsity pattern
of C + C^T (a pair is free when it was counted in either direction; every other element stays
exactly zero) with three kinds of moves:

* a diagonal element exactly: given the rest of the row, T_ii = x_ii / x_i is Beta-distributed;
* an off-diagonal pair by a Metropolis-Hastings random walk in log x_ij, whose step is set from
  the curvature of the conditional at the starting point;
* collective Metropolis-Hastings moves X -> D X D, D = diag(exp(s psi)), along the slowest
  eigenvectors psi of the start: they shift population between slowly exchanging sets of states, which one-element
  moves do only by a slow diffusion (on a two-set four-state chain the autocorrelation time of a
  population fell from about 100 sweeps to about 4 with them).

Pairs that share no state are updated together (the pattern is split into matchings), so a sweep
costs a few vectorised numpy operations instead of one Python step per element.

The posterior
-------------
The likelihood of counts C is prod_ij T_ij^C_ij (Noe 2008; Trendelkamp-Schroer et al.
2015, Sec. II). It depends on X only through the direction of X (T is unchanged when X is scaled), so
the posterior is a distribution over rays of X. We take it to be

    p(X | C) dX  ∝  prod_{ij in E} T_ij^(C_ij + b)  *  prod_{i<j in E} x_ij  *  prod_i x_i^(-k_i)  dX,

with E the pattern, k_i the number of pattern entries in row i and b = ``prior_count`` added to
every pattern entry (both directions of a counted pair). The middle factors are a reference
measure of degree -dim(X), which makes the density the same on every slice of the cone (it is
then a proper distribution of directions), and for two states they turn dX into the plain
Lebesgue measure dT_00 dT_11: the posterior of a two-state chain is then exactly
T_00 ~ Beta(C_00 + b + 1, C_01 + b + 1) and T_11 ~ Beta(C_11 + b + 1, C_10 + b + 1),
independently (b = 0: uniform prior on each row; b -> -1: posterior mean of each row -> the
maximum-likelihood value).

Why the moves are valid although the density of unnormalised X cannot be normalized: in log
coordinates y = log x the density f(X) prod x (f the density above) does not change along
(1, ..., 1) (the density has degree 0), so it is a flat density of the scale times the posterior of the
direction. Every move is an exact conditional draw or a Metropolis-Hastings step with a
symmetric proposal along a line in y, and what it does to the direction depends only on the
direction: each move therefore keeps the posterior of the direction. The scale is reset after
every sweep (T does not depend on it).

References
----------
Noe, J. Chem. Phys. 128, 244103 (2008): Markov chain Monte Carlo over reversible transition
matrices, with the likelihood above.
Trendelkamp-Schroer, Wu, Paul & Noe, J. Chem. Phys. 143, 174101 (2015): Gibbs sampling of the
symmetric flux matrix element by element, conditional densities of the form
x^e / ((x + a)^p (x + b)^q).
"""
from __future__ import annotations

import numbers

import numpy as np
import scipy.sparse as sp

from .defaults import UNCERTAINTIES
from .errors import InputError
from .estimate import as_count_matrix, check_connected, estimate_transition_matrix
from .spectral import eigen_decomposition, equilibrium_distribution, obeys_detailed_balance

__all__ = ["iter_reversible_posterior", "sample_reversible_posterior"]

#: how the intervals of lag scans and Chapman–Kolmogorov tests are obtained
#: prior count of the interval posteriors (posterior_at_lag): the likelihood alone on the counted
#: pattern. Every prior count adds (b + 1) to each counted pair; at long lags the pattern holds many
#: rarely counted pairs across barriers, and b = -0.5 made the slow processes fast (measured on the
#: 49-state lattice walk of bench_coverage.py at lag 4: posterior median 62 steps against a
#: maximum-likelihood 111 and a truth of 118; with b = -1: 114). At few crossings (33, lag 1)
#: -0.5 put the truth above the interval 8.5 % of the time and below it 1 %; -1 balances the misses.
INTERVAL_PRIOR_COUNT = -1.0

#: off-diagonal random-walk step in log x_ij, in units of the conditional's standard deviation
#: (about 2.4 is the usual optimum of a one-dimensional Gaussian random walk, common practice)
STEP_FACTOR = 2.4
#: largest random-walk step in log x_ij (a flat conditional would otherwise give huge steps)
MAX_STEP = 3.0
#: slowest eigenvectors of the start that give a collective move each (see _collective_directions)
N_COLLECTIVE = 10
#: largest array of samples sample_reversible_posterior builds (bytes); beyond it, iterate
MAX_ARRAY_BYTES = 2 ** 31


class _FluxChain:
    """State of the sampler: unique flux elements x on the pattern, row sums xr, and the
    constants of their conditional densities."""

    def __init__(self, C: sp.csr_matrix, prior_count: float, T0: np.ndarray, rng: np.random.Generator):
        n = C.shape[0]
        self.n, self.rng = n, rng
        S = sp.triu(C + C.T).tocoo()  # unique pairs i <= j counted in either direction
        self.i, self.j = S.row.astype(np.intp), S.col.astype(np.intp)
        diag = self.i == self.j
        k = np.bincount(self.i, minlength=n) + np.bincount(self.j[~diag], minlength=n)  # pattern entries per row
        c_row = np.asarray(C.sum(axis=1)).ravel()
        b = float(prior_count)
        # exponent of x_ij: C_ij + C_ji + 2b + 1 off the diagonal, C_ii + b on it; of x_i: -(c_i + (b+1) k_i)
        self.e = np.where(diag, 0.5 * S.data + b, S.data + 2 * b + 1)
        self.r = c_row + (b + 1.0) * k
        pi0 = equilibrium_distribution(T0)
        self.x = pi0[self.i] * T0[self.i, self.j]
        self._resum()
        self.diag_idx = np.flatnonzero(diag & (k[self.i] > 1))  # a one-entry row (one state) has nothing to update
        off = np.flatnonzero(~diag)
        self.classes = _matchings(self.i[off], self.j[off], off)
        # conditional curvature of log x_ij at the start: r_i t_i (1 - t_i) + r_j t_j (1 - t_j), t = x_ij / x_i
        ti, tj = self.x / self.xr[self.i], self.x / self.xr[self.j]
        curv = self.r[self.i] * ti * (1 - ti) + self.r[self.j] * tj * (1 - tj)
        with np.errstate(divide="ignore"):
            self.step = np.minimum(STEP_FACTOR / np.sqrt(curv), MAX_STEP)
        self.directions, self.direction_steps = self._collective_directions(T0, pi0)
        self.n_proposed = 0
        self.n_accepted = 0

    def _row_sums(self, x: np.ndarray) -> np.ndarray:
        off = self.i != self.j
        return np.bincount(self.i, weights=x, minlength=self.n) + np.bincount(self.j[off], weights=x[off],
                                                                              minlength=self.n)

    def _collective_directions(self, T0: np.ndarray, pi0: np.ndarray):
        """Directions v_ij = psi_i + psi_j in log x for the slowest right eigenvectors psi of the
        start, and their random-walk steps.

        Moving along one of them (X -> D X D with D = diag(exp(s psi))) shifts population between
        the sets that the slow process separates while keeping the flux across them balanced:
        the direction in which one-element moves diffuse slowly on metastable data. The step is
        STEP_FACTOR over the square root of the curvature of the log density along v at the start,
        sum_i r_i Var_{j ~ T_i}(v_ij)."""
        k = min(self.n, N_COLLECTIVE + 1)
        if k < 2:
            return np.empty((0, self.x.size)), np.empty(0)
        _, psi = eigen_decomposition(T0, pi0, k=k, reversible=True, vectors=True)
        V = (psi[self.i, 1:] + psi[self.j, 1:]).T  # (k - 1, pairs); column 0 is constant: a pure scale move
        mean = np.stack([self._row_sums(self.x * v) for v in V]) / self.xr
        second = np.stack([self._row_sums(self.x * v * v) for v in V]) / self.xr
        curv = (second - mean ** 2) @ self.r
        keep = curv > 1e-12 * np.abs(second @ self.r).max(initial=0.0)
        return V[keep], STEP_FACTOR / np.sqrt(curv[keep])

    def _resum(self):
        xr = self._row_sums(self.x)
        total = xr.sum()
        self.x /= total
        self.xr = xr / total

    def sweep(self):
        """Update every element once (diagonal exactly, off-diagonal pairs by Metropolis-Hastings),
        then take one collective step along each slow direction."""
        rng = self.rng
        d = self.diag_idx
        if d.size:
            s = self.i[d]
            rest = self.xr[s] - self.x[d]
            # x^e / (x + rest)^r  with  z = x / (x + rest)  ->  z ~ Beta(e + 1, r - e - 1)
            z = rng.beta(self.e[d] + 1.0, self.r[s] - self.e[d] - 1.0)
            new = rest * z / (1.0 - z)
            ok = z < 1.0  # z == 1 in floating point: keep the old value
            new = np.where(ok, new, self.x[d])
            self.xr[s] += new - self.x[d]
            self.x[d] = new
        for idx in self.classes:
            a, c = self.i[idx], self.j[idx]
            x = self.x[idx]
            rest_a, rest_c = self.xr[a] - x, self.xr[c] - x
            y_step = self.step[idx] * rng.standard_normal(idx.size)
            x_new = x * np.exp(y_step)
            # log density of log x: (e + 1) log x - r_a log(x + rest_a) - r_c log(x + rest_c)
            log_ratio = ((self.e[idx] + 1.0) * y_step
                         - self.r[a] * (np.log(x_new + rest_a) - np.log(x + rest_a))
                         - self.r[c] * (np.log(x_new + rest_c) - np.log(x + rest_c)))
            accept = np.log(rng.random(idx.size)) < log_ratio
            accept &= np.isfinite(x_new) & (x_new > 0)
            dx = np.where(accept, x_new - x, 0.0)
            self.x[idx] = x + dx
            self.xr[a] += dx
            self.xr[c] += dx
            self.n_proposed += idx.size
            self.n_accepted += int(accept.sum())
        for v, step in zip(self.directions, self.direction_steps):
            ds = step * rng.standard_normal()
            x_new = self.x * np.exp(ds * v)
            xr_new = self._row_sums(x_new)
            log_ratio = ds * np.dot(self.e + 1.0, v) - np.dot(self.r, np.log(xr_new) - np.log(self.xr))
            self.n_proposed += 1
            if np.log(rng.random()) < log_ratio and np.all(np.isfinite(x_new)):
                self.x, self.xr = x_new, xr_new
                self.n_accepted += 1
        self._resum()  # fixes the scale (T does not depend on it) and clears rounding drift in xr

    def matrix(self):
        """The current transition matrix and the equilibrium distribution."""
        X = np.zeros((self.n, self.n))
        X[self.i, self.j] = self.x
        X[self.j, self.i] = self.x
        xr = X.sum(axis=1)
        return X / xr[:, None], xr / xr.sum()


def _matchings(i: np.ndarray, j: np.ndarray, labels: np.ndarray) -> list[np.ndarray]:
    """Split the pairs (i, j) into groups in which no state occurs twice (greedy edge coloring).

    Returns a list of arrays of ``labels`` (the positions of the pairs in the flux vector)."""
    used: list[set] = []
    groups: list[list] = []
    for a, c, lab in zip(i.tolist(), j.tolist(), labels.tolist()):
        for g, seen in enumerate(used):
            if a not in seen and c not in seen:
                seen.update((a, c))
                groups[g].append(lab)
                break
        else:
            used.append({a, c})
            groups.append([lab])
    return [np.asarray(g, dtype=np.intp) for g in groups]


def _check_int(name: str, value, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < minimum:
        raise InputError(f"{name} must be an integer >= {minimum}, got {value!r}")
    return int(value)


def _initial_matrix(C: sp.csr_matrix, initial) -> np.ndarray:
    if initial is None:
        return estimate_transition_matrix(C, reversible=True, warn=False)
    T0 = np.asarray(initial, dtype=float)
    n = C.shape[0]
    if T0.shape != (n, n) or not np.all(np.isfinite(T0)) or np.any(T0 < 0):
        raise InputError(f"initial must be a non-negative, finite transition matrix of shape ({n}, {n}), "
                         f"got shape {T0.shape}")
    if not np.allclose(T0.sum(axis=1), 1.0, rtol=0, atol=1e-10):
        raise InputError("initial must be row-stochastic (every row summing to 1)")
    S = (C + C.T).tocoo()
    if np.any(T0[S.row, S.col] <= 0):
        raise InputError("initial must be positive wherever a transition was counted in either direction; "
                         "leave initial=None to start from the reversible maximum-likelihood estimate")
    if not obeys_detailed_balance(T0, equilibrium_distribution(T0), rtol=1e-8):
        raise InputError("initial must obey detailed balance (pi_i T_ij = pi_j T_ji); "
                         "use estimate_transition_matrix(counts, reversible=True)")
    return T0


def _prepare(counts, burn_in, thin, prior_count, initial, seed):
    C = as_count_matrix(counts)
    if C.nnz == 0:
        raise InputError("counts hold no transitions")
    check_connected(C)
    burn_in = _check_int("burn_in", burn_in, 0)
    thin = _check_int("thin", thin, 1)
    if not isinstance(prior_count, numbers.Real) or isinstance(prior_count, bool) \
            or not np.isfinite(prior_count) or prior_count < -1:
        raise InputError(f"prior_count must be a number >= -1 (default -0.5), got {prior_count!r}; "
                         f"below -1 the posterior of a pair counted once cannot be normalized")
    chain = _FluxChain(C, prior_count, _initial_matrix(C, initial), np.random.default_rng(seed))
    return chain, burn_in, thin


def iter_reversible_posterior(counts, n_samples, *, seed=None, burn_in=100, thin=5, prior_count=-0.5,
                              initial=None):
    """Yield posterior samples of reversible transition matrices one at a time.

    Same sampler and arguments as :func:`sample_reversible_posterior`; holds one matrix in memory
    at a time (for many states or many samples). Yields ``(T, pi)`` pairs: the transition matrix
    (probability per lag) and the equilibrium distribution of T.

    Inputs are checked when the function is called, before the first sample is drawn.
    """
    n_samples = _check_int("n_samples", n_samples, 1)
    chain, burn_in, thin = _prepare(counts, burn_in, thin, prior_count, initial, seed)
    return _draw(chain, n_samples, burn_in, thin)


def check_uncertainty(uncertainty, reversible: bool = True) -> str:
    """The uncertainty method ("bootstrap" or "bayes"), or InputError naming the choices.

    "bayes" samples the posterior of reversible matrices only: with ``reversible=False`` it is
    refused, naming both arguments."""
    if not isinstance(uncertainty, str) or uncertainty not in UNCERTAINTIES:
        raise InputError(f"uncertainty must be one of {', '.join(map(repr, UNCERTAINTIES))}, "
                         f"but got {uncertainty!r}")
    if uncertainty == "bayes" and not reversible:
        raise InputError("uncertainty='bayes' samples the posterior of reversible transition matrices and needs "
                         "reversible=True (a reversible model); with reversible=False use "
                         "uncertainty='bootstrap'")
    return uncertainty


def effective_counts(counts, lag: int, every_frame: bool) -> sp.csr_matrix:
    """Counts as independent transitions for the posterior: sliding-window counts
    (``every_frame=True``) divided by the lag.

    Windows that start less than a lag apart overlap, so a run of N frames holds about
    N / lag independent transitions at lag ``lag``, not N - lag; a posterior of the raw sliding
    counts would be about sqrt(lag) times too narrow (common practice)."""
    C = as_count_matrix(counts)
    return C / float(lag) if every_frame and lag > 1 else C


def posterior_at_lag(counts, n_samples: int, *, lag: int, every_frame: bool, seed=None, initial=None,
                     prior_count: float = INTERVAL_PRIOR_COUNT):
    """Posterior samples ``(T, pi)`` for the counts of one lag, the sliding windows counted as
    :func:`effective_counts`, with prior count :data:`INTERVAL_PRIOR_COUNT` (-1) unless given; ``initial`` (the reversible estimate of the same counts, which
    does not depend on that scaling) saves the estimate the sampler would otherwise start from.
    Used by every ``uncertainty="bayes"`` interval: lag scans, Chapman–Kolmogorov tests and
    :func:`msmkit.sample_models`."""
    C = effective_counts(counts, lag, every_frame)
    b = prior_count
    try:
        return iter_reversible_posterior(C, n_samples, seed=seed, initial=initial, prior_count=b)
    except InputError:
        if initial is None:
            raise
        # an estimate converged only to its own tolerance may fail the strict detailed-balance check
        return iter_reversible_posterior(C, n_samples, seed=seed, prior_count=b)


def _draw(chain: _FluxChain, n_samples: int, burn_in: int, thin: int):
    for _ in range(burn_in):
        chain.sweep()
    for _ in range(n_samples):
        for _ in range(thin):
            chain.sweep()
        yield chain.matrix()


def sample_reversible_posterior(counts, n_samples, *, seed=None, burn_in=100, thin=5, prior_count=-0.5,
                                initial=None, return_equilibrium=False, progress=False):
    """Draw reversible transition matrices from their Bayesian posterior given transition counts.

    Markov chain Monte Carlo on the symmetric flux matrix X_ij = pi_i T_ij (see the module notes
    for the exact posterior), started from the reversible maximum-likelihood estimate. Every
    sample obeys detailed balance exactly (it is built from a symmetric X) and keeps the sparsity
    of the data: T_ij > 0 only where i -> j or j -> i was counted.

    Parameters
    ----------
    counts : scipy.sparse matrix or ndarray, shape (n, n)
        Transition counts C[i, j] at one lag; square, non-negative and strongly connected (restrict
        them with ``kept_states`` first). Counts from sliding windows (``every_frame=True``) at a
        lag above 1 are not independent transitions; the posterior is then too narrow.
    n_samples : int
        Number of matrices returned (>= 1).
    seed : int or numpy.random.Generator, optional
        Seed of the random stream; the same seed gives the same samples.
    burn_in : int, default 100
        Sweeps discarded before the first sample (one sweep updates every element of X once). The
        start is already at the posterior's mode region, so a short burn-in suffices.
    thin : int, default 5
        Sweeps between consecutive samples; raise it when the samples are strongly correlated
        (many states, very slow processes).
    prior_count : float, default -0.5
        Prior count b added to every counted pair in both directions; must be >= -1. For two
        states each row is then Beta(C_ii + b + 1, C_ij + b + 1): the default -0.5 is Jeffreys'
        prior of every such row, 0 a uniform prior, -1 the likelihood alone on the counted
        pattern (proper for strongly connected counts: every row then has counts to other
        states; the posterior mean of a two-state row is the maximum-likelihood value). Larger
        values pull the slow rates up when few crossings were counted, and the more so the more
        rarely counted pairs the pattern holds (long lags): the intervals of lag scans and
        Chapman–Kolmogorov tests use -1 (``INTERVAL_PRIOR_COUNT``). Measured on a four-state
        chain with about 33 crossings of the slow process, 200 replicates
        (bench/bench_posterior_coverage.py): 95 % intervals of the slowest timescale covered
        0.905 with -0.5 (truth above the interval 8.5 %, below 1 %), 0.92 with -0.95 (3.5 % /
        4.5 %); populations 0.89-0.92 with any of them (interval ends then by the linear quantile
        rule; with the (m + 1) p ends now used and -1: timescale 0.970, populations 0.949). With
        about 130 crossings coverage was 0.94-0.95.
    initial : ndarray, shape (n, n), optional
        Reversible transition matrix to start from, positive on every counted pair; default: the
        reversible maximum-likelihood estimate.
    return_equilibrium : bool, default False
        Also return the equilibrium distribution of every sample.
    progress : bool, default False
        Show a progress bar (tqdm.auto).

    Returns
    -------
    samples : ndarray, shape (n_samples, n, n)
        Row-stochastic transition matrices (probability per lag).
    equilibria : ndarray, shape (n_samples, n), only with ``return_equilibrium=True``
        Their equilibrium distributions (state populations).

    See Also
    --------
    iter_reversible_posterior : the same samples one at a time, without storing them all.
    """
    from ._bootstrap import progress_bar
    n = as_count_matrix(counts).shape[0]
    n_samples = _check_int("n_samples", n_samples, 1)
    if n_samples * n * (n + 1) * 8 > MAX_ARRAY_BYTES:
        raise InputError(f"n_samples={n_samples} matrices of {n} states need "
                         f"{n_samples * n * (n + 1) * 8 / 2 ** 30:.1f} GiB; draw fewer, or use "
                         f"iter_reversible_posterior(), which holds one matrix at a time")
    stream = iter_reversible_posterior(counts, n_samples, seed=seed, burn_in=burn_in, thin=thin,
                                       prior_count=prior_count, initial=initial)
    Ts = np.empty((n_samples, n, n))
    pis = np.empty((n_samples, n))
    with progress_bar(n_samples, progress, "posterior") as bar:
        for s, (T, pi) in enumerate(stream):
            Ts[s], pis[s] = T, pi
            bar.update(1)
    return (Ts, pis) if return_equilibrium else Ts
