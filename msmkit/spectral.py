"""Eigen-analysis of transition matrices: spectra, stationary distribution, implied
timescales, and plain-language diagnostics of the chain.

References
----------
Swope, Pitera & Suits, J. Phys. Chem. B 108, 6571 (2004): implied timescales t_i = -tau / ln|lambda_i|.
Prinz et al., J. Chem. Phys. 134, 174105 (2011): spectral analysis of reversible models.
"""
from __future__ import annotations

import numpy as np
import scipy.linalg as la

from .errors import InputError

__all__ = [
    "chain_diagnostics",
    "changes_out",
    "slow_crossings",
    "eigen_decomposition",
    "flow_eigenvalues",
    "FlowSpectrum",
    "implied_timescales",
    "obeys_detailed_balance",
    "equilibrium_distribution",
]

#: an eigenvalue this close to the unit circle counts as "on" it
UNIT_CIRCLE_TOL = 1e-9
#: above this many states, a few leading eigenvalues are found iteratively instead of by a full solve
ITERATIVE_MIN_STATES = 1000
#: up to this many states the stationary distribution is found by GTH elimination
GTH_MAX_STATES = 500
#: states whose row holds fewer transitions than this are flagged as poorly sampled
FEW_COUNTS = 10
#: above this share of the slowest timescale, the lag visibly coarsens first-passage times
LAG_RESOLUTION_SHARE = 0.1
#: a slow process crossed fewer times than this cannot support its timescale or the populations
#: of its two sides: the relative error of a rate from N independent crossings is about
#: 1/sqrt(N/2), above 30 % below 20 crossings (Poisson counting, common practice)
FEW_CROSSINGS = 20


def equilibrium_distribution(T) -> np.ndarray:
    """Stationary distribution pi of an irreducible row-stochastic matrix: pi T = pi, sum pi = 1.

    Up to :data:`GTH_MAX_STATES` states it is found by Grassmann-Taksar-Heyman elimination
    (Grassmann, Taksar & Heyman, Oper. Res. 33, 1107 (1985)), which uses only off-diagonal
    entries and never subtracts: every entry of pi keeps full relative accuracy even for very
    sticky chains (exit probabilities of 1e-12 or less, where ``1 - T_ii`` has lost all digits).
    Larger matrices use a linear solve with the normalization replacing one equation.

    Parameters
    ----------
    T : array_like, shape (n, n)
        Row-stochastic, non-negative and irreducible.

    Returns
    -------
    ndarray, shape (n,), dimensionless probabilities summing to 1.
    """
    from ._checks import as_transition_matrix
    T = as_transition_matrix(T, "T", tol=1e-6)
    return _stationary(T)


def _stationary(T: np.ndarray) -> np.ndarray:
    """:func:`equilibrium_distribution` for a matrix already checked."""
    n = T.shape[0]
    if n == 1:
        return np.ones(1)
    if n <= GTH_MAX_STATES:
        pi = _gth(T)
        if pi is not None:
            return pi
    A = T.T - np.eye(n)
    A[-1, :] = 1.0
    b = np.zeros(n)
    b[-1] = 1.0
    try:
        pi = la.solve(A, b)
    except (la.LinAlgError, ValueError):
        pi = None
    if pi is None or not np.all(np.isfinite(pi)):
        pi = _gth(T)
        if pi is None:
            raise InputError("T has no unique stationary distribution: it is not irreducible (some states "
                             "never reach others); restrict it to one communicating class first")
        return pi
    pi = np.clip(pi, 0.0, None)
    return pi / pi.sum()


def _gth(T: np.ndarray):
    """Grassmann-Taksar-Heyman elimination; None when a state cannot leave the remaining set
    (a reducible chain). Cost n^3 / 3 flops in n vectorised rank-1 updates."""
    A = np.array(T, dtype=float)
    n = A.shape[0]
    np.fill_diagonal(A, 0.0)
    for k in range(n - 1, 0, -1):
        s = A[k, :k].sum()
        if not s > 0:
            return None
        A[:k, k] /= s
        A[:k, :k] += np.outer(A[:k, k], A[k, :k])
    pi = np.zeros(n)
    pi[0] = 1.0
    for k in range(1, n):
        pi[k] = pi[:k] @ A[:k, k]
    if not np.all(np.isfinite(pi)):
        return None
    return pi / pi.sum()


def obeys_detailed_balance(T: np.ndarray, pi: np.ndarray, rtol: float = 1e-8) -> bool:
    """True when pi_i T_ij = pi_j T_ji to ``rtol`` relative to the largest flow."""
    X = pi[:, None] * T
    return bool(np.max(np.abs(X - X.T)) <= rtol * max(np.max(X), 1e-300))


def eigen_decomposition(T: np.ndarray, pi: np.ndarray | None = None, *, k: int | None = None,
                        reversible: bool | None = None, vectors: bool = False):
    """Eigenvalues (and right eigenvectors) of T sorted by magnitude, largest first.

    For a reversible T (detailed balance with ``pi``) the matrix is symmetrized as
    D^1/2 T D^-1/2 with D = diag(pi) and solved with a symmetric solver: the spectrum is real
    and the solve stable. Otherwise a general solver is used and complex eigenvalues may appear.

    Parameters
    ----------
    T : ndarray, shape (n, n)
    pi : ndarray, optional
        Stationary distribution; computed when missing.
    k : int, optional
        How many eigenvalues to return (default all).
    reversible : bool, optional
        Use the symmetric path; default: test detailed balance.
    vectors : bool
        Also return right eigenvectors (columns), normalized so that sum_i pi_i r_i^2 = 1 in the
        reversible case.

    Returns
    -------
    eigenvalues : ndarray (float, or complex for a non-reversible T with a complex spectrum)
    right_vectors : ndarray, shape (n, k), only with ``vectors=True``
    """
    from ._checks import as_transition_matrix, check_bool, check_int
    T = as_transition_matrix(T, "T", tol=1e-6)
    n = T.shape[0]
    k = n if k is None else min(check_int(k, "k", minimum=1), n)
    vectors = check_bool(vectors, "vectors")
    if reversible is not None:
        reversible = check_bool(reversible, "reversible")
    if pi is None:
        pi = _stationary(T)
    else:
        pi = _as_distribution(pi, n)
    if reversible is None:
        reversible = obeys_detailed_balance(T, pi)
    if not solves_densely(n, k):
        return _leading_eigen(T, pi, k, reversible, vectors)
    if reversible:
        s = np.sqrt(pi)
        A = s[:, None] * T / s[None, :]
        A = 0.5 * (A + A.T)
        if vectors:
            w, v = la.eigh(A)
        else:
            w, v = la.eigvalsh(A), None
        order = magnitude_order(w)[:k]
        if not vectors:
            return w[order]
        right = v[:, order] / s[:, None]
        return w[order], right
    if vectors:
        w, v = la.eig(T)
    else:
        w, v = la.eigvals(T), None
    order = magnitude_order(w)[:k]
    w = w[order]
    if np.all(np.abs(w.imag) <= 1e-12 * np.maximum(np.abs(w), 1.0)):
        w = w.real
    if not vectors:
        return w
    v = v[:, order]
    if np.isrealobj(w):
        v = v.real
    return w, v


def solves_densely(n: int, k: int) -> bool:
    """Whether :func:`eigen_decomposition` finds ``k`` of ``n`` eigenpairs by the full dense solve
    (which yields all of them at the same cost) rather than iteratively."""
    return not (k < n and n > ITERATIVE_MIN_STATES and k <= n // 10)


def _as_distribution(pi, n: int) -> np.ndarray:
    """``pi`` as a length-n probability vector, or InputError naming it."""
    try:
        arr = np.array(pi, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"pi must be a vector of {n} probabilities, but got {pi!r:.60}") from None
    if arr.shape != (n,):
        raise InputError(f"pi must have one entry per state of T ({n}), but has shape {arr.shape}")
    if not np.all(np.isfinite(arr)) or arr.min() < 0 or abs(arr.sum() - 1.0) > 1e-6:
        raise InputError("pi must be a finite non-negative vector summing to 1 (the stationary distribution)")
    return arr


def _leading_eigen(T, pi, k, reversible, vectors):
    """The k largest-magnitude eigenpairs by ARPACK (implicitly restarted Lanczos / Arnoldi) on a
    sparse copy of the (symmetrized) matrix: far cheaper than a full dense solve when k << n.
    Falls back to the dense solver if ARPACK does not converge."""
    import scipy.sparse as sp
    import scipy.sparse.linalg as sla
    n = T.shape[0]
    v0 = np.random.default_rng(0).uniform(0.5, 1.5, n)  # fixed start: same answer every call
    ncv = min(n, max(2 * k + 1, 24))
    try:
        if reversible:
            s = np.sqrt(pi)
            A = sp.csr_matrix(s[:, None] * T / s[None, :])
            A = 0.5 * (A + A.T)
            w, v = sla.eigsh(A, k=k, which="LM", v0=v0, ncv=ncv, tol=0)
            v = v / s[:, None]
        else:
            w, v = sla.eigs(sp.csr_matrix(T), k=k, which="LM", v0=v0, ncv=ncv, tol=0)
            if np.all(np.abs(w.imag) <= 1e-12 * np.maximum(np.abs(w), 1.0)):
                w, v = w.real, v.real
    except (sla.ArpackNoConvergence, sla.ArpackError):
        full = eigen_decomposition(T, pi, reversible=reversible, vectors=vectors)  # dense
        return (full[0][:k], full[1][:, :k]) if vectors else full[:k]
    order = magnitude_order(w)
    return (w[order], v[:, order]) if vectors else w[order]


#: banded LAPACK factorizations are used while the band storage holds at most this many times
#: the nonzeros (here and in msmkit.estimate.CountPattern)
BAND_SHARE = 20
#: up to this many states :func:`flow_eigenvalues` uses the dense symmetric solver
DENSE_FLOW_STATES = 60
#: restarts allowed to plain Lanczos (no shift-invert) in :meth:`FlowSpectrum.eigenvalues` before
#: it turns to shift-invert
PLAIN_LANCZOS_RESTARTS = 30


def flow_eigenvalues(flows, k: int, *, shift: float | None = None, start=None) -> np.ndarray:
    """The ``k`` largest-magnitude eigenvalues (largest first, the stationary 1 first) of the
    reversible T = D^-1 X given by the symmetric flow matrix X (X_ij = pi_i T_ij up to a factor,
    D = diag of the row sums), without forming a dense matrix: :meth:`FlowSpectrum.eigenvalues`
    on the pattern of ``flows`` (build one :class:`FlowSpectrum` for many matrices on one
    pattern).

    Parameters
    ----------
    flows : scipy.sparse matrix or ndarray, shape (n, n)
        Symmetric, non-negative, irreducible.
    k, shift, start
        See :meth:`FlowSpectrum.eigenvalues`.
    """
    import scipy.sparse as sp
    X = sp.csr_matrix(flows, dtype=np.float64)
    X.sum_duplicates()
    X.sort_indices()
    C = X.tocoo()
    return FlowSpectrum(C.row, C.col, X.shape[0]).eigenvalues(C.data, k, shift=shift, start=start)


def _lapack_routine(name: str, n_args: int):
    """A LAPACK routine of scipy (``scipy.linalg.cython_lapack``, the public C interface) as a
    ctypes function, which releases the interpreter lock during the call: the f2py wrappers of
    ``scipy.linalg.lapack`` keep it, so threads running banded factorizations hardly overlapped
    (measured: two threads 1.15x faster than one at 3000 states, band 200; 1.46x by this route)."""
    import ctypes
    import scipy.linalg.cython_lapack as cython_lapack
    api = ctypes.pythonapi
    api.PyCapsule_GetName.restype = ctypes.c_char_p
    api.PyCapsule_GetName.argtypes = [ctypes.py_object]
    api.PyCapsule_GetPointer.restype = ctypes.c_void_p
    api.PyCapsule_GetPointer.argtypes = [ctypes.py_object, ctypes.c_char_p]
    capsule = cython_lapack.__pyx_capi__[name]
    pointer = api.PyCapsule_GetPointer(capsule, api.PyCapsule_GetName(capsule))
    return ctypes.CFUNCTYPE(None, *([ctypes.c_void_p] * n_args))(pointer)


_BANDED = {}


def _banded_routines():
    if not _BANDED:
        _BANDED.update(dpbtrf=_lapack_routine("dpbtrf", 6), dpbtrs=_lapack_routine("dpbtrs", 9))
    return _BANDED


def banded_cholesky(ab: np.ndarray):
    """Cholesky factor of a symmetric positive definite band matrix in LAPACK's upper band
    storage (``ab[band + i - j, j] = M[i, j]`` for i <= j), by dpbtrf without the interpreter
    lock; None when the matrix is not positive definite."""
    import ctypes
    factor = np.array(ab, dtype=np.float64, order="F")
    rows, n = factor.shape
    ints = [ctypes.c_int(v) for v in (n, rows - 1, rows, 0)]
    N, KD, LD, INFO = (ctypes.byref(v) for v in ints)
    _banded_routines()["dpbtrf"](ctypes.c_char_p(b"U"), N, KD, factor.ctypes.data, LD, INFO)
    return factor if ints[3].value == 0 else None


def banded_cholesky_solve(factor: np.ndarray, b: np.ndarray) -> np.ndarray:
    """x with M x = b from :func:`banded_cholesky` (dpbtrs without the interpreter lock)."""
    import ctypes
    x = np.array(b, dtype=np.float64)
    rows, n = factor.shape
    ints = [ctypes.c_int(v) for v in (n, rows - 1, 1, rows, n, 0)]
    N, KD, NRHS, LD, LDB, INFO = (ctypes.byref(v) for v in ints)
    _banded_routines()["dpbtrs"](ctypes.c_char_p(b"U"), N, KD, NRHS, factor.ctypes.data, LD, x.ctypes.data, LDB, INFO)
    return x


def conjugate_gradients(M, b: np.ndarray, *, rtol: float = 1e-10, max_iter: int = 2000):
    """x with M x = b for a symmetric positive definite sparse M, by conjugate gradients with the
    diagonal of M as preconditioner (Hestenes & Stiefel, J. Res. Natl. Bur. Stand. 49, 409
    (1952); Saad, Iterative Methods for Sparse Linear Systems, 2nd ed. (2003), Alg. 9.1).

    Cheaper than a factorization where that fills in (thousands of states, a wide band): one
    sparse product per iteration, and the number of iterations grows with the square root of
    the condition number, not with the fill.

    Returns
    -------
    ndarray, or None when ``||b - M x|| <= rtol ||b||`` is not reached in ``max_iter`` iterations
    (or M proves not positive definite), so that the caller can fall back to a direct solve.
    """
    b = np.asarray(b, dtype=np.float64)
    d = M.diagonal()
    if not np.all(d > 0):
        return None
    inv_d = 1.0 / d
    x = np.zeros_like(b)
    r = b.copy()
    goal = rtol * float(np.linalg.norm(b))
    if goal == 0.0:
        return x
    z = inv_d * r
    p = z.copy()
    rz = float(r @ z)
    for _ in range(int(max_iter)):
        q = M @ p
        pq = float(p @ q)
        if not pq > 0:
            return None
        alpha = rz / pq
        x += alpha * p
        r -= alpha * q
        if float(np.linalg.norm(r)) <= goal:
            return x
        z = inv_d * r
        rz, rz_old = float(r @ z), rz
        p *= rz / rz_old
        p += z
    return None


class FlowSpectrum:
    """Leading eigenvalues of many reversible matrices given by symmetric flows on one pattern.

    T = D^-1 X, X symmetric and non-negative on the pattern, D = diag of the row sums of X; the
    eigenvalues are those of the symmetric A = D^-1/2 X D^-1/2 (similar to T). Above
    :data:`DENSE_FLOW_STATES` states they come from Lanczos iterations (ARPACK) in shift-invert
    mode about a shift above 1 -- the eigenvalues nearest 1 converge in a few steps even where
    they cluster (slow processes at short lags), where plain Lanczos needed thousands of steps
    (measured at 500 states, lag 1) -- with one Cholesky factorization of shift I - A (positive
    definite), banded after reverse Cuthill-McKee renumbering (built once per pattern) when the
    band is narrow. Shift-invert finds the largest algebraic eigenvalues; they are the largest
    in magnitude unless one at or below -|lambda_k| exists. None is below min_i (2 T_ii - 1)
    (Gershgorin discs; Horn & Johnson, Matrix Analysis, Thm. 6.1.1); when that bound does not
    exclude it, A + |lambda_k| I is factorised: it is positive definite exactly when no such
    eigenvalue exists (Golub & Van Loan, Matrix Computations, Thm. 4.2.7); else plain Lanczos
    on the largest magnitudes decides.

    Parameters
    ----------
    rows, cols : ndarray of int
        The symmetric pattern, both triangles, each entry once, sorted by row then column.
    n : int
    """

    def __init__(self, rows, cols, n: int):
        from scipy.sparse import csgraph
        import scipy.sparse as sp
        self.n = int(n)
        self.rows, self.cols = np.asarray(rows, dtype=np.intp), np.asarray(cols, dtype=np.intp)
        self.indptr = np.searchsorted(self.rows, np.arange(self.n + 1)).astype(np.int32)
        self.indices = self.cols.astype(np.int32)
        graph = sp.csr_matrix((np.ones(self.rows.size), self.indices, self.indptr), shape=(self.n, self.n))
        self.order = csgraph.reverse_cuthill_mckee(graph, symmetric_mode=True).astype(np.intp)
        self.rank = np.empty(self.n, dtype=np.intp)
        self.rank[self.order] = np.arange(self.n)
        r, c = self.rank[self.rows], self.rank[self.cols]
        self.upper = np.flatnonzero(r < c)
        self.band = int(np.max(c[self.upper] - r[self.upper])) if self.upper.size else 0
        self.banded = self.n * (self.band + 1) <= BAND_SHARE * max(self.rows.size, self.n)
        # position of each upper entry in LAPACK's upper band storage: ab[band + r - c, c]
        self.upper_pos = (self.band + r[self.upper] - c[self.upper]) * self.n + c[self.upper]
        self.diag_entries = np.flatnonzero(self.rows == self.cols)

    def symmetric(self, flows) -> tuple:
        """A = D^-1/2 X D^-1/2 as a CSR matrix (the pattern's structure), the values on the pattern and the diagonal."""
        import scipy.sparse as sp
        flows = np.asarray(flows, dtype=np.float64)
        d = 1.0 / np.sqrt(np.bincount(self.rows, weights=flows, minlength=self.n))
        a = flows * d[self.rows] * d[self.cols]
        diag = np.zeros(self.n)
        diag[self.rows[self.diag_entries]] = a[self.diag_entries]
        return sp.csr_matrix((a, self.indices, self.indptr), shape=(self.n, self.n)), a, diag

    def _solver(self, a, diag, alpha: float, beta: float):
        """x = (alpha I + beta A)^-1 b from a Cholesky factorization, None when that matrix is
        not positive definite."""
        if self.banded:
            ab = np.zeros((self.band + 1, self.n))
            ab.flat[self.upper_pos] = beta * a[self.upper]
            ab[self.band] = alpha + beta * diag[self.order]
            # LAPACK directly: the checking wrappers of scipy.linalg cost more than the banded
            # solve itself at a few hundred states, and they keep the interpreter lock
            factor = banded_cholesky(ab)
            if factor is None:
                return None
            order, rank = self.order, self.rank
            return lambda b: banded_cholesky_solve(factor, b[order])[rank]
        import scipy.sparse as sp
        import scipy.sparse.linalg as sla
        B = sp.csr_matrix((beta * a, self.indices, self.indptr), shape=(self.n, self.n)) \
            + alpha * sp.identity(self.n, format="csr")
        # a wide band: a sparse LU with a fill-reducing symmetric ordering and no pivoting, whose
        # pivots are all positive exactly when B is positive definite
        try:
            lu = sla.splu(B.tocsc(), permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0,
                          options={"SymmetricMode": True})
        except RuntimeError:
            return None
        if np.any(lu.perm_r != lu.perm_c) or not np.all(lu.U.diagonal() > 0):
            return None
        return lu.solve

    def eigenvalues(self, flows, k: int, *, shift: float | None = None, start=None, tol: float = 0.0) -> np.ndarray:
        """The ``k`` largest-magnitude eigenvalues of T (largest first, the stationary 1 first).

        Parameters
        ----------
        flows : ndarray
            X on the pattern (``rows``, ``cols``).
        k : int
        shift : float, optional
            Shift above 1; default 1 + 1e-3 (a hundredth of 1 - lambda_k of a similar matrix,
            e.g. the full-data model of a bootstrap sample, above 1 is a better choice).
        start : ndarray, shape (n,), optional
            Start vector in the symmetric coordinates (e.g. a sum of leading eigenvectors of a
            similar matrix); fixed otherwise, so that results repeat.
        tol : float, default 0
            Relative accuracy of the shift-inverted eigenvalues theta = 1 / (shift - lambda)
            (ARPACK's ``tol``; 0 is machine precision). The error of lambda is then about
            tol (shift - lambda), and the relative error of an implied timescale
            -1 / ln(lambda) about tol (shift - lambda) / (1 - lambda) <= 1.01 tol with the
            shift of a hundredth of the gap described above (first order in the error).

        Returns
        -------
        ndarray, shape (min(k, n),), accurate to about machine precision with ``tol=0``.
        """
        import scipy.sparse.linalg as sla
        n = self.n
        k = min(int(k), n)
        A, a, diag = self.symmetric(flows)
        if n <= DENSE_FLOW_STATES or k >= n - 1:
            w = la.eigvalsh(A.toarray())
            return w[magnitude_order(w)][:k]
        v0 = np.random.default_rng(0).uniform(0.5, 1.5, n) if start is None else np.asarray(start, dtype=float)
        ncv = min(n, max(2 * k + 1, 20))
        sigma = 1.0 + 1e-3 if shift is None else float(shift)
        if not self.banded:
            # a wide band: the factorization of shift-invert fills in (1-2 s at 3000 microstates
            # of the demo) while plain Lanczos on the largest magnitudes took 10-20 ms there;
            # shift-invert stays the fallback for clustered eigenvalues that need many restarts
            try:
                w = sla.eigsh(A, k=k, which="LM", v0=v0, ncv=ncv, tol=0, maxiter=PLAIN_LANCZOS_RESTARTS,
                              return_eigenvectors=False)
                return w[magnitude_order(w)][:k]
            except (sla.ArpackNoConvergence, sla.ArpackError):
                pass
        try:
            solve = self._solver(a, diag, sigma, -1.0)  # sigma I - A: positive definite
            if solve is None:
                raise RuntimeError("shift not above the spectrum")
            op = sla.LinearOperator((n, n), matvec=lambda b: -solve(np.asarray(b).ravel()), dtype=np.float64)
            w = sla.eigsh(A, k=k, sigma=sigma, which="LM", OPinv=op, v0=v0, ncv=ncv, tol=tol,
                          return_eigenvectors=False)
            smallest = float(np.min(np.abs(w)))
            if float(np.min(2 * diag - 1)) < -smallest and self._solver(a, diag, smallest, 1.0) is None:
                w = sla.eigsh(A, k=k, which="LM", v0=v0, ncv=ncv, tol=0, return_eigenvectors=False)
        except (sla.ArpackNoConvergence, sla.ArpackError, RuntimeError):
            w = la.eigvalsh(A.toarray())
        return w[magnitude_order(w)][:k]


def magnitude_order(w: np.ndarray) -> np.ndarray:
    """Indices sorting eigenvalues by magnitude, largest first, with the eigenvalue nearest 1 (the
    stationary one) always first: on a periodic chain others share the same magnitude (-1, e^{2 pi i/3})
    and a plain sort by magnitude may put one of them in front."""
    first = int(np.argmin(np.abs(w - 1.0)))
    rest = np.delete(np.arange(w.size), first)
    rest = rest[np.argsort(-np.abs(w[rest]), kind="stable")]
    return np.concatenate([[first], rest]).astype(np.intp)


def implied_timescales(eigenvalues, lag: int, dt: float = 1.0) -> np.ndarray:
    """Implied timescales t_i = -lag * dt / ln|lambda_i| in physical units (Swope et al. 2004).

    |lambda| >= 1 gives inf (a stationary or undecayed process); lambda = 0 gives 0.
    """
    from ._checks import check_dt, check_lag
    lag, dt = check_lag(lag), check_dt(dt)
    try:
        values = np.asarray(eigenvalues)
        mag = np.abs(values.astype(complex if values.dtype.kind == "c" else float))
    except (TypeError, ValueError):
        raise InputError(f"eigenvalues must be numbers, but got {eigenvalues!r:.60}") from None
    if not np.all(np.isfinite(mag)):
        raise InputError("eigenvalues hold NaN or infinity; pass the eigenvalues of a transition matrix")
    with np.errstate(divide="ignore"):
        logs = np.log(np.clip(mag, 0.0, 1.0))
        out = np.where(logs < 0, -lag * dt / np.where(logs < 0, logs, -1.0), np.inf)
    return np.where(mag == 0, 0.0, out)


def chain_diagnostics(eigenvalues, *, lag: int, dt: float, unit: str, changes=None, crossings=None,
                      states=None, dropped_states=None, kept_fraction=None,
                      n_reported: int | None = None, estimated: bool = False,
                      connected: bool = False) -> list[str]:
    """Plain-language findings about a model that a user must not miss.

    Parameters
    ----------
    eigenvalues : ndarray
        Eigenvalues sorted by magnitude (the first is the stationary 1).
    lag, dt, unit
        Lag in frames, frame time and the unit of time, for the timescale checks.
    changes : ndarray, optional
        Changes to another state out of each kept state (:func:`changes_out`; self-transitions
        do not count).
    crossings : float, optional
        Crossings between the two sides of the slowest process (:func:`slow_crossings`).
    states : ndarray, optional
        Original labels of the kept states, used to name them.
    dropped_states : ndarray, optional
        Labels of visited states outside the kept set.
    kept_fraction : float, optional
        Fraction of transition counts inside the kept set.
    n_reported : int, optional
        How many eigenvalues after the first are reported to the user (negative and complex
        values are flagged among those); default all.
    estimated : bool
        The model was estimated from data at this lag: a lag above a tenth of the slowest
        timescale is flagged, since first-passage times are then coarsened by the lag (a matrix
        given as the dynamics itself has no such lag).
    connected : bool, default False
        The chain is known to be irreducible (every state reaches every other). A second
        eigenvalue at 1 then means a process too slow to resolve, not parts that never exchange.

    Returns
    -------
    list of str
    """
    w = np.asarray(eigenvalues)
    found = []
    rest = w[1:] if n_reported is None else w[1:1 + n_reported]
    tau = lag * dt
    on_circle = np.abs(np.abs(w[1:]) - 1.0) < UNIT_CIRCLE_TOL
    if np.any(on_circle):
        others = w[1:][on_circle]
        if np.any(np.abs(others.real - 1.0) < UNIT_CIRCLE_TOL) and np.all(np.abs(np.imag(others)) < UNIT_CIRCLE_TOL) \
                and np.all(others.real > 0):
            if connected:
                found.append(f"An eigenvalue other than the stationary one lies within {UNIT_CIRCLE_TOL:g} of 1 "
                             "although every kept state reaches every other: the slowest process takes more "
                             f"than about {1 / UNIT_CIRCLE_TOL:.0e} lag times, far beyond what the data resolve; "
                             "that timescale and the populations across the barrier are poorly determined.")
            else:
                    found.append("More than one eigenvalue equals 1: the kept states split into parts that never "
                             "exchange at this lag, so there is no unique equilibrium; check connectivity.")
        else:
            found.append("Periodic chain: an eigenvalue lies on the unit circle away from 1 "
                         f"({_fmt(others[0])}), so T^n does not settle to equilibrium. Timescales and "
                         "populations of such a model are not meaningful; counting at a different lag or "
                         "with more data usually removes the period.")
    negative = np.real(rest) < 0
    complex_ = np.abs(np.imag(rest)) > 0
    if np.any(complex_):
        found.append(f"{int(np.sum(complex_))} of the reported eigenvalues are complex (e.g. {_fmt(rest[complex_][0])}): "
                     "the estimate is not reversible; their timescales use |lambda| and oscillate.")
    if np.any(negative & ~complex_):
        found.append(f"{int(np.sum(negative & ~complex_))} of the reported eigenvalues are negative "
                     f"(e.g. {_fmt(rest[negative & ~complex_][0])}): no physical relaxation gives a negative "
                     "eigenvalue; those timescales come from statistical noise.")
    ts = implied_timescales(rest, lag, dt)
    short = np.isfinite(ts) & (ts < tau)
    if np.any(short):
        found.append(f"{int(np.sum(short))} reported timescale(s) are shorter than the lag time "
                     f"({tau:g} {unit}); they cannot be resolved at this lag and are not physical.")
    resolved = ts[np.isfinite(ts) & (ts > tau)]
    if estimated and resolved.size and tau > LAG_RESOLUTION_SHARE * resolved.max():
        found.append(f"The lag time ({tau:g} {unit}) is more than {LAG_RESOLUTION_SHARE:g} of the slowest timescale "
                     f"({resolved.max():.4g} {unit}): first-passage times and rates from this model are computed at "
                     f"lag resolution, see passages at multiples of the lag only, and can come out too long by "
                     f"a lag or more; compare them across lags.")
    if changes is not None:
        changes = np.asarray(changes, dtype=float)
        few = np.flatnonzero(changes < FEW_COUNTS)
        if few.size:
            names = few if states is None else np.asarray(states)[few]
            shown = ", ".join(str(int(s)) for s in names[:8]) + (" ..." if few.size > 8 else "")
            found.append(f"{few.size} state(s) are left for another state fewer than {FEW_COUNTS} times "
                         f"(states {shown}; staying in a state does not count); their transition "
                         f"probabilities are poorly determined. More sampling, fewer microstates or a "
                         f"shorter lag help.")
        total = float(changes.sum())
        if crossings is not None and crossings < FEW_CROSSINGS:
            found.append(f"The sampling cannot support this model: the data cross between the two sides of "
                         f"the slowest process (split by the sign of the eigenvector) only {crossings:.3g} "
                         f"time(s) at this lag, among {total:.3g} change(s) between distinct states in all. "
                         f"Fewer than {FEW_CROSSINGS} crossings leave the timescale, the populations of the "
                         f"two sides and every test of the model (Chapman–Kolmogorov included) without "
                         f"support; collect more or longer runs.")
    if dropped_states is not None and len(dropped_states):
        shown = ", ".join(str(int(s)) for s in np.asarray(dropped_states)[:8]) + (" ..." if len(dropped_states) > 8 else "")
        frac = "" if kept_fraction is None else f", holding {100 * (1 - kept_fraction):.3g}% of the transition counts"
        found.append(f"Data not fully connected: {len(dropped_states)} visited state(s) lie outside the largest "
                     f"strongly connected set and were dropped (states {shown}{frac}).")
    return found


def _windows(counts, lag: int, every_frame: bool) -> float:
    """How many counted windows make one independent observation: sliding windows at lag tau
    count every change about tau times (one per offset), so their counts are divided by tau."""
    return float(lag) if every_frame else 1.0


def changes_out(counts, *, lag: int = 1, every_frame: bool = True) -> np.ndarray:
    """Changes to a different state out of each state, at the lag (self-transitions left out).

    Parameters
    ----------
    counts : array_like or sparse matrix, shape (n, n)
        Transition counts at ``lag``.
    lag : int
        The lag of the counts, in frames.
    every_frame : bool
        The counts come from sliding windows: off-diagonal counts are divided by ``lag`` so that
        each independent change counts once (exact at lag 1, where it is the number of frames
        at which the trajectory leaves the state).

    Returns
    -------
    ndarray, shape (n,)
        Number of changes out of each state (a float for sliding windows at lag > 1).
    """
    C = _float_counts(counts)
    out = np.asarray(C.sum(axis=1), dtype=float).ravel() - C.diagonal()
    return out / _windows(C, lag, every_frame)


def slow_crossings(counts, side, *, lag: int = 1, every_frame: bool = True) -> float:
    """How often the data cross between the two sides of a slow process, at the lag.

    The sides are the states where the process's right eigenvector is positive or not;
    a crossing is a counted transition from one side to the other (sliding windows divided by
    ``lag``, as in :func:`changes_out`).

    Parameters
    ----------
    counts : array_like or sparse matrix, shape (n, n)
    side : array_like of bool, shape (n,)
        True for the states on one side.
    lag : int
    every_frame : bool

    Returns
    -------
    float
    """
    C = _float_counts(counts)
    s = np.asarray(side, dtype=float)
    # counts from one side to the other: s^T C (1 - s) + (1 - s)^T C s = sum(s^T C) + sum(C s) - 2 s^T C s
    Cs = np.asarray(C @ s, dtype=float).ravel()
    across = float(np.sum(s @ C)) + float(Cs.sum()) - 2.0 * float(s @ Cs)
    return across / _windows(C, lag, every_frame)


def _float_counts(counts):
    """Counts as a float sparse CSR matrix or a float ndarray (sparse input stays sparse: at
    thousands of states a dense copy cost 0.1 s per call)."""
    import scipy.sparse as sp
    if sp.issparse(counts):
        return sp.csr_matrix(counts, dtype=float)
    return np.asarray(counts, dtype=float)


def _fmt(z) -> str:
    z = complex(z)
    return f"{z.real:.4g}" if z.imag == 0 else f"{z.real:.4g}{z.imag:+.4g}i"
