"""Transition-matrix estimators: maximum likelihood, non-reversible and reversible.

References
----------
Bowman, Beauchamp, Boxer & Pande, J. Chem. Phys. 131, 124101 (2009): reversible MLE by
self-consistent iteration.
Prinz et al., J. Chem. Phys. 134, 174105 (2011), Sec. IV: the same iteration written on X = diag(pi) T.
Trendelkamp-Schroer, Wu, Paul & Noe, J. Chem. Phys. 143, 174101 (2015): the iteration on the
stationary vector alone.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.linalg import lapack
from scipy.sparse import csgraph

from ._checks import check_bool, check_int, check_tolerance
from .errors import DiagnosticWarning, InputError
from .spectral import BAND_SHARE, banded_cholesky, banded_cholesky_solve, conjugate_gradients

#: a factorization of the Jacobian is reused while each step shrinks the residual at least this much
REUSE = 0.05
#: from this many free states on, Newton systems are solved by conjugate gradients first (in
#: CountPattern only those whose factorization would fill in, i.e. no narrow band): at 3000
#: microstates of the demo the sparse LU took 0.3-2 s per step, 20-50 gradient iterations
#: about 10 ms
ITERATIVE_STATES = 1000


@dataclass(frozen=True)
class _IterativeSystem:
    """A Newton system in symmetric form for conjugate gradients (see CountPattern._factorise):
    M z = pi F on the free states, renumbered, with z = (c / pi) dy, and the Jacobian entries
    for the direct fallback."""
    matrix: sp.csr_matrix
    pi_free: np.ndarray
    ratio_free: np.ndarray
    jacobian: np.ndarray

__all__ = ["EstimationInfo", "estimate_transition_matrix", "log_likelihood"]


@dataclass(frozen=True)
class EstimationInfo:
    """How an estimate was obtained.

    Attributes
    ----------
    method : str
        "row-normalized" or "reversible-mle".
    iterations : int
        Evaluations of the fixed-point map (0 for the non-reversible estimate).
    converged : bool
    log_likelihood : float
        sum_ij C_ij log T_ij of the returned matrix (natural log).
    equilibrium : ndarray
    """
    method: str
    iterations: int
    converged: bool
    log_likelihood: float
    equilibrium: np.ndarray


def as_count_matrix(counts) -> sp.csr_matrix:
    if sp.issparse(counts):
        C = sp.csr_matrix(counts, dtype=np.float64)
    else:
        try:
            arr = np.asarray(counts)
        except ValueError:  # ragged nested lists
            raise InputError("counts must be a square matrix, but the rows have different lengths") from None
        if arr.dtype.kind not in "iuf":
            raise InputError(f"counts must be a numeric matrix, but has dtype {arr.dtype}")
        if arr.ndim != 2:
            raise InputError(f"counts must be a square matrix, but has shape {arr.shape}")
        C = sp.csr_matrix(arr.astype(np.float64))
    if C.ndim != 2 or C.shape[0] != C.shape[1]:
        raise InputError(f"counts must be a square matrix, but has shape {C.shape}")
    if C.shape[0] == 0:
        raise InputError("counts is an empty matrix")
    if C.nnz and (not np.all(np.isfinite(C.data)) or C.data.min() < 0):
        raise InputError("counts must be finite and non-negative")
    C.eliminate_zeros()
    return C


def log_likelihood(counts, propagator) -> float:
    """Log-likelihood sum_ij C_ij ln T_ij of a transition matrix given counts (natural log).

    Returns -inf when a counted transition has probability zero.
    """
    C = sp.coo_matrix(counts)
    T = propagator
    vals = T[C.row, C.col] if isinstance(T, np.ndarray) else np.asarray(T[C.row, C.col]).ravel()
    with np.errstate(divide="ignore"):
        return float(np.sum(C.data * np.log(vals)))


def check_connected(C: sp.csr_matrix) -> None:
    n_comp, comp = csgraph.connected_components(C, directed=True, connection="strong")
    if n_comp > 1:
        sizes = np.bincount(comp)
        raise InputError(
            f"counts must be strongly connected (every state reachable from every other), but they form "
            f"{n_comp} separate sets of sizes {sorted(sizes.tolist(), reverse=True)[:5]}; restrict them to "
            f"msmkit.kept_states(counts) first, or use build_model(), which does it for you")


def estimate_transition_matrix(counts, *, reversible=True, tol=1e-12, max_iter=1_000_000,
                               accelerate=True, initial=None, return_info=False, warn=True):
    """Maximum-likelihood transition matrix from a strongly connected count matrix.

    Parameters
    ----------
    counts : scipy.sparse matrix or ndarray, shape (n, n)
        Transition counts C[i, j] at one lag; must be strongly connected.
    reversible : bool, default True
        Enforce detailed balance pi_i T_ij = pi_j T_ji (reversible MLE); otherwise rows of C
        are normalized (non-reversible MLE).
    tol : float, default 1e-12
        Convergence of the reversible iteration: the largest residual of the stationarity
        equations, max_i |sum_j x_ij / pi_i - 1| (the relative change one plain step would make
        to pi_i, before normalization), below ``tol``.
    max_iter : int
        Cap on evaluations of the fixed-point map; a DiagnosticWarning is issued if reached.
    accelerate : bool, default True
        Solve the fixed-point equations of the iteration by Newton's method on log pi (sparse
        Jacobian, likelihood line search, the plain step as fallback): converges in a handful of
        steps where the plain iteration needs tens of thousands on metastable data. False gives
        the plain self-consistent iteration.
    initial : ndarray, optional
        Starting stationary vector (e.g. from a neighbouring lag or the full data).
    return_info : bool
        Also return an :class:`EstimationInfo`.
    warn : bool, default True
        Issue a DiagnosticWarning when the iteration cap is reached (``info.converged`` says so
        either way). False is for callers on worker threads, where changing the global warning
        filters is not safe.

    Returns
    -------
    T : ndarray, shape (n, n)
        Row-stochastic transition matrix (probability per lag).
    info : EstimationInfo, only with ``return_info=True``

    Notes
    -----
    The reversible estimate iterates on the stationary vector (Trendelkamp-Schroer et al. 2015)

        pi_i <- sum_j (c_ij + c_ji) / (c_i / pi_i + c_j / pi_j),   normalized,

    with c_i the row sums of C; at the fixed point x_ij = (c_ij + c_ji) / (c_i/pi_i + c_j/pi_j) is
    the symmetric flow matrix and T_ij = x_ij / sum_k x_ik. Built this way T satisfies detailed
    balance to rounding error at every iterate, converged or not.
    """
    reversible, accelerate = check_bool(reversible, "reversible"), check_bool(accelerate, "accelerate")
    tol, max_iter = check_tolerance(tol, "tol"), check_int(max_iter, "max_iter", minimum=1)
    C = as_count_matrix(counts)
    if C.nnz == 0:
        raise InputError("counts hold no transitions")
    check_connected(C)
    row = np.asarray(C.sum(axis=1)).ravel()
    if not reversible:
        T = np.asarray(sp.diags(1.0 / row) @ C.toarray())
        pi = _stationary_nonreversible(T)
        info = EstimationInfo("row-normalized", 0, True, log_likelihood(C, T), pi)
        return (T, info) if return_info else T
    T, info = _reversible_mle(C, row, tol=tol, max_iter=max_iter, accelerate=accelerate, initial=initial)
    if warn and not info.converged:
        warnings.warn(f"reversible estimate did not converge in {info.iterations} iterations (tol={tol:g}); "
                      f"the matrix obeys detailed balance but not yet the maximum-likelihood one", DiagnosticWarning,
                      stacklevel=2)
    return (T, info) if return_info else T


def _stationary_nonreversible(T: np.ndarray) -> np.ndarray:
    from .spectral import equilibrium_distribution
    return equilibrium_distribution(T)


class _SymmetricCounts:
    """C + C^T in coordinate form and the row sums of C: all the fixed point needs."""

    def __init__(self, C: sp.csr_matrix, row: np.ndarray):
        S = (C + C.T).tocoo()
        self.i, self.j, self.s = S.row, S.col, S.data
        self.c = row
        self.n = C.shape[0]
        # where each nonzero c_ij sits in the symmetric pattern, for the log-likelihood
        Cc = C.tocoo()
        keys_s = self.i.astype(np.int64) * self.n + self.j
        order = np.argsort(keys_s)
        keys_c = Cc.row.astype(np.int64) * self.n + Cc.col
        self.c_pos = order[np.searchsorted(keys_s, keys_c, sorter=order)]
        self.c_row, self.c_data = Cc.row, Cc.data
        self._upper = _upper_half(self.i, self.j)

    @classmethod
    def of_arrays(cls, i, j, s, c, c_pos, c_row, c_data, upper):
        """The same from arrays already on a symmetric pattern (no sorting): entries (i, j) with
        values s of C + C^T, row sums c, each count c_data at position c_pos of that pattern, and
        ``upper`` = ``_upper_half(i, j)``."""
        self = cls.__new__(cls)
        self.i, self.j, self.s, self.c, self.n = i, j, s, c, c.size
        self.c_pos, self.c_row, self.c_data = c_pos, c_row, c_data
        self._upper = upper
        return self

    def flows(self, pi: np.ndarray) -> np.ndarray:
        """x_ij on the pattern of C + C^T."""
        ratio = self.c / pi
        return self.s / (ratio[self.i] + ratio[self.j])

    def residual(self, pi: np.ndarray, jacobian: bool = False):
        """Stationarity equations F_i = sum_j x_ij / pi_i - 1 (zero at the MLE) and, optionally,
        their Jacobian with respect to log pi (sparse, on the pattern of C + C^T)."""
        F, g = self.residual_terms(pi, jacobian)
        if not jacobian:
            return F, None
        off = self.i != self.j
        G = sp.csr_matrix((g[off], (self.i[off], self.j[off])), shape=(self.n, self.n))
        return F, G - sp.diags(np.asarray(G.sum(axis=1)).ravel())

    def residual_terms(self, pi: np.ndarray, jacobian: bool = True):
        """F (see :meth:`residual`) and the off-diagonal Jacobian entries g_ij on the pattern
        (meaningless where i == j; the diagonal of the Jacobian is -sum_j g_ij over j != i)."""
        ratio = self.c / pi
        if not jacobian:
            # x_ij is symmetric: evaluated on the upper half of the pattern (half the work) and
            # summed into both rows
            u = self._upper
            up, iu, ju, strict = u.up, u.iu, u.ju, u.strict
            x = self.s[up] / (ratio[iu] + ratio[ju])
            x_i = np.bincount(iu, weights=x, minlength=self.n) + np.bincount(ju[strict], weights=x[strict],
                                                                           minlength=self.n)
            return x_i / pi - 1.0, None
        den = ratio[self.i] + ratio[self.j]
        w = self.s / den / pi[self.i]  # x_ij / pi_i
        F = np.bincount(self.i, weights=w, minlength=self.n) - 1.0
        # d(x_ij/pi_i)/d(log pi_j) = w_ij * (c_j/pi_j) / (c_i/pi_i + c_j/pi_j) = -d/d(log pi_i)
        return F, (w * ratio[self.j] / den if jacobian else None)

    def symmetric_jacobian(self, pi: np.ndarray):
        """The symmetric positive definite form M = diag(pi) (-J) diag(r)^-1 of the Jacobian J
        of :meth:`residual` (r = c / pi; see :meth:`CountPattern._factorise`) from the upper
        half of the pattern alone: (M_ij = -s_ij / (r_i + r_j)^2 on the entries i < j, in the
        order of ``_upper_half``; the diagonal M_ii = sum_{j != i} s_ij r_j / (r_i (r_i + r_j)^2))."""
        ratio = self.c / pi
        pos, i, j = self._upper.off_pos, self._upper.off_i, self._upper.off_j
        den = ratio[i] + ratio[j]
        q = self.s[pos] / den / den  # not den ** 2: that overflows where some pi is tiny
        diag = np.bincount(i, weights=q * ratio[j], minlength=self.n)
        diag += np.bincount(j, weights=q * ratio[i], minlength=self.n)
        return -q, diag / ratio

    def step(self, pi: np.ndarray) -> np.ndarray:
        new = np.bincount(self.i, weights=self.flows(pi), minlength=self.n)
        return new / new.sum()


class _UpperHalf(NamedTuple):
    """The entries with i <= j of a symmetric pattern: their positions ``up``, rows ``iu`` and
    columns ``ju``, which of them have i < j (``strict``), and for those alone their positions,
    rows and columns (``off_pos``, ``off_i``, ``off_j``)."""
    up: np.ndarray
    iu: np.ndarray
    ju: np.ndarray
    strict: np.ndarray
    off_pos: np.ndarray
    off_i: np.ndarray
    off_j: np.ndarray


def _upper_half(i, j) -> _UpperHalf:
    """:class:`_UpperHalf` of a symmetric pattern with entries (i, j)."""
    up = np.flatnonzero(i <= j)
    iu, ju = i[up], j[up]
    strict = np.flatnonzero(iu < ju)
    return _UpperHalf(up, iu, ju, strict, up[strict], iu[strict], ju[strict])


def _reversible_mle(C, row, *, tol, max_iter, accelerate, initial):
    S = _SymmetricCounts(C, row)
    n = C.shape[0]
    if initial is not None:
        pi = np.asarray(initial, dtype=float).copy()
        if pi.shape != (n,) or not np.all(np.isfinite(pi)) or np.any(pi <= 0):
            raise InputError(f"initial must be a positive vector of length {n}")
        pi /= pi.sum()
    else:
        pi = row / row.sum()
    evaluations = 0
    converged = False
    anchor = int(np.argmax(row))  # log pi of this state is held fixed in Newton steps
    # narrow band or wide: at 3000 states of the demo (lags 1-5) the gradients took 0.5-0.8 s
    # per estimate, the sparse LU 3-6 s
    iterative = accelerate and n - 1 >= ITERATIVE_STATES
    ll = _loglik_from_pi(S, pi)
    while evaluations < max_iter:
        residual, jac = S.residual(pi, jacobian=accelerate)
        if np.max(np.abs(residual)) < tol:
            converged = True
            break
        evaluations += 1
        if accelerate:
            new, ll_new = _newton_step(S, pi, ll, residual, jac, anchor, iterative)
            if new is not None:
                pi, ll = new, ll_new
                continue
        pi = S.step(pi)  # the plain self-consistent step: also the fallback of a failed Newton step
        ll = _loglik_from_pi(S, pi)
    T, pi_final = _matrix_from_pi(S, pi)
    info = EstimationInfo("reversible-mle", evaluations, converged, log_likelihood(C, T), pi_final)
    return T, info


def _newton_step(S, pi, ll, residual, jac, anchor, iterative=False):
    """One Newton step on the stationarity equations in log pi, with a likelihood line search;
    ``iterative``: the direction by conjugate gradients first (thousands of states).

    Returns (new pi, the log-likelihood there), or (None, None) when no step length improves the
    likelihood (the caller then takes a plain fixed-point step).
    """
    n = S.n
    free = np.arange(n) != anchor
    J = jac[free][:, free]
    if iterative:
        # conjugate gradients on the symmetric form -diag(pi) J diag(c / pi)^-1 z = pi F, z = (c / pi) dy
        # (see CountPattern._factorise); the direct solve below if they fail
        ratio = S.c[free] / pi[free]
        M = (sp.diags(-pi[free]) @ J @ sp.diags(1.0 / ratio)).tocsr()
        z = conjugate_gradients(M, pi[free] * residual[free])
        if z is not None:
            return _line_search(S, pi, ll, z / ratio, free)
    try:
        if J.nnz > 0.05 * n * n:
            dy = np.linalg.solve(J.toarray(), -residual[free])
        else:
            dy = spla.spsolve(J.tocsc(), -residual[free])
    except (np.linalg.LinAlgError, RuntimeError):
        return None, None
    return _line_search(S, pi, ll, dy, free)


def _line_search(S, pi, ll, dy, free):
    """Step ``dy`` in log pi (on the ``free`` states) shortened until the likelihood does not
    drop: (new pi, the log-likelihood there), or (None, None)."""
    n = S.n
    if not np.all(np.isfinite(dy)):
        return None, None
    y = np.log(pi)
    step = np.zeros(n)
    step[free] = dy
    t = 1.0
    while t > 1e-6:
        trial = y + t * step
        trial = np.exp(trial - trial.max())
        trial /= trial.sum()
        if np.all(trial > 1e-300):
            with np.errstate(all="ignore"):  # an overlong step may overflow; it is then rejected
                ll_trial = _loglik_from_pi(S, trial)
            if np.isfinite(ll_trial) and ll_trial >= ll - 1e-13 * abs(ll):
                return trial, ll_trial
        t *= 0.5
    return None, None


def _loglik_from_pi(S: _SymmetricCounts, pi: np.ndarray) -> float:
    """sum_ij c_ij ln T_ij with T_ij = x_ij / x_i, x the flows of ``pi``."""
    x = S.flows(pi)
    xi = np.bincount(S.i, weights=x, minlength=S.n)
    return float(np.sum(S.c_data * (np.log(x[S.c_pos]) - np.log(xi[S.c_row]))))


def _matrix_from_pi(S: _SymmetricCounts, pi: np.ndarray):
    x = S.flows(pi)
    X = sp.coo_matrix((x, (S.i, S.j)), shape=(S.n, S.n)).toarray()
    X = 0.5 * (X + X.T)  # exact symmetry against rounding in the flow formula
    xi = X.sum(axis=1)
    T = X / xi[:, None]
    return T, xi / xi.sum()


@dataclass(frozen=True)
class PatternFit:
    """A reversible estimate on a :class:`CountPattern`.

    Attributes
    ----------
    equilibrium : ndarray, shape (n,)
        Stationary vector (sums to 1).
    flows : ndarray
        Symmetric flows x_ij = pi_i T_ij on the pattern's symmetric entries
        (:attr:`CountPattern.sym_i`, :attr:`CountPattern.sym_j`), summing to 1; T_ij = x_ij / x_i.
    converged : bool
        The residual max_i |sum_j x_ij / pi_i - 1| fell below the tolerance.
    iterations : int
        Newton (or plain) steps taken.
    """
    equilibrium: np.ndarray
    flows: np.ndarray
    converged: bool
    iterations: int


class CountPattern:
    """Many count matrices among ``n`` states that share one sparsity pattern (e.g. bootstrap
    samples of one data set), with everything that depends only on the pattern done once.

    A matrix is given by the values on the pattern, ``values[e] = C[rows[e], cols[e]]`` (zeros
    allowed). The reversible estimate (:meth:`reversible_fit`) is the maximum-likelihood one of
    :func:`estimate_transition_matrix` -- the same stationarity equations, the same Newton steps
    in log pi with the likelihood line search and the same convergence test -- but the symmetric
    pattern of C + C^T, the sparse structure of the Jacobian and the CSR structure of the flow
    matrix are built once, the Jacobian is factorised by a sparse LU without pivoting search
    (it is a weighted graph Laplacian, diagonally dominant), and no dense n x n matrix is formed.

    Parameters
    ----------
    rows, cols : ndarray of int, shape (p,)
        The pattern: positions of possibly nonzero counts, no duplicates.
    n : int
        Number of states.
    anchor : int
        State whose log pi is held fixed in the Newton steps (any state with counts; the one
        with the most counts is the best conditioned choice).
    """

    def __init__(self, rows, cols, n: int, anchor: int):
        rows, cols = np.asarray(rows, dtype=np.intp), np.asarray(cols, dtype=np.intp)
        p = rows.size
        sym, where = np.unique(np.concatenate([rows * n + cols, cols * n + rows]), return_inverse=True)
        self.n, self.rows, self.cols, self.anchor = int(n), rows, cols, int(anchor)
        code = rows * n + cols
        self._csr_order = bool(np.all(code[1:] > code[:-1]))
        self.sym_i, self.sym_j = sym // n, sym % n  # sorted by row, then column: CSR order
        self._fwd, self._bwd = where[:p], where[p:]
        self.sym_indptr = np.searchsorted(self.sym_i, np.arange(n + 1)).astype(np.int32)
        self.sym_indices = self.sym_j.astype(np.int32)
        self._sym_upper = _upper_half(self.sym_i, self.sym_j)
        # Jacobian without the anchor's row and column: off-diagonal entries g_e, then the diagonal;
        # states renumbered by reverse Cuthill-McKee, so that the LU without column reordering
        # (the cheapest choice measured: the fill stays inside the narrowed band)
        off = np.flatnonzero((self.sym_i != self.sym_j) & (self.sym_i != anchor) & (self.sym_j != anchor))
        diag = np.delete(np.arange(n), anchor)
        shift = lambda k: k - (k > anchor)  # noqa: E731  (indices of the reduced system)
        m = n - 1
        graph = sp.csr_matrix((np.ones(off.size), (shift(self.sym_i[off]), shift(self.sym_j[off]))), shape=(m, m))
        self._perm = csgraph.reverse_cuthill_mckee(graph, symmetric_mode=True).astype(np.intp)
        rank = np.empty(m, dtype=np.intp)
        rank[self._perm] = np.arange(m)
        r = rank[shift(np.concatenate([self.sym_i[off], diag]))]
        c = rank[shift(np.concatenate([self.sym_j[off], diag]))]
        # source of each entry in the vector [g on the pattern (length m), the diagonal (length n)]
        src = np.concatenate([off, sym.size + diag])
        order = np.lexsort((c, r))
        self._jac_src = src[order]
        self._jac_indices = c[order].astype(np.int32)
        self._jac_indptr = np.searchsorted(r[order], np.arange(m + 1)).astype(np.int32)
        self._free = np.arange(n) != anchor
        # the states of each entry, for the symmetric form (see _factorise)
        self._jac_i = np.concatenate([self.sym_i[off], diag])[order]
        self._jac_j = np.concatenate([self.sym_j[off], diag])[order]
        # LAPACK's banded LU when the band is narrow (3-6x faster than the sparse LU measured at
        # 500-3000 states): entry (r, c) sits at row 2 band + r - c of the band storage of dgbtrf
        self._band = int(np.max(np.abs(r - c))) if r.size else 0
        if m * (3 * self._band + 1) > BAND_SHARE * max(r.size, m):
            self._band = None
        else:
            ro, co = r[order], c[order]
            self._band_pos = (2 * self._band + ro - co) * m + co
            # upper band storage ab[band + r - c, c] (r <= c) of the symmetric form, filled from
            # the entries i < j of the pattern's upper half (_SymmetricCounts.symmetric_jacobian)
            si, sj = self._sym_upper.off_i, self._sym_upper.off_j
            self._band_off = np.flatnonzero((si != anchor) & (sj != anchor))
            ri, rj = rank[shift(si[self._band_off])], rank[shift(sj[self._band_off])]
            lo, hi = np.minimum(ri, rj), np.maximum(ri, rj)
            self._band_off_pos = (self._band + lo - hi) * m + hi
            self._band_diag_pos = self._band * m + rank[shift(diag)]

    def row_sums(self, values) -> np.ndarray:
        """Row sums c_i of a matrix given by the values."""
        return np.bincount(self.rows, weights=values, minlength=self.n)

    def matrix(self, values) -> sp.csr_matrix:
        """The count matrix as CSR (duplicate-free, zeros kept out)."""
        values = np.asarray(values, dtype=float)
        nz = np.flatnonzero(values)
        if not self._csr_order:
            return sp.csr_matrix((values[nz], (self.rows[nz], self.cols[nz])), shape=(self.n, self.n))
        indptr = np.zeros(self.n + 1, dtype=np.int32)  # pattern in CSR order: no sorting needed
        np.cumsum(np.bincount(self.rows[nz], minlength=self.n), out=indptr[1:])
        return sp.csr_matrix((values[nz], self.cols[nz].astype(np.int32), indptr), shape=(self.n, self.n))

    def is_connected(self, values) -> bool:
        """Whether the states of the pattern are strongly connected by the nonzero values."""
        return csgraph.connected_components(self.matrix(values), directed=True, connection="strong")[0] == 1

    def flow_matrix(self, flows) -> sp.csr_matrix:
        """Symmetric flows on the symmetric pattern as an n x n CSR matrix (structure reused)."""
        return sp.csr_matrix((flows, self.sym_indices, self.sym_indptr), shape=(self.n, self.n))

    def _counts(self, values) -> _SymmetricCounts:
        values = np.asarray(values, dtype=np.float64)
        m = self.sym_i.size
        s = np.bincount(self._fwd, weights=values, minlength=m) + np.bincount(self._bwd, weights=values, minlength=m)
        nz = np.flatnonzero(values)
        return _SymmetricCounts.of_arrays(self.sym_i, self.sym_j, s, self.row_sums(values), self._fwd[nz],
                                          self.rows[nz], values[nz], self._sym_upper)

    def reversible_fit(self, values, initial, *, tol: float = 1e-12, max_steps: int = 100) -> PatternFit:
        """Reversible maximum-likelihood estimate of one matrix on the pattern.

        Parameters
        ----------
        values : ndarray, shape (p,)
            Counts on the pattern; the matrix they make must be strongly connected on all
            ``n`` states (check with :meth:`is_connected`).
        initial : ndarray, shape (n,)
            Positive starting stationary vector (e.g. the estimate of the full data).
        tol : float
            Convergence: max_i |sum_j x_ij / pi_i - 1| below ``tol``, as in
            :func:`estimate_transition_matrix`.
        max_steps : int
            Cap on steps; ``converged`` says whether it was enough (the caller may then fall
            back to :func:`estimate_transition_matrix`).
        """
        S = self._counts(values)
        pi = np.asarray(initial, dtype=float)
        pi = pi / pi.sum()
        F = S.residual_terms(pi, jacobian=False)[0]
        size = np.max(np.abs(F))
        converged, steps, lu, last = False, 0, None, np.inf
        while steps < max_steps:
            if size < tol:
                converged = True
                break
            steps += 1
            # the factorisation of the last Jacobian is reused while it still shrinks the residual
            # fourfold per step (near the solution the Jacobian hardly changes); else refactorised
            fresh = lu is None or not size < REUSE * last
            if fresh:
                lu = self._factorise(S, pi)
            last = size
            new = self._full_step(pi, lu, F)
            F_new = S.residual_terms(new, jacobian=False)[0] if new is not None else None
            if F_new is None or not np.max(np.abs(F_new)) < size:
                # no plain progress: the likelihood line search of the general estimator, from a
                # fresh Jacobian, and the self-consistent step as the last resort
                if not fresh:
                    lu = self._factorise(S, pi)
                new = _line_search(S, pi, _loglik_from_pi(S, pi), self._solve(lu, F), self._free)[0]
                if new is None:
                    new, lu = S.step(pi), None
                F_new = S.residual_terms(new, jacobian=False)[0]
            pi, F = new, F_new
            size = np.max(np.abs(F))
        x = S.flows(pi)
        total = x.sum()
        return PatternFit(np.bincount(self.sym_i, weights=x, minlength=self.n) / total, x / total, converged, steps)

    def _full_step(self, pi, lu, F):
        """pi after the full Newton step, or None when it cannot be taken."""
        dy = self._solve(lu, F)
        if not np.all(np.isfinite(dy)):
            return None
        y = np.log(pi)
        y[self._free] += dy
        with np.errstate(over="ignore"):
            new = np.exp(y - y.max())
        new /= new.sum()
        return new if np.all(new > 1e-300) else None

    def _factorise(self, S: _SymmetricCounts, pi):
        """Factorization of J, the Jacobian of the counts ``S`` at ``pi`` (without the anchor,
        states renumbered); None when singular.

        With r = c / pi, -M = -diag(pi) J diag(r)^-1 is symmetric (off-diagonal entries
        -s_ij / (r_i + r_j)^2) and a nonsingular M-matrix (positive diagonal scalings of -J,
        a weighted graph Laplacian without the anchor's row and column, which is one), hence
        positive definite (Horn & Johnson, Topics in Matrix Analysis, Thm. 2.5.3): in a narrow
        band it is factorised by Cholesky, a quarter of the work of the banded LU kept as the
        fallback."""
        m = self.n - 1
        ratio = S.c / pi
        if self._band is not None:
            # the symmetric form straight from the upper half of the pattern (half the work of J)
            off, diag = S.symmetric_jacobian(pi)
            ab = np.zeros((self._band + 1, m))
            ab.flat[self._band_off_pos] = off[self._band_off]
            ab.flat[self._band_diag_pos] = diag[self._free]
            # LAPACK directly, without the interpreter lock (msmkit.spectral.banded_cholesky)
            factor = banded_cholesky(ab)
            if factor is not None:
                return factor, pi[self._free], ratio[self._free]
        g = np.where(self.sym_i != self.sym_j, S.residual_terms(pi)[1], 0.0)
        data = np.concatenate([g, -np.bincount(self.sym_i, weights=g, minlength=self.n)])[self._jac_src]
        if self._band is None and m >= ITERATIVE_STATES:
            # thousands of states in a wide band: conjugate gradients on the symmetric form,
            # the sparse LU only if they fail (see _solve)
            sym = -pi[self._jac_i] * data / ratio[self._jac_j]
            return _IterativeSystem(sp.csr_matrix((sym, self._jac_indices, self._jac_indptr), shape=(m, m)),
                                    pi[self._free], ratio[self._free], data)
        if self._band is not None:
            b = self._band
            ab = np.zeros((3 * b + 1, m))
            ab.flat[self._band_pos] = data
            lu, piv, info = lapack.dgbtrf(ab, b, b)
            return None if info != 0 else (lu, piv)
        return self._sparse_lu(data)

    def _sparse_lu(self, data):
        """Sparse LU of the Jacobian with entries ``data`` (see _factorise); None when singular."""
        m = self.n - 1
        # the CSR arrays of J read as CSC are J^T: factorise J^T and solve with the transpose
        Jt = sp.csc_matrix((data, self._jac_indices, self._jac_indptr), shape=(m, m))
        try:
            # a wide band: fill-reducing ordering of the symmetric pattern
            return spla.splu(Jt, permc_spec="MMD_AT_PLUS_A", options={"SymmetricMode": True})
        except RuntimeError:
            return None

    def _solve(self, lu, F):
        """The Newton direction: J dy = -F on the free states (NaN without a factorization)."""
        m = self.n - 1
        if isinstance(lu, _IterativeSystem):
            z = conjugate_gradients(lu.matrix, (lu.pi_free * F[self._free])[self._perm])
            if z is not None:
                dy = np.empty(m)
                dy[self._perm] = z
                return dy / lu.ratio_free
            lu = self._sparse_lu(lu.jacobian)
        if lu is None:
            return np.full(m, np.nan)
        dy = np.empty(m)
        if isinstance(lu, tuple) and len(lu) == 3:  # -M z = pi F with z = r dy
            factor, pi_free, ratio_free = lu
            dy[self._perm] = banded_cholesky_solve(factor, (pi_free * F[self._free])[self._perm])
            return dy / ratio_free
        rhs = -F[self._free][self._perm]
        if isinstance(lu, tuple):
            z, info = lapack.dgbtrs(lu[0], self._band, self._band, rhs, lu[1])
        else:
            z = lu.solve(rhs, trans="T")
        dy[self._perm] = z
        return dy
