"""The Markov model result object and :func:`build_model`.

References
----------
Prinz et al., J. Chem. Phys. 134, 174105 (2011): construction and analysis of Markov models.
"""
from __future__ import annotations

import datetime as _dt
import hashlib
import warnings
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from ._checks import (as_state_set, as_transition_matrix, check_bool, check_dt, check_int,
                      check_seed, check_unit)
from ._version import __version__
from .counts import count_csr, kept_states, prepare_counting
from .errors import DiagnosticWarning, InputError
from .estimate import EstimationInfo, estimate_transition_matrix
from .modelfile import read_model_file, save_model
from .spectral import (chain_diagnostics, changes_out, eigen_decomposition, implied_timescales,
                       obeys_detailed_balance, equilibrium_distribution, slow_crossings, solves_densely)

__all__ = ["MarkovModel", "build_model", "load_model", "GAS_CONSTANT_KJ"]

#: molar gas constant in kJ mol^-1 K^-1 (CODATA 2018, exact)
GAS_CONSTANT_KJ = 8.314462618e-3
#: how many of the slowest processes the diagnostics look at (negative, complex, shorter than the lag)
REPORTED = 5


def package_version() -> str:
    """The version of msmkit, recorded in the metadata of every model."""
    return __version__


@dataclass(eq=False)
class MarkovModel:
    """A Markov state model at one lag time.

    Rows and columns of every matrix follow :attr:`states`, the original labels of the kept
    (largest strongly connected) set; every public input and output names states by those
    labels.

    Attributes
    ----------
    propagator : ndarray, shape (n, n)
        Row-stochastic; entry (i, j) is the probability to be in ``states[j]`` one lag after
        being in ``states[i]``.
    equilibrium : ndarray, shape (n,)
        Equilibrium probabilities, summing to 1.
    states : ndarray of int, shape (n,)
        Original label of each row/column.
    lag : int
        Lag time in frames.
    dt : float
        Physical time between frames, in ``unit``.
    unit : str
        Time unit of ``dt`` and of every time the model reports.
    reversible : bool
        Whether the estimate enforced detailed balance.
    transition_counts : scipy.sparse.csr_matrix or None
        Transition counts among the kept states at this lag (None for a model built from a
        matrix).
    kept_fraction : float
        Fraction of all counted transitions that lie inside the kept set.
    dropped_states : ndarray of int
        Visited labels outside the kept set.
    diagnostics : list of str
        Plain-language findings (periodicity, dropped data, unresolved timescales, ...).
    metadata : dict
        Provenance: parameters, package version, creation time, label fingerprint, frames.
    estimation : EstimationInfo or None
    extras : dict
        Optional arrays saved with the model: ``centers``, ``tica_mean``, ``tica_components``,
        ``affinity``.
    """

    propagator: np.ndarray
    equilibrium: np.ndarray
    states: np.ndarray
    lag: int
    dt: float
    unit: str
    reversible: bool
    transition_counts: sp.csr_matrix | None = None
    kept_fraction: float = 1.0
    dropped_states: np.ndarray = field(default_factory=lambda: np.empty(0, dtype=np.int64))
    diagnostics: list = field(default_factory=list)
    metadata: dict = field(default_factory=dict)
    estimation: EstimationInfo | None = None
    extras: dict = field(default_factory=dict)

    def __post_init__(self):
        self._spectrum = None

    # ----------------------------------------------------------------- basic facts
    @property
    def n_states(self) -> int:
        """Number of kept states."""
        return self.propagator.shape[0]

    @property
    def lag_time(self) -> float:
        """The lag in physical time (``lag * dt``, in :attr:`unit`)."""
        return self.lag * self.dt

    def __repr__(self) -> str:
        ts = self.relaxation_times(1)
        slow = f", slowest timescale {ts[0]:.4g} {self.unit}" if ts.size else ""
        return (f"MarkovModel({self.n_states} states, lag {self.lag} frames = {self.lag_time:g} {self.unit}, "
                f"{'reversible' if self.reversible else 'non-reversible'}{slow}, "
                f"{len(self.diagnostics)} diagnostic(s))")

    def index_of(self, labels, name: str = "states") -> np.ndarray:
        """Positions in the kept set of the given original labels (InputError for unknown ones)."""
        wanted = as_state_set(labels, name, self.states)
        order = np.argsort(self.states)
        return order[np.searchsorted(self.states, wanted, sorter=order)]

    # ----------------------------------------------------------------- spectrum
    def _decomposition(self, k: int | None = None):
        """The k leading eigenpairs (all by default), computed once and extended on demand."""
        n = self.n_states
        k = n if k is None else min(check_int(k, "k", minimum=1), n)
        if self._spectrum is None or self._spectrum[0].size < k:
            # one solve serves every later request: all pairs when the solve is dense anyway (it
            # computes them all), else at least the pairs the diagnostics read
            want = max(k, min(n, REPORTED + 1))
            self._spectrum = eigen_decomposition(self.propagator, self.equilibrium,
                                                 k=None if solves_densely(n, want) else want,
                                                 reversible=self.reversible, vectors=True)
        w, v = self._spectrum
        return w[:k], v[:, :k]

    def spectrum(self, k: int | None = None) -> np.ndarray:
        """The ``k`` largest-magnitude eigenvalues (all by default); the first is 1.

        Real for a reversible model; may be complex for a non-reversible one.
        """
        return self._decomposition(k)[0]

    def modes(self, k: int | None = None) -> np.ndarray:
        """Right eigenvectors (columns) belonging to :meth:`eigenvalues`; for a reversible model
        normalized so that sum_i pi_i r_i^2 = 1."""
        return self._decomposition(k)[1]

    def relaxation_times(self, k: int | None = None) -> np.ndarray:
        """The ``k`` slowest implied timescales -lag*dt/ln|lambda_i|, in :attr:`unit`
        (the stationary eigenvalue is left out)."""
        w = self.spectrum(None if k is None else check_int(k, "k", minimum=1) + 1)[1:]
        return implied_timescales(w, self.lag, self.dt)

    def state_changes(self):
        """How much the data move: changes between distinct states, and crossings of the slowest process.

        Counted from :attr:`transition_counts` at the model's lag; self-transitions do not count.
        With sliding-window counting every change is seen in about ``lag`` windows, so the
        counts are divided by the lag (at lag 1 these are exactly the frames at which a run
        leaves a state). The slowest process splits the states by the sign of the eigenvector;
        a crossing is a counted transition from one side to the other.

        Returns
        -------
        (per_state, crossings) : (ndarray of float, shape (n_states,), float)
            Changes out of each state (in the order of :attr:`states`) and crossings of the
            slowest process; ``(None, None)`` for a model built from a matrix.
        """
        if self.transition_counts is None:
            return None, None
        every_frame = bool(self.metadata.get("parameters", {}).get("every_frame", True))
        per_state = changes_out(self.transition_counts, lag=self.lag, every_frame=every_frame)
        side = np.real(self.modes(2)[:, 1]) > 0
        return per_state, slow_crossings(self.transition_counts, side, lag=self.lag, every_frame=every_frame)

    # ----------------------------------------------------------------- populations
    def populations(self, temperature: float | None = None):
        """Stationary populations and free energies of the kept states.

        Parameters
        ----------
        temperature : float, optional
            In kelvin; adds free energies in kJ/mol (F = -RT ln p, R = 8.314462618 J/mol/K,
            CODATA 2018).

        Returns
        -------
        pandas.DataFrame
            Columns ``state`` (original label), ``population`` (probability), ``free_energy_kT``
            (-ln p relative to the most populated state, in units of kT), ``free_energy_kJ_per_mol``
            (with ``temperature``), and ``transitions_out`` (counts at this lag, when known).
        """
        import pandas as pd
        p = self.equilibrium
        with np.errstate(divide="ignore"):
            f = np.log(p.max()) - np.log(p)
        table = {"state": self.states, "population": p, "free_energy_kT": f}
        if temperature is not None:
            if isinstance(temperature, bool) or not isinstance(temperature, (int, float, np.number)) \
                    or not np.isfinite(temperature) or temperature <= 0:
                raise InputError(f"temperature must be a positive number in kelvin, but got {temperature!r}")
            table["free_energy_kJ_per_mol"] = f * GAS_CONSTANT_KJ * float(temperature)
        if self.transition_counts is not None:
            table["transitions_out"] = np.asarray(self.transition_counts.sum(axis=1)).ravel().astype(np.int64)
        return pd.DataFrame(table)

    # ----------------------------------------------------------------- macrostates and kinetics
    def find_macrostates(self, n_sets: int, *, optimize: bool = True, labels=None, n_samples: int = 0,
                         uncertainty: str = "bootstrap", seed=None, progress: bool = False, cancel=None):
        """PCCA+ macrostates (Deuflhard & Weber 2005; Roeblitz & Weber 2013).

        Parameters
        ----------
        n_sets : int
            Number of macrostates.
        optimize : bool
            Optimize the affinity (the published objective); False keeps the inner-simplex guess.
        labels : label trajectories, optional
            The data of the model, needed for ``uncertainty="bootstrap"``.
        n_samples : int
            Sampled models behind the intervals (0: no intervals; 200 or more for 95 %
            intervals, ``msmkit.defaults.BOOTSTRAP_SAMPLES``).
        uncertainty : {"bootstrap", "bayes"}
            How the models are sampled (:func:`msmkit.uncertainty.sample_models`); the affinity
            is held fixed.
        seed : int, optional
        progress : bool
        cancel : object with ``is_set()``, optional
            Checked between two samples (:class:`msmkit.errors.Cancelled` once set).

        Returns
        -------
        Macrostates
            Memberships (rows sum to 1), crisp assignments by original label, populations
            (``.populations()``, with ``population_lower`` / ``population_upper`` when sampled),
            the coarse transition matrix, and with samples ``.samples`` (a
            :class:`~msmkit.uncertainty.ModelSamples`, e.g. for
            ``macro.samples.between_sets(macro.members)``).
        """
        from .macro import find_macrostates
        from .posterior import check_uncertainty
        from .uncertainty import sample_models
        n_sets = check_int(n_sets, "n_sets", minimum=1, maximum=self.n_states)
        n_samples = check_int(n_samples, "n_samples", minimum=0)
        optimize, seed = check_bool(optimize, "optimize"), check_seed(seed)
        uncertainty = check_uncertainty(uncertainty, self.reversible)
        if n_samples and uncertainty == "bootstrap" and labels is None:
            raise InputError("n_samples > 0 with uncertainty='bootstrap' needs labels= (the label trajectories of "
                             "the model) to resample; or use uncertainty='bayes'")
        samples = sample_models(self, labels, uncertainty=uncertainty, n_samples=n_samples, seed=seed,
                                progress=progress, cancel=cancel) if n_samples else None
        return find_macrostates(self.propagator, self.equilibrium, n_sets,
                                states=self.states, time_per_step=self.lag_time, unit=self.unit,
                                reversible=self.reversible, optimize=optimize, samples=samples)

    def suggest_n_macrostates(self, max_sets: int = 10):
        """A number of macrostates from the largest spectral gap, with the reason in words:
        ``(n, reason)``."""
        from .macro import suggest_n_macrostates
        max_sets = check_int(max_sets, "max_sets", minimum=1)
        k = min(max_sets + 1, self.n_states)
        return suggest_n_macrostates(self.spectrum(k), max_sets=min(max_sets, self.n_states),
                                     time_per_step=self.lag_time, unit=self.unit)

    def passage_time(self, source, target) -> float:
        """Mean first-passage time from ``source`` to ``target`` (lists of original labels), in
        :attr:`unit`; over several sources averaged with the stationary weights inside the set
        (Kemeny & Snell 1960). Computed at lag resolution: passages are seen at multiples of
        the lag only, so the time is resolved to about one lag and tends to come out too long
        when the lag is not small against it (see :func:`msmkit.kinetics.mean_passage_time`)."""
        from .kinetics import mean_passage_time
        return mean_passage_time(self.propagator, self.equilibrium,
                                       self.index_of(source, "source"), self.index_of(target, "target"),
                                       states=self.states, time_per_step=self.lag_time)

    def passage_time_matrix(self, sets):
        """Mean first-passage times between disjoint sets of labels (e.g. macrostates), as a
        (k, k) ndarray in :attr:`unit`; entry (a, b) is the time from set a to set b. Computed
        at lag resolution, like :meth:`passage_time`."""
        from .kinetics import passage_time_matrix
        return passage_time_matrix(self.propagator, self.equilibrium,
                           [self.index_of(s, f"sets[{i}]") for i, s in enumerate(sets)],
                           states=self.states, time_per_step=self.lag_time)

    def splitting_probability(self, source, target, *, reverse_time: bool = False) -> np.ndarray:
        """Committor per kept state (in the order of :attr:`states`): forward, the probability to
        reach ``target`` before ``source``; backward, to have come from ``source`` last."""
        from .kinetics import splitting_probability
        return splitting_probability(self.propagator, self.index_of(source, "source"),
                         self.index_of(target, "target"), reverse_time=reverse_time,
                         pi=self.equilibrium, states=self.states)

    def transition_paths(self, source, target):
        """Transition path theory from ``source`` to ``target`` (E & Vanden-Eijnden 2006; Metzner,
        Schuette & Vanden-Eijnden 2009): gross and net flux, total flux, rate per :attr:`unit`,
        and the pathway decomposition (``.routes()``)."""
        from .kinetics import transition_paths
        return transition_paths(self.propagator, self.equilibrium,
                             self.index_of(source, "source"), self.index_of(target, "target"),
                             states=self.states, time_per_step=self.lag_time, unit=self.unit)

    # ----------------------------------------------------------------- persistence
    def save(self, path, *, overwrite: bool = True, **extra_arrays):
        """Write the model to a ``.npz`` file (atomic; plain arrays only).

        ``extra_arrays`` may hold the optional keys of the file format: ``centers``,
        ``tica_mean``, ``tica_components``, ``affinity``. See :mod:`msmkit.modelfile`.
        """
        return save_model(self, path, overwrite=overwrite, **extra_arrays)

    # ----------------------------------------------------------------- constructors
    @classmethod
    def from_transition_matrix(cls, propagator, *, dt: float = 1.0, unit: str = "step",
                               states=None, reversible: bool | None = None) -> "MarkovModel":
        """A model from a transition matrix you already have; one step (lag 1) spans ``dt``.

        Parameters
        ----------
        propagator : array_like, shape (n, n)
            Row-stochastic, non-negative, irreducible.
        dt : float
            Physical time of one step, in ``unit``.
        unit : str
        states : array_like of int, optional
            Labels of the rows (default 0..n-1).
        reversible : bool, optional
            Default: detected from detailed balance.
        """
        T = as_transition_matrix(propagator, "propagator", tol=1e-8, irreducible=True)
        dt, unit = check_dt(dt), check_unit(unit)
        reversible = None if reversible is None else check_bool(reversible, "reversible")
        n = T.shape[0]
        labels = np.arange(n) if states is None else np.asarray(states)
        if labels.shape != (n,) or labels.dtype.kind not in "iu" or np.unique(labels).size != n:
            raise InputError(f"states must be {n} distinct integer labels, one per row of propagator")
        pi = equilibrium_distribution(T)
        balanced = obeys_detailed_balance(T, pi, rtol=REVERSIBLE_RTOL)
        if reversible is None:
            reversible = balanced
        elif reversible and not balanced:
            raise InputError("reversible=True, but propagator does not obey detailed balance "
                             "(pi_i T_ij != pi_j T_ji), so the spectrum may be complex; pass reversible=False "
                             "or None (detect it)")
        model = cls(T, pi, labels.astype(np.int64), 1, dt, unit, bool(reversible),
                    metadata={"source": "transition matrix", "package_version": package_version(),
                              "created": now_utc()})
        model.diagnostics = chain_diagnostics(model.spectrum(REPORTED + 1), lag=1, dt=dt, unit=unit,
                                              n_reported=min(REPORTED, n - 1), connected=True)
        for line in model.diagnostics:
            warnings.warn(line, DiagnosticWarning, stacklevel=2)
        return model


def load_model(path) -> MarkovModel:
    """Read a model file written by :func:`~msmkit.save_model` (or :meth:`MarkovModel.save`),
    checking everything in it (see :func:`msmkit.modelfile.read_model_file`).

    Raises
    ------
    ModelFileError
        Naming what is wrong: not an npz file, truncated, pickled objects, a missing key, a
        wrong shape, rows not summing to 1, a stationary vector that is not stationary, ...

    Returns
    -------
    MarkovModel
        With ``.extras`` (dict) holding any optional arrays (centers, TICA, affinity).
    """
    return MarkovModel(**read_model_file(path))


#: relative tolerance of detailed balance for a matrix given as reversible (typed-in values carry rounding)
REVERSIBLE_RTOL = 1e-6


def now_utc() -> str:
    """The time now (UTC, ISO 8601, seconds), recorded in the metadata of every model."""
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def fingerprint(runs) -> str:
    """SHA-256 of label trajectories (int32 bytes and run lengths), for provenance."""
    h = hashlib.sha256()
    for r in runs:
        h.update(np.int64(r.size).tobytes())
        h.update(np.ascontiguousarray(r, dtype=np.int32).tobytes())
    return h.hexdigest()


def build_model(labels, lag, *, dt: float = 1.0, unit: str = "step", reversible: bool = True,
                every_frame: bool = True, n_states: int | None = None) -> MarkovModel:
    """Estimate a Markov model from label trajectories at one lag time.

    Counts transitions at ``lag`` (sliding window by default), keeps the largest strongly
    connected set of states (reporting what was dropped), estimates the maximum-likelihood
    transition matrix (reversible by default), and checks the result. Every finding that could
    mislead is issued as a :class:`~msmkit.errors.DiagnosticWarning` and kept in
    ``model.diagnostics``.

    Parameters
    ----------
    labels : array_like of int, or list of them
        Label trajectories, one per run; -1 marks unassigned frames.
    lag : int
        Lag time in frames.
    dt : float, default 1.0
        Physical time between frames, in ``unit``.
    unit : str, default "step"
        Time unit, e.g. "ns".
    reversible : bool, default True
    every_frame : bool, default True
        Sliding-window counting (see :func:`count_transitions`).
    n_states : int, optional
        Number of microstates (default: largest label + 1).

    Returns
    -------
    MarkovModel

    Examples
    --------
    >>> import numpy as np, msmkit as mk
    >>> labels = [np.array([0, 0, 1, 1, 1, 0, 0, 1])]
    >>> model = mk.build_model(labels, lag=1, dt=0.1, unit="ns")
    >>> model.equilibrium.round(3)
    array([0.5, 0.5])
    """
    runs, lag, n = prepare_counting(labels, lag, n_states)
    dt, unit = check_dt(dt), check_unit(unit)
    reversible, every_frame = check_bool(reversible, "reversible"), check_bool(every_frame, "every_frame")
    counts = count_csr(runs, lag, n, every_frame)
    metadata = {
        "parameters": {"lag": lag, "dt": dt, "unit": unit, "reversible": bool(reversible),
                       "every_frame": bool(every_frame), "n_states": n},
        "package_version": package_version(),
        "created": now_utc(),
        "labels_sha256": fingerprint(runs),
        "frames_per_run": [int(r.size) for r in runs],
    }
    return model_from_counts(counts, lag, dt=dt, unit=unit, reversible=reversible,
                             metadata=metadata)


def model_from_counts(counts: sp.csr_matrix, lag: int, *, dt: float, unit: str, reversible: bool,
                      metadata: dict | None = None, initial=None, warn: bool = True,
                      spectrum: bool = True) -> MarkovModel:
    """The model behind :func:`build_model`, from a full count matrix (rows = all labels).

    ``initial`` (a stationary vector over all labels) warm-starts the reversible estimate;
    ``warn=False`` keeps diagnostics in the model without issuing warnings (bootstrap samples).
    """
    C = sp.csr_matrix(counts)
    total = C.sum()
    if total == 0:
        raise InputError(f"no transitions were counted at lag {lag}: every run is shorter than the lag "
                         f"or the frames are unassigned; choose a smaller lag")
    visited = np.flatnonzero(np.asarray(C.sum(axis=1)).ravel() + np.asarray(C.sum(axis=0)).ravel())
    if visited.size < 2:
        raise InputError(f"labels visit a single state ({int(visited[0])}); a Markov model needs at least "
                         f"two states with transitions between them")
    keep = kept_states(C)
    if keep.size < 2:
        raise InputError(f"no two states exchange at lag {lag}: the largest strongly connected set is the "
                         f"single state {int(keep[0])}; use a smaller lag, fewer states or more data")
    Ck = C[keep][:, keep]
    kept_fraction = float(Ck.sum() / total)
    init = None if initial is None else np.asarray(initial)[keep]
    if init is not None and not np.all(init > 0):
        init = None
    with warnings.catch_warnings():
        if not warn:
            warnings.simplefilter("ignore", DiagnosticWarning)
        T, info = estimate_transition_matrix(Ck, reversible=reversible, initial=init, return_info=True)
    dropped = np.setdiff1d(visited, keep)
    model = MarkovModel(T, info.equilibrium, keep.astype(np.int64), int(lag), float(dt), unit,
                        bool(reversible), transition_counts=sp.csr_matrix(Ck, dtype=np.int64),
                        kept_fraction=kept_fraction, dropped_states=dropped.astype(np.int64),
                        metadata=dict(metadata or {}), estimation=info)
    model.metadata["kept_fraction"] = kept_fraction
    model.metadata["n_dropped_states"] = int(dropped.size)
    if not info.converged:
        model.diagnostics.append(f"The reversible estimate stopped after {info.iterations} iterations without "
                                 "converging; the matrix obeys detailed balance but not exactly the maximum-likelihood one.")
    if spectrum:
        changes, crossings = model.state_changes()
        model.diagnostics += chain_diagnostics(model.spectrum(REPORTED + 1), lag=lag, dt=dt, unit=unit,
                                               changes=changes, crossings=crossings, states=model.states,
                                               dropped_states=dropped, kept_fraction=kept_fraction,
                                               n_reported=min(REPORTED, model.n_states - 1), estimated=True,
                                               connected=True)
    if warn:
        for line in model.diagnostics:
            warnings.warn(line, DiagnosticWarning, stacklevel=3)
    return model
