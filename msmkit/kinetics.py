"""Kinetics of a Markov chain: mean first-passage times, committors, reactive flux, routes.

First-passage times are computed at lag resolution: one step of ``T`` is one lag time, so
passages are seen at multiples of the lag only (see :func:`mean_passage_time`).

Every function here works on plain arrays: a row-stochastic transition matrix ``T`` (one row
per state of the kept set, one step = one lag time), the stationary distribution ``pi`` and
sets of states given as *positions* (row indices) in ``T``. Results meant for people report
states by their original label (the ``states`` argument, default ``0..n-1``) and times in
physical units (``time_per_step`` = lag x dt, in ``unit``).

References
----------
Kemeny & Snell, Finite Markov Chains, Van Nostrand (1960): first-passage times and the
fundamental matrix.
E & Vanden-Eijnden, J. Stat. Phys. 123, 503 (2006): transition path theory.
Metzner, Schütte & Vanden-Eijnden, Multiscale Model. Simul. 7, 1192 (2009): transition path
theory for Markov jump processes and chains; reactive flux, rate, pathway decomposition.
Noé, Schütte, Vanden-Eijnden, Reich & Weikl, PNAS 106, 19011 (2009): folding routes from
the net flux of a Markov model.
"""
from __future__ import annotations

import numbers
import warnings
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg as la
import scipy.sparse as sp

from ._checks import as_transition_matrix, brief, check_bool
from .defaults import ROUTE_SHARE
from .errors import DiagnosticWarning, InputError

__all__ = [
    "Route",
    "TransitionPaths",
    "committor",
    "mean_passage_time",
    "passage_time_matrix",
    "hitting_steps",
    "transition_paths",
]

#: tolerance on row sums of T and on the normalization / stationarity of pi
_STOCHASTIC_TOL = 1e-6
#: routes found at most when no ``max_paths`` is given (a DiagnosticWarning says when hit)
DEFAULT_MAX_PATHS = 1000


# --------------------------------------------------------------------------- input gates
# Each public function converts its inputs here once; the helpers below trust them.

def as_stochastic_matrix(T, name: str = "T") -> np.ndarray:
    """``T`` checked as a square row-stochastic matrix (InputError naming ``name`` if not)."""
    return as_transition_matrix(T, name, tol=_STOCHASTIC_TOL)


def as_stationary(pi, T: np.ndarray, name: str = "pi") -> np.ndarray:
    """The stationary distribution of ``T``: positive, summing to 1, with pi T = pi."""
    try:
        arr = np.array(pi, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a 1-D array of stationary probabilities, "
                         f"but got {brief(pi)}") from None
    n = T.shape[0]
    if arr.shape != (n,):
        raise InputError(f"{name} must have one entry per state of T (shape ({n},)), "
                         f"but has shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{name} holds NaN or infinite entries")
    if arr.min() <= 0:
        bad = np.flatnonzero(arr <= 0)
        raise InputError(f"{name} must be strictly positive (the chain must be irreducible), but "
                         f"{name}[{int(bad[0])}] = {arr[bad[0]]:.3g} ({bad.size} entries <= 0); "
                         f"restrict T to a strongly connected set")
    if abs(arr.sum() - 1.0) > _STOCHASTIC_TOL:
        raise InputError(f"{name} must sum to 1, but sums to {arr.sum():.6g}")
    arr = arr / arr.sum()
    residual = np.max(np.abs(arr @ T - arr))
    if residual > _STOCHASTIC_TOL:
        raise InputError(f"{name} is not the stationary distribution of T: max |{name} T - {name}| = "
                         f"{residual:.3g}; pass the stationary distribution of this matrix")
    return arr


def as_state_labels(labels, n: int) -> np.ndarray:
    """Original labels of the n rows of T (default 0..n-1): distinct integers."""
    if labels is None:
        return np.arange(n, dtype=np.int64)
    arr = np.asarray(labels)
    if arr.shape != (n,) or (arr.size and arr.dtype.kind not in "iu"):
        raise InputError(f"states must be {n} integer state labels (one per row of T), "
                         f"but got {brief(labels)}")
    if np.unique(arr).size != n:
        raise InputError("states must be distinct: each row of T is one state")
    return arr.astype(np.int64)


def _as_index_set(states, name: str, n: int) -> np.ndarray:
    """A non-empty set of row positions in [0, n): sorted unique int64.

    Accepts one integer, a sequence of integers, or a boolean mask of length n.
    """
    if isinstance(states, (numbers.Integral, np.integer)) and not isinstance(states, (bool, np.bool_)):
        states = [states]
    try:
        arr = np.asarray(states)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a list of state positions, but got {brief(states)}") from None
    if arr.dtype == bool:
        if arr.shape != (n,):
            raise InputError(f"{name} as a boolean mask must have length {n}, but has shape {arr.shape}")
        arr = np.flatnonzero(arr)
    arr = arr.ravel()
    if arr.size == 0:
        raise InputError(f"{name} is empty: give at least one state")
    if arr.dtype.kind not in "iu":
        if arr.dtype.kind == "f" and np.all(np.isfinite(arr)) and np.all(arr == np.round(arr)):
            arr = arr.astype(np.int64)
        else:
            raise InputError(f"{name} must hold integer state positions, but got {brief(states)}")
    if arr.min() < 0 or arr.max() >= n:
        bad = arr[(arr < 0) | (arr >= n)]
        raise InputError(f"{name} holds position(s) {', '.join(map(str, bad[:10]))} outside the "
                         f"{n} states of T (valid: 0..{n - 1})")
    return np.unique(arr).astype(np.int64)


def _check_disjoint(a: np.ndarray, b: np.ndarray, names: tuple[str, str], labels: np.ndarray) -> None:
    common = np.intersect1d(a, b)
    if common.size:
        shown = ", ".join(str(int(x)) for x in labels[common[:10]]) + (" ..." if common.size > 10 else "")
        raise InputError(f"{names[0]} and {names[1]} must not share states, but both contain state(s) "
                         f"{shown}; remove them from one of the two sets")


def _source_and_target(source, target, n: int, labels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Source and target as non-empty, disjoint index sets (errors name states by label)."""
    source = _as_index_set(source, "source", n)
    target = _as_index_set(target, "target", n)
    _check_disjoint(source, target, ("source", "target"), labels)
    return source, target


def as_time_per_step(time_per_step, unit) -> tuple[float, str]:
    """The lag time (finite, > 0) and the name of the time unit (non-empty), checked."""
    if isinstance(time_per_step, (bool, np.bool_)) or not isinstance(time_per_step, numbers.Real) \
            or not np.isfinite(time_per_step) or time_per_step <= 0:
        raise InputError(f"time_per_step (the lag time lag x dt) must be a finite positive number, "
                         f"but got {brief(time_per_step)}")
    if not isinstance(unit, str) or not unit.strip():
        raise InputError(f"unit must be a non-empty string naming the time unit (e.g. 'ns'), "
                         f"but got {brief(unit)}")
    return float(time_per_step), unit.strip()


def _mask(n: int, *sets: np.ndarray) -> np.ndarray:
    m = np.zeros(n, dtype=bool)
    for s in sets:
        m[s] = True
    return m


# --------------------------------------------------------------------------- helpers

def _surely_hits(T: np.ndarray, absorbing: np.ndarray) -> np.ndarray:
    """States from which the chain enters ``absorbing`` (bool mask) with probability 1.

    A state fails when it cannot reach the set at all, or when it can reach (avoiding the
    set) a state that cannot. Two breadth-first sweeps over the reversed graph of T.
    """
    adj = T > 0
    reach = absorbing.copy()
    frontier = absorbing.copy()
    while frontier.any():
        new = adj[:, frontier].any(axis=1) & ~reach
        reach |= new
        frontier = new
    bad = ~reach
    frontier = bad.copy()
    while frontier.any():
        new = adj[:, frontier].any(axis=1) & ~bad & ~absorbing
        bad |= new
        frontier = new
    return ~bad


def _time_reversed(T: np.ndarray, pi: np.ndarray) -> np.ndarray:
    """The time-reversed chain R_ij = pi_j T_ji / pi_i (equal to T when T obeys detailed balance)."""
    return T.T * pi[None, :] / pi[:, None]


def _mfpt_steps(T: np.ndarray, target_mask: np.ndarray) -> np.ndarray:
    """Trusting helper of :func:`hitting_steps`: m_i in steps, 0 on the target, inf if unreachable."""
    n = T.shape[0]
    m = np.full(n, np.inf)
    m[target_mask] = 0.0
    free = _surely_hits(T, target_mask) & ~target_mask
    if free.any():
        idx = np.flatnonzero(free)
        A = np.eye(idx.size) - T[np.ix_(idx, idx)]
        m[idx] = la.solve(A, np.ones(idx.size))
    return m


def _committor_forward(T: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Probability of entering set ``b`` before set ``a`` (bool masks); NaN where neither is reached."""
    n = T.shape[0]
    q = np.zeros(n)
    q[b] = 1.0
    ends = a | b
    ok = _surely_hits(T, ends)
    free = ok & ~ends
    stuck = ~ok
    if free.any():
        idx = np.flatnonzero(free)
        A = np.eye(idx.size) - T[np.ix_(idx, idx)]
        rhs = T[np.ix_(idx, np.flatnonzero(b))].sum(axis=1)
        q[idx] = np.clip(la.solve(A, rhs), 0.0, 1.0)
    if stuck.any():
        q[stuck] = np.nan
        warnings.warn(f"{int(stuck.sum())} state(s) reach neither the source nor the target set with "
                      "certainty; their committor is undefined (NaN). Is T irreducible?",
                      DiagnosticWarning, stacklevel=3)
    return q


# --------------------------------------------------------------------------- first passage

def hitting_steps(T, target) -> np.ndarray:
    """Mean first-passage time from every state to a target set, in steps of the chain.

    Solves (I - T_cc) m_c = 1 on the complement c of the target, with m = 0 on the target
    (Kemeny & Snell 1960, Sec. 4.4). A state that does not reach the target with probability 1
    gets ``inf``.

    Parameters
    ----------
    T : array_like, shape (n, n)
        Row-stochastic transition matrix; one step is one lag time.
    target : int, sequence of int or boolean mask
        Positions (row indices) of the target states.

    Returns
    -------
    ndarray, shape (n,)
        Mean number of steps until the chain first enters the target set (unit: steps; multiply
        by the lag time lag x dt for physical time). Zero on the target states.

    Notes
    -----
    Computed at lag resolution: a model at lag tau sees the trajectory only every tau, so a passage counts
    when the target is occupied at a multiple of tau; visits shorter than the lag are missed
    and the result is a multiple-of-tau view of the dynamics. Mean first-passage times from a
    model at lag tau are therefore resolved only to about tau and tend to come out too long
    (by a lag or more when the lag is not small against the time itself); compare the values
    of models at several lags before quoting one.

    Examples
    --------
    >>> hitting_steps([[0.9, 0.1], [0.5, 0.5]], [1])
    array([10.,  0.])
    """
    T = as_stochastic_matrix(T)
    target = _as_index_set(target, "target", T.shape[0])
    return _mfpt_steps(T, _mask(T.shape[0], target))


def mean_passage_time(T, pi, source, target, *, states=None, time_per_step: float = 1.0) -> float:
    """Mean first-passage time from a source set to a target set.

    The first-passage times of the source states are averaged with their stationary weights
    inside the source set: sum_{i in A} pi_i m_i / sum_{i in A} pi_i.

    Parameters
    ----------
    T : array_like, shape (n, n)
        Row-stochastic transition matrix; one step is one lag time.
    pi : array_like, shape (n,)
        Stationary distribution of T (positive, sums to 1).
    source, target : int, sequence of int or boolean mask
        Positions (row indices) of the two disjoint, non-empty sets.
    states : array_like of int, shape (n,), optional
        Original label of every row, used in error messages (default 0..n-1).
    time_per_step : float
        Physical duration of one step (lag x dt); the result is in the same unit. Default 1 (steps).

    Returns
    -------
    float
        Mean first-passage time in the unit of ``time_per_step`` (``inf`` if the target is not
        reached with certainty), resolved only to one step (the lag; see Notes).

    Notes
    -----
    Computed at lag resolution, like :func:`hitting_steps` (see the Notes there): resolved only to
    about one lag tau, and too long by up to a lag or more; compare models at several lags.

    References
    ----------
    Kemeny & Snell, Finite Markov Chains (1960), Sec. 4.4.
    """
    T = as_stochastic_matrix(T)
    n = T.shape[0]
    pi = as_stationary(pi, T)
    labels = as_state_labels(states, n)
    time_per_step, _ = as_time_per_step(time_per_step, "step")
    source, target = _source_and_target(source, target, n, labels)
    m = _mfpt_steps(T, _mask(n, target))
    w = pi[source]
    return float(time_per_step * (w @ m[source]) / w.sum())


def passage_time_matrix(T, pi, sets, *, states=None, time_per_step: float = 1.0) -> np.ndarray:
    """Mean first-passage times between every pair of disjoint sets (macrostates, say).

    Entry (a, b) is the mean first-passage time from set a (averaged with stationary weights
    inside a) into set b; the diagonal is 0.

    Parameters
    ----------
    T : array_like, shape (n, n)
        Row-stochastic transition matrix; one step is one lag time.
    pi : array_like, shape (n,)
        Stationary distribution of T.
    sets : sequence of (sequence of int or boolean mask)
        k pairwise disjoint, non-empty sets of row positions.
    states : array_like of int, shape (n,), optional
        Original label of every row, used in error messages.
    time_per_step : float
        Physical duration of one step; the result is in the same unit. Default 1 (steps).

    Returns
    -------
    ndarray, shape (k, k)
        Mean first-passage times in the unit of ``time_per_step``, resolved only to one step
        (the lag; see Notes).

    Notes
    -----
    Computed at lag resolution, like :func:`hitting_steps` (see the Notes there): resolved only to
    about one lag tau, and too long by up to a lag or more; compare models at several lags.

    References
    ----------
    Kemeny & Snell, Finite Markov Chains (1960), Sec. 4.4.
    """
    T = as_stochastic_matrix(T)
    n = T.shape[0]
    pi = as_stationary(pi, T)
    labels = as_state_labels(states, n)
    time_per_step, _ = as_time_per_step(time_per_step, "step")
    if isinstance(sets, np.ndarray) and sets.ndim == 1 and sets.dtype.kind in "iu":
        raise InputError("sets must be a list of sets of states (e.g. [[0, 1], [5]]), "
                         "not a flat array of states")
    try:
        sets = [_as_index_set(s, f"sets[{i}]", n) for i, s in enumerate(sets)]
    except TypeError:
        raise InputError(f"sets must be a list of sets of states, but got {brief(sets)}") from None
    if not sets:
        raise InputError("sets is empty: give at least one set of states")
    for a in range(len(sets)):
        for b in range(a + 1, len(sets)):
            _check_disjoint(sets[a], sets[b], (f"sets[{a}]", f"sets[{b}]"), labels)
    k = len(sets)
    out = np.zeros((k, k))
    for b in range(k):
        m = _mfpt_steps(T, _mask(n, sets[b]))
        for a in range(k):
            if a != b:
                w = pi[sets[a]]
                out[a, b] = (w @ m[sets[a]]) / w.sum()
    return time_per_step * out


# --------------------------------------------------------------------------- committors

def splitting_probability(T, source, target, *, reverse_time: bool = False, pi=None, states=None) -> np.ndarray:
    """Committor, forward or backward in time, between two disjoint sets of states.

    The committor q+_i (forward in time) is the probability that the chain, started in state i, enters
    the target before the source (0 on the source, 1 on the target). The counterpart backward in time,
    q-_i, is the probability that the chain, observed in state i, came last from the source
    rather than the target (1 on the source, 0 on the target); it is the committor q+ of
    the time-reversed chain pi_j T_ji / pi_i towards the source, and equals 1 - q+ for a
    reversible chain.

    Parameters
    ----------
    T : array_like, shape (n, n)
        Row-stochastic transition matrix.
    source, target : int, sequence of int or boolean mask
        Positions (row indices) of two disjoint, non-empty sets (A and B).
    reverse_time : bool
        Return the committor backward in time q- instead of the forward one.
    pi : array_like, shape (n,), optional
        Stationary distribution of T; required for ``reverse_time=True``.
    states : array_like of int, shape (n,), optional
        Original label of every row, used in error messages.

    Returns
    -------
    ndarray, shape (n,)
        Probabilities (dimensionless) in [0, 1]; NaN for states that reach neither set with
        certainty (only possible for a reducible T; a DiagnosticWarning says so).

    References
    ----------
    E & Vanden-Eijnden, J. Stat. Phys. 123, 503 (2006); Metzner, Schütte & Vanden-Eijnden,
    Multiscale Model. Simul. 7, 1192 (2009), Sec. 3.

    Examples
    --------
    >>> import numpy as np
    >>> T = np.array([[0.90, 0.09, 0.01, 0.00],
    ...               [0.09, 0.90, 0.00, 0.01],
    ...               [0.01, 0.00, 0.90, 0.09],
    ...               [0.00, 0.01, 0.09, 0.90]])
    >>> splitting_probability(T, [0], [3]).round(3)
    array([0. , 0.1, 0.9, 1. ])
    """
    T = as_stochastic_matrix(T)
    reverse_time = check_bool(reverse_time, "reverse_time")
    n = T.shape[0]
    labels = as_state_labels(states, n)
    source, target = _source_and_target(source, target, n, labels)
    a, b = _mask(n, source), _mask(n, target)
    if not reverse_time:
        return _committor_forward(T, a, b)
    if pi is None:
        raise InputError("pi (the stationary distribution) is required for the committor backward in time "
                         "(reverse_time=True), which uses the time-reversed chain")
    pi = as_stationary(pi, T)
    return _committor_forward(_time_reversed(T, pi), b, a)


# --------------------------------------------------------------------------- reactive flux

@dataclass(frozen=True)
class Route:
    """One A -> B pathway of a net-flux decomposition.

    Attributes
    ----------
    states : tuple of int
        Original labels of the states along the path, from a source state to a target state.
    flux : float
        Reactive flux carried by the path (probability per step, like the entries of T).
    share : float
        Fraction of the total A -> B flux carried by the path (dimensionless, 0..1).
    """

    states: tuple
    flux: float
    share: float


@dataclass(frozen=True, eq=False)
class TransitionPaths:
    """Transition path theory between a source set A and a target set B.

    Matrices and per-state vectors are indexed like the transition matrix: row/column i is the
    state with original label ``states[i]``. Tables and routes name states by label.

    Attributes
    ----------
    source, target : ndarray of int
        Original labels of the states of A and B.
    states : ndarray of int, shape (n,)
        Original label of each row of the matrices below.
    equilibrium : ndarray, shape (n,)
    reach_target, came_from_source : ndarray, shape (n,)
        q+ (probability to reach B before A) and q- (probability to have come last from A).
    reactive_current : ndarray, shape (n, n)
        f_ij = pi_i q-_i T_ij q+_j for i != j: probability per step of a reactive i -> j jump.
    net_current : ndarray, shape (n, n)
        max(f_ij - f_ji, 0), probability per step.
    throughput : float
        Reactive A -> B events per step: the net flux out of A (= into B).
    rate : float
        A -> B rate constant k_AB = F / (tau sum_i pi_i q-_i), in 1/``unit``.
    time_per_step : float
        Physical duration tau of one step (lag x dt).
    unit : str
        Time unit of ``time_per_step``.

    References
    ----------
    Metzner, Schütte & Vanden-Eijnden, Multiscale Model. Simul. 7, 1192 (2009);
    Noé et al., PNAS 106, 19011 (2009).
    """

    source: np.ndarray
    target: np.ndarray
    states: np.ndarray
    equilibrium: np.ndarray = field(repr=False)
    reach_target: np.ndarray = field(repr=False)
    came_from_source: np.ndarray = field(repr=False)
    reactive_current: np.ndarray = field(repr=False)
    net_current: np.ndarray = field(repr=False)
    throughput: float
    rate_constant: float
    time_per_step: float = 1.0
    unit: str = "step"

    @property
    def event_frequency(self) -> float:
        """Reactive A -> B events per unit of time (total flux / tau), in 1/``unit``."""
        return self.throughput / self.time_per_step

    @property
    def mean_time_between_events(self) -> float:
        """Mean time between two consecutive A -> B events (tau / total flux), in ``unit``."""
        return np.inf if self.throughput == 0 else self.time_per_step / self.throughput

    def lump(self, sets) -> "TransitionPaths":
        """The current lumped onto sets of states (e.g. macrostates), as a flux between the sets.

        The reactive current between sets I and J is the sum of f_ij over i in I, j in J; the net flux is
        max(F_IJ - F_JI, 0); committors are averaged with the stationary weights inside each
        set (Noé et al., PNAS 106, 19011 (2009)). Total flux and rate are unchanged. Pathways
        of the result run through sets: ``states`` of the result are the set numbers 0..k-1.

        Parameters
        ----------
        sets : list of lists of int
            Disjoint sets of original labels covering every state; the source and the target
            must each be a union of whole sets.

        Returns
        -------
        TransitionPaths
        """
        n = len(self.states)
        index = {int(lab): i for i, lab in enumerate(self.states)}
        owner = np.full(n, -1)
        for k, members in enumerate(sets):
            members = [members] if isinstance(members, (numbers.Integral, np.integer)) else list(members)
            if not members:
                raise InputError(f"sets[{k}] is empty")
            for lab in members:
                i = index.get(int(lab))
                if i is None:
                    raise InputError(f"sets[{k}] names label {int(lab)}, which is not a state of this flux")
                if owner[i] >= 0:
                    raise InputError(f"label {int(lab)} is in both sets[{owner[i]}] and sets[{k}]; sets must be "
                                     f"disjoint")
                owner[i] = k
        if np.any(owner < 0):
            missing = self.states[owner < 0][:8].tolist()
            raise InputError(f"sets must cover every state; missing labels {missing}")
        k = len(sets)
        lump = np.zeros((n, k))
        lump[np.arange(n), owner] = 1.0
        src = np.array([index[int(x)] for x in self.source])
        tgt = np.array([index[int(x)] for x in self.target])
        src_sets, tgt_sets = np.unique(owner[src]), np.unique(owner[tgt])
        for name, ids, members in (("source", src_sets, src), ("target", tgt_sets, tgt)):
            whole = np.flatnonzero(np.isin(owner, ids))
            if whole.size != members.size:
                raise InputError(f"the {name} must be a union of whole sets, but sets {ids.tolist()} hold states "
                                 f"outside it")
        gross = lump.T @ self.reactive_current @ lump
        np.fill_diagonal(gross, 0.0)
        pi = lump.T @ self.equilibrium
        with np.errstate(invalid="ignore", divide="ignore"):
            qf = lump.T @ (self.equilibrium * self.reach_target) / pi
            qb = lump.T @ (self.equilibrium * self.came_from_source) / pi
        return TransitionPaths(src_sets, tgt_sets, np.arange(k), pi, qf, qb, gross, np.maximum(gross - gross.T, 0.0),
                            self.throughput, self.rate_constant, self.time_per_step, self.unit)

    def routes(self, fraction: float = ROUTE_SHARE, *, max_paths: int | None = None) -> list[Route]:
        """Decompose the net flux into A -> B routes, strongest first.

        Repeatedly finds the path whose smallest net-flux edge (the bottleneck) is largest,
        records that bottleneck flux for the path and subtracts it from every edge along the
        path, until the recorded paths carry ``fraction`` of the total flux, ``max_paths``
        paths are found, or no path is left (Metzner, Schütte & Vanden-Eijnden 2009, Sec. 6;
        Noé et al. 2009).

        Parameters
        ----------
        fraction : float
            Stop once the paths found carry this share of the total flux (0 < fraction <= 1;
            1 decomposes the flux completely).
        max_paths : int, optional
            Stop after this many paths. Default: no limit other than ``fraction``, but at most
            ``DEFAULT_MAX_PATHS`` (1000), with a DiagnosticWarning if that stops the search
            early (a widely branched flux can need very many paths to reach a high fraction).

        Returns
        -------
        list of Route
            States as original labels; ``flux`` per step; ``share`` of the total flux.

        Notes
        -----
        Each path costs one widest-path search over the edges of the net flux, and every path
        removes at least one edge, so a complete decomposition needs at most as many paths as
        the net flux has edges.
        """
        if isinstance(fraction, (bool, np.bool_)) or not isinstance(fraction, numbers.Real) \
                or not 0 < fraction <= 1:
            raise InputError(f"fraction must be a number in (0, 1] (the share of the total flux to "
                             f"explain), but got {brief(fraction)}")
        if max_paths is not None:
            if isinstance(max_paths, (bool, np.bool_)) or not isinstance(max_paths, numbers.Integral) \
                    or max_paths < 1:
                raise InputError(f"max_paths must be a positive integer or None, but got {brief(max_paths)}")
        index = {int(lab): i for i, lab in enumerate(self.states)}
        a = _mask(len(self.states), np.array([index[int(x)] for x in self.source]))
        b = _mask(len(self.states), np.array([index[int(x)] for x in self.target]))
        limit = DEFAULT_MAX_PATHS if max_paths is None else int(max_paths)
        found = _decompose(self.net_current, a, b, fraction * self.throughput, limit)
        total = self.throughput
        carried = sum(f for _, f in found)
        if max_paths is None and len(found) == limit and carried < fraction * total * (1 - 1e-9):
            warnings.warn(f"stopped after {limit} routes carrying {carried / total:.1%} of the "
                          f"reactive flux (asked for {fraction:.1%}); the flux is widely branched. "
                          f"Pass max_paths= to look further or a smaller fraction",
                          DiagnosticWarning, stacklevel=2)
        return [Route(tuple(int(self.states[i]) for i in path), float(f),
                        float(f / total) if total > 0 else 0.0) for path, f in found]

    def routes_table(self, fraction: float = ROUTE_SHARE, *, max_paths: int | None = None):
        """The routes of :meth:`routes` as a pandas DataFrame.

        Columns: ``pathway`` (1 = strongest), ``states`` (tuple of original labels), ``length``
        (number of jumps), ``flux`` (per step), ``share`` and ``cumulative_share`` of the total
        flux (0..1).
        """
        import pandas as pd

        paths = self.routes(fraction, max_paths=max_paths)
        shares = np.array([p.share for p in paths])
        return pd.DataFrame({
            "pathway": np.arange(1, len(paths) + 1),
            "states": [p.states for p in paths],
            "length": [len(p.states) - 1 for p in paths],
            "flux": [p.flux for p in paths],
            "share": shares,
            "cumulative_share": np.cumsum(shares),
        })

    def current_table(self, min_share: float = 0.0):
        """Edges of the net flux as a pandas DataFrame, largest first.

        Columns: ``from_state``, ``to_state`` (original labels), ``net_current`` (per step) and
        ``share`` (of the total flux). Edges with a share below ``min_share`` are left out.
        """
        import pandas as pd

        i, j = np.nonzero(self.net_current)
        f = self.net_current[i, j]
        share = f / self.throughput if self.throughput > 0 else np.zeros_like(f)
        keep = share >= min_share
        order = np.argsort(-f[keep], kind="stable")
        return pd.DataFrame({
            "from_state": self.states[i[keep][order]],
            "to_state": self.states[j[keep][order]],
            "net_current": f[keep][order],
            "share": share[keep][order],
        })


def transition_paths(T, pi, source, target, *, states=None, time_per_step: float = 1.0,
                  unit: str = "step") -> TransitionPaths:
    """Reactive flux from a source set A to a target set B (transition path theory).

    Parameters
    ----------
    T : array_like, shape (n, n)
        Row-stochastic transition matrix; one step is one lag time.
    pi : array_like, shape (n,)
        Stationary distribution of T.
    source, target : int, sequence of int or boolean mask
        Positions (row indices) of the disjoint, non-empty sets A and B.
    states : array_like of int, shape (n,), optional
        Original label of each row (default 0..n-1); results report states by these labels.
    time_per_step : float
        Physical duration tau of one step (lag x dt). Default 1.
    unit : str
        Unit of ``time_per_step``. Default "step".

    Returns
    -------
    TransitionPaths
        Committors, gross and net flux (per step), total flux (per step), the rate
        k_AB = F / (tau sum_i pi_i q-_i) (per ``unit``) and the pathway decomposition.

    References
    ----------
    Metzner, Schütte & Vanden-Eijnden, Multiscale Model. Simul. 7, 1192 (2009), Secs. 3-4;
    Noé et al., PNAS 106, 19011 (2009).

    Examples
    --------
    >>> import numpy as np
    >>> T = np.array([[0.90, 0.09, 0.01, 0.00],
    ...               [0.09, 0.90, 0.00, 0.01],
    ...               [0.01, 0.00, 0.90, 0.09],
    ...               [0.00, 0.01, 0.09, 0.90]])
    >>> flux = transition_paths(T, np.full(4, 0.25), [0], [3], time_per_step=0.1, unit="ns")
    >>> round(flux.rate_constant, 6)  # per ns
    0.09
    >>> [(p.states, round(p.share, 3)) for p in flux.routes()]
    [((0, 1, 3), 0.5), ((0, 2, 3), 0.5)]
    """
    T = as_stochastic_matrix(T)
    n = T.shape[0]
    pi = as_stationary(pi, T)
    labels = as_state_labels(states, n)
    time_per_step, unit = as_time_per_step(time_per_step, unit)
    source, target = _source_and_target(source, target, n, labels)
    a, b = _mask(n, source), _mask(n, target)
    qf = _committor_forward(T, a, b)
    qb = _committor_forward(_time_reversed(T, pi), b, a)
    # States that reach neither set (reducible T only) carry no reactive flux.
    qf0, qb0 = np.nan_to_num(qf), np.nan_to_num(qb)
    gross = (pi * qb0)[:, None] * T * qf0[None, :]
    np.fill_diagonal(gross, 0.0)
    net = np.clip(gross - gross.T, 0.0, None)
    total = float(gross[a].sum())
    reactive_weight = float(pi @ qb0)
    rate = total / (time_per_step * reactive_weight) if reactive_weight > 0 else 0.0
    return TransitionPaths(source=labels[source], target=labels[target], states=labels,
                        equilibrium=pi, reach_target=qf, came_from_source=qb,
                        reactive_current=gross, net_current=net, throughput=total, rate_constant=rate,
                        time_per_step=time_per_step, unit=unit)


def _widest_paths(indptr: np.ndarray, indices: np.ndarray, capacity: np.ndarray,
                  start: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Largest bottleneck capacity from any ``start`` state to every state, with predecessors.

    A label-correcting (Bellman-Ford) sweep for the max-min (widest path) problem on a CSR
    graph: each round relaxes only the edges leaving states improved in the previous round.
    All reads of a round precede the writes and only strict improvements are recorded, so the
    predecessor graph stays a forest and every path read from it is simple.
    """
    n = indptr.size - 1
    width = np.where(start, np.inf, 0.0)
    pred = np.full(n, -1)
    active = np.flatnonzero(start)
    while active.size:
        counts = indptr[active + 1] - indptr[active]
        total = int(counts.sum())
        if total == 0:
            break
        offsets = np.repeat(indptr[active] - np.cumsum(counts) + counts, counts)
        pos = offsets + np.arange(total)
        src = np.repeat(active, counts)
        dst = indices[pos]
        cand = np.minimum(width[src], capacity[pos])
        better = cand > width[dst]
        src, dst, cand = src[better], dst[better], cand[better]
        if dst.size == 0:
            break
        order = np.lexsort((-cand, dst))  # by target, best candidate first
        ds = dst[order]
        chosen = order[np.r_[True, ds[1:] != ds[:-1]]]
        width[dst[chosen]] = cand[chosen]
        pred[dst[chosen]] = src[chosen]
        active = dst[chosen]
    return width, pred


def _decompose(net: np.ndarray, a: np.ndarray, b: np.ndarray, wanted: float,
               max_paths: int) -> list[tuple[list[int], float]]:
    """Strongest-path decomposition of the net flux: list of (positions along path, flux)."""
    C = net.copy()
    C[:, a] = 0.0  # no flux re-enters A or leaves B; cleared against rounding
    C[b, :] = 0.0
    G = sp.csr_matrix(C)
    G.sort_indices()
    indptr, indices, capacity = G.indptr, G.indices, G.data.copy()
    found: list[tuple[list[int], float]] = []
    carried = 0.0
    negligible = 1e-12 * float(net[a].sum())  # rounding residue, not flux
    ends = np.flatnonzero(b)
    while carried < wanted - negligible and len(found) < max_paths:
        width, pred = _widest_paths(indptr, indices, capacity, a)
        end = int(ends[np.argmax(width[ends])])
        flux = float(width[end])
        if not flux > negligible:
            break
        path = [end]
        while not a[path[-1]]:
            path.append(int(pred[path[-1]]))
        path.reverse()
        for i, j in zip(path[:-1], path[1:]):
            k = indptr[i] + np.searchsorted(indices[indptr[i]:indptr[i + 1]], j)
            capacity[k] = max(capacity[k] - flux, 0.0)
        found.append((path, flux))
        carried += flux
    return found
