"""Macrostates by PCCA+: fuzzy affinity of microstates in a few long-lived groups.

The functions work on plain arrays: a row-stochastic transition matrix ``T`` of the kept set
(one step = one lag time) and the stationary distribution ``pi``. Results meant for people
name states by their original label (``states``, default ``0..n-1``).

References
----------
Deuflhard & Weber, Linear Algebra Appl. 398, 161 (2005): robust Perron cluster analysis
(PCCA+), the inner simplex algorithm and the feasibility conditions.
Röblitz & Weber, Adv. Data Anal. Classif. 7, 147 (2013): the crispness objective, the
optimization over the free entries of the transformation matrix, Schur vectors for
non-reversible chains, and the Galerkin projection onto the affinity.
"""
from __future__ import annotations

import numbers
import warnings
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg as la
import scipy.optimize as opt

from .errors import DiagnosticWarning, InputError
from .kinetics import (as_state_labels, as_stationary, as_time_per_step,
                       as_stochastic_matrix, brief, passage_time_matrix, transition_paths)
from .spectral import obeys_detailed_balance

__all__ = [
    "Macrostates",
    "check_macrostate_gap",
    "lumped_propagator",
    "find_macrostates",
    "pcca_affinity",
    "suggest_n_macrostates",
]

#: beyond this many sets the (n_sets - 1)^2 free parameters are not optimized (too slow)
MAX_OPTIMISED_SETS = 20
#: eigenvalues closer than this are treated as degenerate when choosing the subspace
_DEGENERATE = 1e-10
#: molar gas constant in kJ mol^-1 K^-1 (CODATA 2018, exact)
_R_KJ = 8.314462618e-3


# --------------------------------------------------------------------------- subspace

def _leading_subspace(T: np.ndarray, pi: np.ndarray, m: int, reversible: bool):
    """pi-orthonormal basis X (n x m) of the invariant subspace of the m eigenvalues of largest
    real part, with X[:, 0] == 1; and the eigenvalues sorted by real part, largest first (the
    m + 1 largest for a reversible T, all otherwise).

    Works on S = D^1/2 T D^-1/2 (D = diag(pi)): an orthonormal basis Q of an invariant subspace
    of S gives X = D^-1/2 Q with X^T D X = I. Reversible: S is symmetric (eigh). Otherwise the
    real Schur form of S, ordered so that the chosen eigenvalues come first (Röblitz & Weber
    2013, Sec. 4.3), spans the same subspace without complex arithmetic.
    """
    n = T.shape[0]
    s = np.sqrt(pi)
    S = s[:, None] * T / s[None, :]
    if reversible:
        # only the m + 1 largest are needed: m for the subspace, one more to check the gap
        k = min(m + 1, n)
        w, V = la.eigh(0.5 * (S + S.T), subset_by_index=[n - k, n - 1])
        eig = w[::-1]
        Q = V[:, ::-1][:, :m]
    else:
        eig = la.eigvals(S)
        eig = eig[np.lexsort((-np.abs(eig.imag), -eig.real))]
        if m < n:
            lo, hi = eig[m].real, eig[m - 1].real
            if abs(eig[m - 1].imag) > _DEGENERATE and abs(hi - lo) <= _DEGENERATE * max(1.0, abs(hi)):
                raise InputError(
                    f"n_sets={m} would split the complex-conjugate eigenvalue pair "
                    f"{eig[m - 1]:.4g}, {eig[m]:.4g} of the non-reversible matrix; "
                    f"choose n_sets={m - 1} or n_sets={m + 1}")
            threshold = 0.5 * (lo + hi)
            _, Z, _ = la.schur(S, output="real", sort=lambda re, im: re > threshold)
        else:
            _, Z = la.schur(S, output="real")
        Q = Z[:, :m]
    if m < n and eig[m - 1].real - eig[m].real <= _DEGENERATE:
        warnings.warn(f"eigenvalues {m} and {m + 1} of T are (nearly) equal ({eig[m - 1].real:.6g}); "
                      f"the {m} leading eigenvectors are not uniquely defined, so the split into "
                      f"{m} macrostates is arbitrary. Choose another number of macrostates.",
                      DiagnosticWarning, stacklevel=3)
    # Rotate Q so that its first column is sqrt(pi), i.e. X[:, 0] = 1 (a Householder reflection).
    c = Q.T @ s
    norm = np.linalg.norm(c)
    if abs(norm - 1.0) > 1e-6:
        raise InputError("the leading eigenvectors of T do not contain the stationary vector; "
                         "is pi the stationary distribution of an irreducible T?")
    c = c / norm
    u = c.copy()
    u[0] -= 1.0
    if np.linalg.norm(u) > 1e-14:
        u /= np.linalg.norm(u)
        Q = Q - 2.0 * np.outer(Q @ u, u)
    X = Q / s[:, None]
    X[:, 0] = 1.0
    return X, eig


# --------------------------------------------------------------------------- PCCA+ core

def _inner_simplex(X: np.ndarray) -> np.ndarray:
    """Row indices of m states spanning a large simplex in eigenvector space (the vertices).

    Deuflhard & Weber 2005, Sec. 4 (index search): start at the row of largest norm, then
    repeatedly take the row farthest from the affine span of the rows chosen so far.
    """
    m = X.shape[1]
    Y = X.copy()
    first = int(np.argmax(np.linalg.norm(Y, axis=1)))
    idx = [first]
    Y = Y - Y[first]
    for _ in range(1, m):
        d = np.linalg.norm(Y, axis=1)
        i = int(np.argmax(d))
        idx.append(i)
        # d[i] > 0: the rows of X (first column 1, rank m) span an (m-1)-dimensional simplex
        v = Y[i] / d[i]
        Y = Y - np.outer(Y @ v, v)
    return np.array(idx)


def _feasible(A: np.ndarray, X: np.ndarray) -> np.ndarray:
    """Complete the free block A[1:, 1:] to a feasible transformation matrix.

    Rows of X A must sum to 1 (A[1:, 0] from the zero row sums of A[1:]) and be non-negative
    (A[0, j] lifts the smallest entry of column j to 0); finally the first row is normalized
    to sum 1 (Röblitz & Weber 2013, Sec. 3.3).
    """
    A = A.copy()
    A[1:, 0] = -A[1:, 1:].sum(axis=1)
    A[0, :] = -(X[:, 1:] @ A[1:, :]).min(axis=0)
    total = A[0].sum()
    if not total > 0:
        return np.full_like(A, np.nan)
    return A / total


def _crispness(A: np.ndarray) -> float:
    """Röblitz & Weber 2013 objective: sum_j (chi_j, chi_j)_pi / (chi_j, 1)_pi = sum_ij A_ij^2 / A_0j.

    Equals the number of sets m exactly when the affinity are crisp (0 or 1); smaller
    values mean fuzzier sets. Requires pi-orthonormal X with X[:, 0] = 1.
    """
    if not np.all(np.isfinite(A)) or np.any(A[0] <= 0):
        return -np.inf
    return float(((A ** 2).sum(axis=0) / A[0]).sum())


def _pcca(T: np.ndarray, pi: np.ndarray, m: int, reversible: bool, optimize: bool):
    """Trusting core of PCCA+: (affinity sorted by population, eigenvalues, crispness/m)."""
    n = T.shape[0]
    X, eig = _leading_subspace(T, pi, m, reversible)
    if m == 1:
        return np.ones((n, 1)), eig, 1.0
    idx = _inner_simplex(X)
    vertices = X[idx]
    if np.linalg.cond(vertices) > 1e12:
        A = np.linalg.pinv(vertices)
    else:
        A = np.linalg.inv(vertices)
    A = _feasible(A, X)
    if optimize and m > 2 and m <= MAX_OPTIMISED_SETS:
        # For m = 2 the feasible completion of the simplex vertices is already optimal.
        def loss(x):
            B = A.copy()
            B[1:, 1:] = x.reshape(m - 1, m - 1)
            return -_crispness(_feasible(B, X))

        k = (m - 1) ** 2
        res = opt.minimize(loss, A[1:, 1:].ravel(), method="Nelder-Mead",
                           options={"maxiter": 200 * k, "maxfev": 200 * k, "xatol": 1e-8,
                                    "fatol": 1e-10 * m, "adaptive": True})
        if np.isfinite(res.fun) and -res.fun > _crispness(A):
            B = A.copy()
            B[1:, 1:] = res.x.reshape(m - 1, m - 1)
            A = _feasible(B, X)
    elif optimize and m > MAX_OPTIMISED_SETS:
        warnings.warn(f"PCCA+ with {m} sets: the {(m - 1) ** 2} free parameters were not optimized "
                      f"(more than {MAX_OPTIMISED_SETS} sets); affinity come from the inner "
                      f"simplex vertices and may be fuzzier than necessary", DiagnosticWarning,
                      stacklevel=3)
    crisp = _crispness(A) / m
    chi = X @ A
    np.clip(chi, 0.0, None, out=chi)  # rounding below 0
    chi /= chi.sum(axis=1, keepdims=True)
    order = np.argsort(-(pi @ chi), kind="stable")  # most populated macrostate first
    return chi[:, order], eig, crisp


def _gates(T, pi, n_sets, reversible):
    T = as_stochastic_matrix(T)
    pi = as_stationary(pi, T)
    n = T.shape[0]
    if isinstance(n_sets, (bool, np.bool_)) or not isinstance(n_sets, numbers.Integral) \
            or not 1 <= n_sets <= n:
        raise InputError(f"n_sets (number of macrostates) must be an integer from 1 to the number of "
                         f"states ({n}), but got {brief(n_sets)}")
    if reversible is None:
        reversible = obeys_detailed_balance(T, pi)
    return T, pi, int(n_sets), bool(reversible)


def pcca_affinity(T, pi, n_sets: int, *, reversible: bool | None = None,
                     optimize: bool = True) -> np.ndarray:
    """Fuzzy affinity of every state in ``n_sets`` macrostates (PCCA+).

    The leading ``n_sets`` right eigenvectors of T (Schur vectors for a non-reversible T),
    orthonormal in the pi-weighted inner product, are mapped by a linear transformation A onto
    affinity chi = X A that are non-negative and sum to 1 in every row. A starts from the
    inner simplex algorithm and is optimized for crispness (Nelder-Mead on the free entries),
    then made feasible.

    Parameters
    ----------
    T : array_like, shape (n, n)
        Row-stochastic transition matrix of an irreducible chain.
    pi : array_like, shape (n,)
        Stationary distribution of T.
    n_sets : int
        Number of macrostates, 1 <= n_sets <= n.
    reversible : bool, optional
        Use the symmetric eigenproblem (detailed balance). Default: test detailed balance.
    optimize : bool
        Optimize the crispness objective (default). False keeps the feasible inner-simplex
        solution, which is faster and often close.

    Returns
    -------
    ndarray, shape (n, n_sets)
        Memberships (dimensionless, 0..1, rows sum to 1); columns ordered by stationary
        population, largest first.

    Warns
    -----
    DiagnosticWarning
        When eigenvalues ``n_sets`` and ``n_sets + 1`` are degenerate (the split is arbitrary).

    References
    ----------
    Deuflhard & Weber, Linear Algebra Appl. 398, 161 (2005); Röblitz & Weber, Adv. Data Anal.
    Classif. 7, 147 (2013).
    """
    T, pi, n_sets, reversible = _gates(T, pi, n_sets, reversible)
    return _pcca(T, pi, n_sets, reversible, optimize)[0]


def lumped_propagator(T, pi, affinity) -> np.ndarray:
    """Transition matrix between macrostates by Galerkin projection onto the affinity.

    T_c = (chi^T D chi)^-1 chi^T D T chi with D = diag(pi). Rows sum to 1 and the macrostate
    populations chi^T pi are stationary for T_c. For very fuzzy affinity single entries may
    come out slightly negative (a DiagnosticWarning says so).

    Parameters
    ----------
    T : array_like, shape (n, n)
        Row-stochastic transition matrix; one step is one lag time.
    pi : array_like, shape (n,)
        Stationary distribution of T.
    affinity : array_like, shape (n, m)
        Non-negative affinity whose rows sum to 1.

    Returns
    -------
    ndarray, shape (m, m)
        Transition probabilities between macrostates per step (same lag as T).

    References
    ----------
    Deuflhard & Weber, Linear Algebra Appl. 398, 161 (2005), Sec. 3; Röblitz & Weber, Adv.
    Data Anal. Classif. 7, 147 (2013), Sec. 2.
    """
    T = as_stochastic_matrix(T)
    pi = as_stationary(pi, T)
    chi = _as_affinity(affinity, T.shape[0])
    return _coarse(T, pi, chi)


def _as_affinity(affinity, n: int) -> np.ndarray:
    try:
        chi = np.array(affinity, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"affinity must be an (n, m) array of numbers, but got {brief(affinity)}") from None
    if chi.ndim != 2 or chi.shape[0] != n or chi.shape[1] < 1:
        raise InputError(f"affinity must have shape ({n}, m): one row per state of T, but has "
                         f"shape {chi.shape}")
    if not np.all(np.isfinite(chi)) or chi.min() < -1e-8:
        raise InputError("affinity must be finite and non-negative")
    dev = np.abs(chi.sum(axis=1) - 1.0)
    if dev.max() > 1e-6:
        raise InputError(f"every row of affinity must sum to 1, but row {int(np.argmax(dev))} sums "
                         f"to {chi[np.argmax(dev)].sum():.6g}")
    return chi


def _coarse(T: np.ndarray, pi: np.ndarray, chi: np.ndarray) -> np.ndarray:
    W = chi * pi[:, None]  # D chi
    overlap = chi.T @ W
    try:
        Tc = la.solve(overlap, W.T @ T @ chi, assume_a="sym")
    except la.LinAlgError:
        raise InputError("the affinity are linearly dependent (two macrostates coincide); "
                         "use fewer macrostates") from None
    if Tc.min() < -1e-8:
        warnings.warn(f"the coarse transition matrix has negative entries (down to {Tc.min():.2g}): "
                      f"the affinity are very fuzzy, so the macrostates are poorly separated",
                      DiagnosticWarning, stacklevel=3)
    return Tc


# --------------------------------------------------------------------------- number of sets

def _timescales_steps(eigenvalues) -> np.ndarray:
    """Real parts sorted largest first -> timescales -1/ln(lambda) in steps (inf at 1, 0 at <= 0)."""
    lam = np.sort(np.real(np.asarray(eigenvalues, dtype=complex)).ravel())[::-1]
    with np.errstate(divide="ignore"):
        t = np.where(lam >= 1.0, np.inf,
                     np.where(lam <= 0.0, 0.0, -1.0 / np.log(np.clip(lam, 1e-300, 1.0 - 1e-16))))
    return t


def _fmt_time(t: float, time_per_step: float, unit: str) -> str:
    return "infinite" if np.isinf(t) else f"{t * time_per_step:.3g} {unit}"


def _as_eigenvalues(eigenvalues) -> np.ndarray:
    try:
        lam = np.asarray(eigenvalues, dtype=complex).ravel()
    except (TypeError, ValueError):
        raise InputError(f"eigenvalues must be an array of numbers, but got {brief(eigenvalues)}") from None
    if lam.size == 0 or not np.all(np.isfinite(lam)):
        raise InputError("eigenvalues must be a non-empty array of finite numbers "
                         "(the leading eigenvalues of T, the first being 1)")
    return lam


def suggest_n_macrostates(eigenvalues, *, max_sets: int = 10, min_timescale: float = 1.0,
                          time_per_step: float = 1.0, unit: str = "step") -> tuple[int, str]:
    """Suggest a number of macrostates from the largest gap in the implied timescales.

    With n macrostates the n - 1 slowest processes happen *between* them; the suggestion is the
    n whose slowest-excluded process is fastest relative to the last included one, i.e. the
    largest ratio t_(n-1) / t_n of consecutive timescales t_k = -tau / ln(lambda_k) (common
    practice; a ratio of timescales does not change with the lag for a Markovian model).
    Only processes slower than ``min_timescale`` steps count as metastable.

    Parameters
    ----------
    eigenvalues : array_like
        Leading eigenvalues of T (the first being 1); real parts are used, sorted largest first.
        Pass at least ``max_sets + 1`` to consider every candidate up to ``max_sets``.
    max_sets : int
        Largest number of macrostates considered (default 10).
    min_timescale : float
        Slowest process between macrostates must exceed this many steps (default 1 lag time).
    time_per_step : float
        Physical duration of one step, for the reason text only.
    unit : str
        Unit of ``time_per_step``.

    Returns
    -------
    n : int
        Suggested number of macrostates (1 when no process is slow enough).
    reason : str
        The gap in plain words, with timescales in ``unit``.
    """
    lam = _as_eigenvalues(eigenvalues)
    if isinstance(max_sets, (bool, np.bool_)) or not isinstance(max_sets, numbers.Integral) or max_sets < 1:
        raise InputError(f"max_sets must be a positive integer, but got {brief(max_sets)}")
    time_per_step, unit = as_time_per_step(time_per_step, unit)
    t = _timescales_steps(lam)
    top = min(int(max_sets), t.size - 1)
    candidates = [n for n in range(2, top + 1) if t[n - 1] > min_timescale]
    if not candidates and t.size == 2 and max_sets >= 2 and t[1] > min_timescale:
        return 2, (f"the model has a single slow process ({_fmt_time(t[1], time_per_step, unit)}), "
                   f"which lies between two macrostates")
    if not candidates:
        if t.size < 2:
            return 1, "only the stationary eigenvalue was given, so there is no process to split by"
        return 1, (f"no process is slower than {min_timescale:g} lag step(s) (the slowest takes "
                   f"{_fmt_time(t[1], time_per_step, unit)}), so the states form one metastable set")
    with np.errstate(divide="ignore", invalid="ignore"):
        ratios = np.array([t[n - 1] / t[n] for n in candidates])
    ratios = np.where(np.isnan(ratios), 1.0, ratios)
    best = int(np.argmax(ratios))
    n = candidates[best]
    ratio = ratios[best]
    gap = "infinitely" if np.isinf(ratio) else f"{ratio:.3g} times"
    reason = (f"the {n - 1} slowest process(es) (down to {_fmt_time(t[n - 1], time_per_step, unit)}) "
              f"are {gap} slower than the next ({_fmt_time(t[n], time_per_step, unit)}), the largest "
              f"gap among 2..{candidates[-1]} macrostates")
    if ratio < 1.5:
        reason += "; the gap is small, so no number of macrostates is clearly separated"
    return n, reason


def check_macrostate_gap(eigenvalues, n_sets: int, *, min_ratio: float = 1.5,
                         time_per_step: float = 1.0, unit: str = "step") -> float:
    """Warn when ``n_sets`` macrostates are not separated from the faster processes by a gap.

    Parameters
    ----------
    eigenvalues : array_like
        Leading eigenvalues of T (at least ``n_sets + 1`` of them); real parts are used.
    n_sets : int
        The number of macrostates requested.
    min_ratio : float
        Smallest acceptable ratio t_(n-1) / t_n of the last included to the first excluded
        timescale (default 1.5, common practice).
    time_per_step, unit
        Physical duration of one step and the unit, for the message.

    Returns
    -------
    float
        The ratio t_(n-1) / t_n (dimensionless; NaN when it cannot be computed: n_sets = 1 or
        too few eigenvalues).

    Warns
    -----
    DiagnosticWarning
        When the ratio is below ``min_ratio``, or when the slowest process between the
        macrostates is faster than one lag step.
    """
    lam = _as_eigenvalues(eigenvalues)
    time_per_step, unit = as_time_per_step(time_per_step, unit)
    if isinstance(n_sets, (bool, np.bool_)) or not isinstance(n_sets, numbers.Integral) or n_sets < 1:
        raise InputError(f"n_sets must be a positive integer, but got {brief(n_sets)}")
    t = _timescales_steps(lam)
    if n_sets == 1 or n_sets >= t.size:
        return float("nan")
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = float(t[n_sets - 1] / t[n_sets])
    if np.isnan(ratio):
        ratio = 1.0
    if t[n_sets - 1] < 1.0:
        warnings.warn(f"{n_sets} macrostates are separated by a process of "
                      f"{_fmt_time(t[n_sets - 1], time_per_step, unit)}, shorter than one lag time: "
                      f"they are not metastable at this lag; use fewer macrostates", DiagnosticWarning,
                      stacklevel=2)
    elif ratio < min_ratio:
        warnings.warn(f"{n_sets} macrostates are not separated by a gap in the timescales: the last "
                      f"process between them ({_fmt_time(t[n_sets - 1], time_per_step, unit)}) is only "
                      f"{ratio:.3g} times slower than the next ({_fmt_time(t[n_sets], time_per_step, unit)}); "
                      f"the macrostates may be fuzzy and sensitive to sampling "
                      f"(see suggest_n_macrostates)", DiagnosticWarning, stacklevel=2)
    return ratio


# --------------------------------------------------------------------------- result

@dataclass(frozen=True, eq=False)
class Macrostates:
    """PCCA+ macrostates of a Markov model.

    Attributes
    ----------
    affinity : ndarray, shape (n, m)
        Membership of state ``states[i]`` in macrostate j (0..1, rows sum to 1). Macrostates
        are ordered by population, largest first.
    states : ndarray of int, shape (n,)
        Original label of each row of ``affinity``.
    equilibrium : ndarray, shape (n,)
    lumped_propagator : ndarray, shape (m, m)
        Transition probabilities between macrostates per step (Galerkin projection).
    eigenvalues : ndarray
        Leading eigenvalues of T (at least m + 1 when m < n; all for a non-reversible T),
        sorted by real part, largest first (real parts).
    crispness : float
        The PCCA+ objective divided by m: 1 for crisp affinity, lower for fuzzier ones.
    time_per_step : float
        Physical duration of one step of T (lag x dt), in ``unit``.
    unit : str
    samples : ModelSamples, optional
        Sampled models of the same states (:func:`msmkit.uncertainty.sample_models`), for the
        intervals of :meth:`populations` and of ``samples.between_sets(members)``.
    propagator : ndarray, shape (n, n), optional
        The microstate matrix, for :meth:`passage_time_table`.
    """

    affinity: np.ndarray = field(repr=False)
    states: np.ndarray = field(repr=False)
    equilibrium: np.ndarray = field(repr=False)
    lumped_propagator: np.ndarray
    eigenvalues: np.ndarray = field(repr=False)
    crispness: float
    time_per_step: float = 1.0
    unit: str = "step"
    samples: object = field(default=None, repr=False)
    propagator: np.ndarray | None = field(default=None, repr=False)

    @property
    def n_sets(self) -> int:
        """Number of macrostates m."""
        return self.affinity.shape[1]

    @property
    def stationary_populations(self) -> np.ndarray:
        """Population of each macrostate, sum_i pi_i chi_ij (dimensionless, sums to 1)."""
        return self.equilibrium @ self.affinity

    @property
    def macro_index(self) -> np.ndarray:
        """Macrostate of largest membership for each row (aligned with ``states``)."""
        return np.argmax(self.affinity, axis=1)

    @property
    def macro_of(self) -> dict[int, int]:
        """{original label: macrostate of largest membership} for every state."""
        return {int(s): int(j) for s, j in zip(self.states, self.macro_index)}

    @property
    def members(self) -> list[np.ndarray]:
        """Original labels of the states assigned (by largest membership) to each macrostate."""
        crisp = self.macro_index
        return [self.states[crisp == j] for j in range(self.n_sets)]

    def populations(self, *, confidence: float = 0.95, temperature: float | None = None):
        """Macrostate populations as a pandas DataFrame.

        Columns: ``macrostate``, ``population`` (sum of pi weighted by affinity),
        ``free_energy_kT`` (-ln of the population relative to the most populated macrostate,
        in units of kT), ``free_energy_kJ_per_mol`` when ``temperature`` (kelvin) is given,
        ``states`` (labels assigned by largest membership), and ``population_lower`` /
        ``population_upper`` (interval at ``confidence``, affinity held fixed; see
        :meth:`msmkit.uncertainty.ModelSamples.macro_populations`) when ``samples`` are present.
        """
        import pandas as pd

        p = self.stationary_populations
        with np.errstate(divide="ignore"):
            g = np.log(p.max() / p)
        data = {"macrostate": np.arange(self.n_sets), "population": p, "free_energy_kT": g}
        if temperature is not None:
            if isinstance(temperature, (bool, np.bool_)) or not isinstance(temperature, numbers.Real) \
                    or not np.isfinite(temperature) or temperature <= 0:
                raise InputError(f"temperature must be a positive number in kelvin, but got "
                                 f"{brief(temperature)}")
            data["free_energy_kJ_per_mol"] = g * _R_KJ * float(temperature)
        data["states"] = [tuple(int(x) for x in s) for s in self.members]
        if self.samples is not None:
            interval = self.samples.macro_populations(self, confidence=confidence)
            data["population_lower"] = interval["lower"].to_numpy()
            data["population_upper"] = interval["upper"].to_numpy()
        return pd.DataFrame(data)

    def affinity_table(self):
        """Memberships as a pandas DataFrame: one row per state (index = original label),
        one column per macrostate."""
        import pandas as pd

        return pd.DataFrame(self.affinity, index=pd.Index(self.states, name="state"),
                            columns=pd.Index(np.arange(self.n_sets), name="macrostate"))

    def passage_time_table(self):
        """Mean first-passage times between macrostates (crisp sets), in ``unit``.

        Row a, column b: mean time to first enter macrostate b from macrostate a, starting from
        the stationary distribution inside a (Kemeny & Snell 1960). Needs ``propagator``.

        The times are computed at lag resolution: the model sees the dynamics every
        ``time_per_step`` (one lag) only, so they are resolved to about one lag and tend to
        come out too long when the lag is not small against them (see
        :func:`msmkit.kinetics.mean_passage_time`). ``df.attrs`` holds ``unit``,
        ``resolution`` (the lag time, in ``unit``) and ``caption`` saying so in words.
        """
        import pandas as pd

        if self.propagator is None:
            raise InputError("passage_time_table needs the transition matrix; build the macrostates with "
                             "find_macrostates (or model.macrostates)")
        crisp = self.macro_index
        sets = [np.flatnonzero(crisp == j) for j in range(self.n_sets)]
        if any(s.size == 0 for s in sets):
            empty = [j for j, s in enumerate(sets) if s.size == 0]
            raise InputError(f"macrostate(s) {empty} hold no state by largest membership, so their "
                             f"first-passage times are undefined; use fewer macrostates")
        M = passage_time_matrix(self.propagator, self.equilibrium, sets,
                        states=self.states, time_per_step=self.time_per_step)
        idx = pd.Index(np.arange(self.n_sets), name="from")
        df = pd.DataFrame(M, index=idx, columns=pd.Index(np.arange(self.n_sets), name="to"))
        df.attrs.update(unit=self.unit, resolution=float(self.time_per_step),
                        caption=f"Mean first-passage times between macrostates in {self.unit}, computed at lag "
                                f"resolution ({self.time_per_step:g} {self.unit}): passages are seen at multiples "
                                f"of the lag only, so times are resolved to about one lag and tend to come out "
                                f"too long when the lag is not small against them.")
        return df

    def kinetics_table(self, *, confidence: float = 0.95):
        """Mean first-passage times and rate constants between every ordered pair of macrostates
        (crisp sets, by largest membership).

        With :attr:`samples` the table comes with intervals
        (:meth:`msmkit.uncertainty.ModelSamples.between_sets`); without, it holds the estimates
        alone. Columns ``from_set``, ``to_set``, ``passage_time`` (in ``unit``, at lag
        resolution, see :meth:`passage_time_table`) and ``rate_constant`` (transition path
        theory, in 1/``unit``), with ``*_lower`` / ``*_upper`` when sampled; ``attrs`` holds
        ``unit``, ``rate_unit``, ``resolution`` and ``caption``.
        """
        import pandas as pd

        if self.samples is not None:
            return self.samples.between_sets(self.members, confidence=confidence)
        mfpt = self.passage_time_table()
        crisp = self.macro_index
        pairs = [(a, b) for a in range(self.n_sets) for b in range(self.n_sets) if a != b]
        rates = [transition_paths(self.propagator, self.equilibrium, crisp == a, crisp == b, states=self.states,
                                  time_per_step=self.time_per_step, unit=self.unit).rate_constant for a, b in pairs]
        table = pd.DataFrame({"from_set": [a for a, _ in pairs], "to_set": [b for _, b in pairs],
                              "passage_time": [mfpt.iloc[a, b] for a, b in pairs], "rate_constant": rates})
        table.attrs.update(mfpt.attrs, rate_unit=f"1/{self.unit}")
        table.attrs["caption"] += " Rate constants (per " + self.unit + ") from transition path theory. No intervals: " \
                                  "the macrostates were found without sampled models."
        return table


def find_macrostates(T, pi, n_sets: int, *, states=None, time_per_step: float = 1.0,
                     unit: str = "step", reversible: bool | None = None, optimize: bool = True,
                     samples=None) -> Macrostates:
    """PCCA+ macrostates of a transition matrix, with the coarse matrix and gap check.

    Parameters
    ----------
    T : array_like, shape (n, n)
        Row-stochastic transition matrix of an irreducible chain; one step is one lag time.
    pi : array_like, shape (n,)
        Stationary distribution of T.
    n_sets : int
        Number of macrostates, 1 <= n_sets <= n.
    states : array_like of int, shape (n,), optional
        Original label of each row (default 0..n-1).
    time_per_step : float
        Physical duration of one step (lag x dt). Default 1.
    unit : str
        Unit of ``time_per_step``. Default "step".
    reversible : bool, optional
        Symmetric eigenproblem; default: test detailed balance.
    optimize : bool
        Optimize the PCCA+ crispness objective (default True).
    samples : ModelSamples, optional
        Sampled models of the same states (:func:`msmkit.uncertainty.sample_models`), giving
        the populations intervals.

    Returns
    -------
    Macrostates

    Warns
    -----
    DiagnosticWarning
        When ``n_sets`` is not separated from faster processes by a timescale gap
        (:func:`check_macrostate_gap`), or the leading eigenvalues are degenerate.

    References
    ----------
    Deuflhard & Weber, Linear Algebra Appl. 398, 161 (2005); Röblitz & Weber, Adv. Data Anal.
    Classif. 7, 147 (2013).

    Examples
    --------
    >>> import numpy as np
    >>> T = np.array([[0.90, 0.09, 0.01, 0.00],
    ...               [0.09, 0.90, 0.00, 0.01],
    ...               [0.01, 0.00, 0.90, 0.09],
    ...               [0.00, 0.01, 0.09, 0.90]])
    >>> macro = find_macrostates(T, np.full(4, 0.25), 2, states=[10, 11, 20, 21])
    >>> sorted(s.tolist() for s in macro.members)
    [[10, 11], [20, 21]]
    >>> macro.lumped_propagator.round(3)
    array([[0.99, 0.01],
           [0.01, 0.99]])
    """
    T, pi, n_sets, reversible = _gates(T, pi, n_sets, reversible)
    labels = as_state_labels(states, T.shape[0])
    time_per_step, unit = as_time_per_step(time_per_step, unit)
    if samples is not None:
        owner = getattr(getattr(samples, "model", None), "states", None)
        if owner is None or not np.array_equal(np.asarray(owner), labels):
            raise InputError("samples must be drawn (msmkit.sample_models) for a model of these states, but their "
                             "states differ from states")
    chi, eig, crisp = _pcca(T, pi, n_sets, reversible, optimize)
    check_macrostate_gap(eig, n_sets, time_per_step=time_per_step, unit=unit)
    Tc = _coarse(T, pi, chi)
    return Macrostates(affinity=chi, states=labels, equilibrium=pi,
                       lumped_propagator=Tc, eigenvalues=np.real(eig), crispness=crisp,
                       time_per_step=time_per_step, unit=unit, samples=samples,
                       propagator=T)
