"""Intervals on the kinetic numbers of one Markov model.

:func:`sample_models` draws transition matrices on the model's states that are consistent with
the data, in one of two ways, and :class:`ModelSamples` turns them into tables with intervals:
implied timescales, state and macrostate populations, mean first-passage times, rate constants
and reactive throughput between sets of states.

``"bootstrap"``
    Whole runs are drawn with replacement (contiguous blocks when there are fewer than 5 runs),
    counted at the model's lag and fitted on the model's states as the model was (Efron 1979).
    Intervals are bias-corrected percentile intervals, widened for few runs
    (:func:`msmkit._bootstrap.bootstrap_interval` with ``method="bc"`` and ``n_units`` = the
    number of resampled units).
``"bayes"``
    Reversible transition matrices from their posterior given the model's transition counts
    (:func:`msmkit.posterior.sample_reversible_posterior`; reversible models only). Intervals are
    equal-tailed credible intervals (the posterior percentiles).

Every sample is a model of the same states at the same lag, so every number is computed with
the same functions as on the model itself (:mod:`msmkit.kinetics`, :mod:`msmkit.spectral`).

References
----------
Efron, Ann. Stat. 7, 1 (1979): the bootstrap. Noe, J. Chem. Phys. 128, 244103 (2008): the
posterior of reversible transition matrices.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np

from ._bootstrap import (StateCounts, bootstrap_interval, few_crossings_note, fit_sample, percentile_interval,
                         progress_bar, resampling_plan, samples_needed)
from ._checks import as_label_trajectories, check_bool, check_int, check_probability, check_seed
from .counts import run_count_rows
from .defaults import BOOTSTRAP_SAMPLES, PROCESSES, UNCERTAINTIES
from .errors import DiagnosticWarning, InputError
from .kinetics import mean_passage_time, passage_time_matrix, transition_paths
from .posterior import INTERVAL_PRIOR_COUNT, check_uncertainty, posterior_at_lag
from .spectral import eigen_decomposition, implied_timescales

__all__ = ["ModelSamples", "sample_models", "UNCERTAINTIES"]

#: sampled matrices held in memory at most (bytes)
MAX_SAMPLE_BYTES = 2 ** 31


@dataclass(eq=False)
class ModelSamples:
    """Transition matrices on the states of one model, sampled to give intervals.

    Attributes
    ----------
    model : MarkovModel
        The model; every estimate in the tables is the value of the model.
    propagators : ndarray, shape (n_samples, n, n)
        Sampled transition matrices (probability per lag), rows and columns in the order of
        ``model.states``. A state that fell out of a bootstrap sample's connected set has NaN
        in that row and column; the sample is a model of the remaining states.
    equilibria : ndarray, shape (n_samples, n)
        Their stationary distributions (NaN for states left out).
    uncertainty : {"bootstrap", "bayes"}
    n_units : int
        Resampled units of the bootstrap (runs, or blocks with few runs); 0 for ``"bayes"``.
    notes : list of str
        Cautions about the samples (blocks instead of runs, overlapping counting windows, ...).

    Every table method returns a pandas DataFrame with columns ``estimate``, ``lower`` and
    ``upper`` (:meth:`between_sets`: one such triple per quantity) and ``df.attrs`` holding
    ``unit``, ``confidence``, ``uncertainty``, ``n_samples`` (samples with a finite value, the
    fewest over the rows), ``interval`` (how it was formed), ``notes`` and ``caption``. A DiagnosticWarning says when fewer samples than needed for the
    confidence have a value, and when an estimate lies outside the interval.

    Examples
    --------
    >>> import msmkit as mk                                           # doctest: +SKIP
    >>> draw = mk.sample_models(model, labels)                        # doctest: +SKIP
    >>> draw.passage_time([0, 1], [7, 8])                             # doctest: +SKIP
    """

    model: object = field(repr=False)
    propagators: np.ndarray = field(repr=False)
    equilibria: np.ndarray = field(repr=False)
    uncertainty: str = "bootstrap"
    n_units: int = 0
    notes: list = field(default_factory=list)

    def __post_init__(self):
        self._cache = {}

    @property
    def n_samples(self) -> int:
        """Number of sampled matrices."""
        return self.equilibria.shape[0]

    @property
    def kept(self) -> np.ndarray:
        """(n_samples, n) bool: which states each sample holds."""
        return np.isfinite(self.equilibria)

    # ------------------------------------------------------------------ tables
    def relaxation_times(self, k: int = PROCESSES, *, confidence: float = 0.95):
        """The ``k`` slowest implied timescales -lag*dt/ln|lambda_i| with intervals, in ``model.unit``.

        Columns ``process`` (1 = slowest), ``estimate``, ``lower``, ``upper``.
        """
        k = check_int(k, "k", minimum=1)
        est = self.model.relaxation_times(k)
        k = est.size
        values = self._cached(("timescales", k), lambda: self._timescales(k))
        return self._table({"process": np.arange(1, k + 1)}, est, values, confidence, self.model.unit,
                           "implied timescales")

    def populations(self, *, confidence: float = 0.95):
        """Stationary population of every state with intervals (probabilities).

        Columns ``state`` (original label), ``estimate``, ``lower``, ``upper``.
        """
        return self._table({"state": self.model.states}, self.model.equilibrium, self.equilibria, confidence,
                           "probability", "state populations")

    def macro_populations(self, macrostates, *, confidence: float = 0.95):
        """Macrostate populations sum_i pi_i chi_ij with intervals, the affinity chi held fixed.

        A state left out of a sample counts with population 0 there.

        Parameters
        ----------
        macrostates : Macrostates
            Found on this model (``model.find_macrostates``).

        Returns
        -------
        pandas.DataFrame
            Columns ``macrostate``, ``estimate``, ``lower``, ``upper`` (probabilities).
        """
        chi = self._affinity(macrostates)
        values = np.nan_to_num(self.equilibria) @ chi
        return self._table({"macrostate": np.arange(chi.shape[1])}, self.model.equilibrium @ chi, values,
                           confidence, "probability", "macrostate populations")

    def passage_time(self, source, target, *, confidence: float = 0.95):
        """Mean first-passage time from ``source`` to ``target`` (lists of original labels) with
        the interval, in ``model.unit``; averaged over the source with the stationary weights
        inside it (Kemeny & Snell 1960).

        Computed at lag resolution like :meth:`MarkovModel.passage_time` (see
        :func:`msmkit.kinetics.hitting_steps`): resolved to about one lag, and too long when
        the lag is not small against it; the interval says nothing about that bias.

        Returns
        -------
        pandas.DataFrame
            One row: ``source``, ``target`` (tuples of labels), ``estimate``, ``lower``, ``upper``;
            ``attrs["resolution"]`` is the lag time.
        """
        src, tgt = self.model.index_of(source, "source"), self.model.index_of(target, "target")
        est = self.model.passage_time(self.model.states[src], self.model.states[tgt])
        values = self._cached(("mfpt", tuple(src), tuple(tgt)), lambda: self._passage_values(src, tgt))
        df = self._table(self._pair_columns(src, tgt), [est], values[:, None], confidence, self.model.unit,
                         "mean first-passage time")
        df.attrs["resolution"] = float(self.model.lag_time)
        return df

    def rate_constant(self, source, target, *, confidence: float = 0.95):
        """Transition path theory rate k_AB = F / (tau sum_i pi_i q-_i) from ``source`` to
        ``target`` with the interval, in 1/``model.unit`` (Metzner, Schuette & Vanden-Eijnden 2009).

        Returns
        -------
        pandas.DataFrame
            One row: ``source``, ``target``, ``estimate``, ``lower``, ``upper``.
        """
        return self._path_table(source, target, "rate_constant", confidence)

    def throughput(self, source, target, *, confidence: float = 0.95):
        """Reactive A -> B events per lag step (the total reactive flux F) with the interval.

        Returns
        -------
        pandas.DataFrame
            One row: ``source``, ``target``, ``estimate``, ``lower``, ``upper``; unit "1/lag".
        """
        return self._path_table(source, target, "throughput", confidence)

    def between_sets(self, sets, *, confidence: float = 0.95):
        """Mean first-passage times and rate constants between every ordered pair of disjoint
        sets of labels (macrostates, say: ``macro.members``), with intervals.

        Returns
        -------
        pandas.DataFrame
            One row per ordered pair: ``from_set``, ``to_set`` (positions in ``sets``),
            ``passage_time``, ``passage_time_lower``, ``passage_time_upper`` (in ``model.unit``,
            at lag resolution) and ``rate_constant``, ``rate_constant_lower``,
            ``rate_constant_upper`` (in 1/``model.unit``). ``attrs`` holds ``unit``,
            ``rate_unit``, ``resolution`` (the lag time) and ``caption``.
        """
        import pandas as pd

        model = self.model
        idx = [model.index_of(s, f"sets[{i}]") for i, s in enumerate(sets)]
        k = len(idx)
        if k < 2:
            raise InputError(f"sets must hold at least two sets of states, but holds {k}")
        est_m = model.passage_time_matrix([model.states[i] for i in idx])
        pairs = [(a, b) for a in range(k) for b in range(k) if a != b]
        key = tuple(tuple(i) for i in idx)
        mfpt = self._cached(("mfpt matrix", key), lambda: self._passage_matrices(idx))
        est_r = np.array([model.transition_paths(model.states[idx[a]], model.states[idx[b]]).rate_constant
                          for a, b in pairs])
        rates = np.column_stack([self._cached(("paths", tuple(idx[a]), tuple(idx[b])),
                                              lambda a=a, b=b: self._path_values(idx[a], idx[b]))[:, 0]
                                 for a, b in pairs])
        est_mp = np.array([est_m[a, b] for a, b in pairs])
        mp = np.stack([mfpt[:, a, b] for a, b in pairs], axis=1)
        lo_m, hi_m, n_m, how = self._interval(mp, est_mp, confidence)
        lo_r, hi_r, n_r, _ = self._interval(rates, est_r, confidence)
        df = pd.DataFrame({"from_set": [a for a, _ in pairs], "to_set": [b for _, b in pairs],
                           "passage_time": est_mp, "passage_time_lower": lo_m, "passage_time_upper": hi_m,
                           "rate_constant": est_r, "rate_constant_lower": lo_r, "rate_constant_upper": hi_r})
        df.attrs.update(self._attrs(confidence, model.unit, min(n_m, n_r), how),
                        rate_unit=f"1/{model.unit}", resolution=float(model.lag_time),
                        caption=f"Mean first-passage times (in {model.unit}) and rate constants (per {model.unit}) "
                                f"between sets, {100 * confidence:g}% intervals from {how}. Passage times are "
                                f"computed at lag resolution ({model.lag_time:g} {model.unit}): resolved to about "
                                f"one lag, they tend to come out too long when the lag is not small against them.")
        return df

    # ------------------------------------------------------------------ per-sample values
    def _cached(self, key, compute):
        if key not in self._cache:
            self._cache[key] = compute()
        return self._cache[key]

    def _timescales(self, k: int) -> np.ndarray:
        """(n_samples, k) implied timescales of every sample; NaN where a sample has fewer.

        Reversible samples that hold every state are solved together: their symmetrized
        matrices D^1/2 T D^-1/2 in one batched symmetric eigen-solve (the spectrum of a
        reversible matrix, as :func:`msmkit.spectral.eigen_decomposition` does one at a time)."""
        model = self.model
        out = np.full((self.n_samples, k), np.nan)
        batch = self.kept.all(axis=1) if model.reversible else np.zeros(self.n_samples, dtype=bool)
        if batch.any():
            s = np.sqrt(self.equilibria[batch])
            A = s[:, :, None] * self.propagators[batch] / s[:, None, :]
            w = np.linalg.eigvalsh(0.5 * (A + np.swapaxes(A, 1, 2)))  # ascending; the last is the stationary 1
            rest = w[:, :-1]
            slowest = np.take_along_axis(rest, np.argsort(-np.abs(rest), axis=1, kind="stable")[:, :k], axis=1)
            out[batch, :slowest.shape[1]] = implied_timescales(slowest, model.lag, model.dt)
        for b, (T, pi, _) in self._samples():
            if batch[b]:
                continue
            w = eigen_decomposition(T, pi, k=min(k + 1, T.shape[0]), reversible=model.reversible)
            got = implied_timescales(w[1:], model.lag, model.dt)
            out[b, :got.size] = got
        return out

    def _passage_values(self, src, tgt) -> np.ndarray:
        """(n_samples,) mean first-passage times source -> target (NaN where a set is left out)."""
        out = np.full(self.n_samples, np.nan)
        for b, (T, pi, (s, t)) in self._samples(src, tgt):
            out[b] = mean_passage_time(T, pi, s, t, time_per_step=self.model.lag_time)
        return out

    def _passage_matrices(self, idx) -> np.ndarray:
        """(n_samples, k, k) mean first-passage times between the sets ``idx`` (positions)."""
        k = len(idx)
        out = np.full((self.n_samples, k, k), np.nan)
        for b, (T, pi, sets) in self._samples(*idx):
            out[b] = passage_time_matrix(T, pi, list(sets), time_per_step=self.model.lag_time)
        return out

    def _path_values(self, src, tgt) -> np.ndarray:
        """(n_samples, 2): rate constant (1/unit) and throughput (1/lag) of every sample."""
        out = np.full((self.n_samples, 2), np.nan)
        for b, (T, pi, (s, t)) in self._samples(src, tgt):
            paths = transition_paths(T, pi, s, t, time_per_step=self.model.lag_time, unit=self.model.unit)
            out[b] = paths.rate_constant, paths.throughput
        return out

    def _samples(self, *sets):
        """Yield ``(b, (T, pi, sets))`` for every sample, restricted to the states it holds, with
        ``sets`` (positions among the model's states) mapped to positions in that restriction;
        samples in which a set lost every state are skipped."""
        kept = self.kept
        full = kept.all(axis=1)
        for b in range(self.n_samples):
            T, pi = self.propagators[b], self.equilibria[b]
            if full[b]:
                yield b, (T, pi, sets)
                continue
            keep = np.flatnonzero(kept[b])
            if keep.size < 2:
                continue
            where = np.full(kept.shape[1], -1)
            where[keep] = np.arange(keep.size)
            mapped = [where[s][where[s] >= 0] for s in sets]
            if any(m.size == 0 for m in mapped):
                continue
            yield b, (T[np.ix_(keep, keep)], pi[keep], mapped)

    # ------------------------------------------------------------------ tables and intervals
    def _path_table(self, source, target, which: str, confidence):
        model = self.model
        src, tgt = model.index_of(source, "source"), model.index_of(target, "target")
        paths = model.transition_paths(model.states[src], model.states[tgt])
        column = ("rate_constant", "throughput").index(which)
        values = self._cached(("paths", tuple(src), tuple(tgt)), lambda: self._path_values(src, tgt))
        unit = f"1/{model.unit}" if which == "rate_constant" else "1/lag"
        return self._table(self._pair_columns(src, tgt), [getattr(paths, which)], values[:, column:column + 1],
                           confidence, unit, which.replace("_", " "))

    def _pair_columns(self, src, tgt) -> dict:
        states = self.model.states
        return {"source": [tuple(int(x) for x in states[src])], "target": [tuple(int(x) for x in states[tgt])]}

    def _affinity(self, macrostates) -> np.ndarray:
        chi = np.asarray(getattr(macrostates, "affinity", None), dtype=float)
        states = getattr(macrostates, "states", None)
        if chi.ndim != 2 or states is None or not np.array_equal(np.asarray(states), self.model.states):
            raise InputError("macrostates must be found on the model these samples belong to "
                             "(model.find_macrostates); their states differ from the model's")
        return chi

    def _interval(self, values, estimate, confidence):
        """(lower, upper, fewest finite samples, description) over the columns of ``values``."""
        confidence = check_probability(confidence, "confidence")
        values = np.asarray(values, dtype=float)
        n_finite = int(np.isfinite(values).sum(axis=0).min()) if values.size else 0
        need = samples_needed(confidence)
        word = "bootstrap samples" if self.uncertainty == "bootstrap" else "posterior samples"
        if n_finite < need:
            warnings.warn(f"{n_finite} {word} with a value are too few for {100 * confidence:g}% intervals: their "
                          f"ends rest on fewer than {need * (1 - confidence) / 2:.0f} samples each, and such "
                          f"intervals cover the truth less often than stated; draw n_samples >= {need}.",
                          DiagnosticWarning, stacklevel=4)
        if self.uncertainty == "bootstrap":
            lower, upper = bootstrap_interval(values, np.asarray(estimate, dtype=float), confidence, method="bc",
                                              n_units=self.n_units)
            runs = len(self.model.metadata.get("frames_per_run") or ())
            what = "runs" if runs == self.n_units else "blocks of runs"
            how = f"the bootstrap over {self.n_units} {what}, bias-corrected and widened for few {what}"
        else:
            lower, upper = percentile_interval(values, confidence)
            how = "the posterior of reversible transition matrices, equal-tailed"
        lower, upper = np.asarray(lower), np.asarray(upper)
        est = np.broadcast_to(np.asarray(estimate, dtype=float), lower.shape)
        slack = 1e-9 * np.abs(est)  # rounding of samples that equal the estimate
        outside = int(np.sum((est < lower - slack) | (est > upper + slack)))
        if outside:
            warnings.warn(f"{outside} of {est.size} estimate(s) lie outside their {100 * confidence:g}% interval: the "
                          f"sampled models are not centred on the model (too few transitions for the "
                          f"{self.uncertainty} to resemble the estimate); read such intervals with care.",
                          DiagnosticWarning, stacklevel=4)
        return lower, upper, n_finite, how

    def _attrs(self, confidence, unit, n_finite, how) -> dict:
        return {"unit": unit, "confidence": float(confidence), "uncertainty": self.uncertainty,
                "n_samples": n_finite, "interval": how, "notes": list(self.notes)}

    def _table(self, keys: dict, estimate, values, confidence, unit: str, what: str):
        import pandas as pd

        estimate = np.asarray(estimate, dtype=float)
        lower, upper, n_finite, how = self._interval(values, estimate, confidence)
        df = pd.DataFrame({**keys, "estimate": estimate, "lower": lower, "upper": upper})
        df.attrs.update(self._attrs(confidence, unit, n_finite, how),
                        caption=f"{what[0].upper() + what[1:]} ({unit}) with {100 * confidence:g}% intervals "
                                f"from {how} ({n_finite} samples).")
        return df


def sample_models(model, labels=None, *, uncertainty: str = "bootstrap", n_samples: int = BOOTSTRAP_SAMPLES,
                  seed=None, prior_count: float = INTERVAL_PRIOR_COUNT, progress: bool = False, cancel=None) -> ModelSamples:
    """Sample transition matrices on a model's states for intervals on the kinetic numbers of the model.

    Parameters
    ----------
    model : MarkovModel
    labels : label trajectories, optional
        The data the model was built from; needed for ``"bootstrap"``, not used by ``"bayes"``
        (which samples from the model's transition counts).
    uncertainty : {"bootstrap", "bayes"}
        ``"bootstrap"``: whole runs resampled with replacement (contiguous blocks with fewer
        than 5 runs), counted at the model's lag the way the model was counted and fitted on
        the model's states (the largest connected set among them). ``"bayes"``: the posterior
        of reversible transition matrices given the model's counts (reversible models only).
    n_samples : int, default ``msmkit.defaults.BOOTSTRAP_SAMPLES``
        Matrices drawn; fewer than 200 give 95 % intervals whose ends rest on few samples (the
        tables then issue a DiagnosticWarning).
    seed : int or numpy.random.Generator, optional
    prior_count : float, default -1 (``msmkit.posterior.INTERVAL_PRIOR_COUNT``, as in lag scans and tests)
        ``"bayes"`` only: the prior count added to every counted pair in both directions
        (:func:`msmkit.posterior.sample_reversible_posterior`). It acts on every counted pair,
        so with many states and few transitions per pair a prior of -0.5 pulls the slow
        processes far off: on a 49-state lattice walk (lag 2, 10 runs) 95 % intervals of the
        slowest timescale covered 0.45 of 200 replicates with -0.5 and 0.955 with -1, passage
        times and rates 0.77-0.83 against 0.935-0.965; on a 4-state chain -1 gave 0.905-0.956
        (``bench/bench_coverage.py --study kinetics``).
    progress : bool
        Show a progress bar.
    cancel : object with ``is_set()``, optional
        Checked between two samples; once set, :class:`msmkit.errors.Cancelled` is raised.

    Returns
    -------
    ModelSamples
        With tables of relaxation times, populations, macrostate populations, passage times,
        rate constants and throughput, each with intervals.

    Notes
    -----
    Counts from sliding windows (``every_frame=True``) at a lag above 1 count every transition
    about ``lag`` times; ``"bayes"`` therefore samples the posterior of the counts divided by the
    lag (about the number of independent transitions, common practice), which is approximate (a
    note says so). The bootstrap over whole runs does not rely on independent transitions.
    """
    for name in ("propagator", "equilibrium", "states", "lag", "dt", "unit", "reversible", "index_of"):
        if not hasattr(model, name):
            raise InputError(f"model must be a MarkovModel (from build_model, lag_scan or load_model), but got "
                             f"{type(model).__name__}")
    uncertainty = check_uncertainty(uncertainty, getattr(model, "reversible", True))
    n_samples = check_int(n_samples, "n_samples", minimum=1)
    seed, progress = check_seed(seed), check_bool(progress, "progress")
    n = model.n_states
    if n_samples * n * (n + 1) * 8 > MAX_SAMPLE_BYTES:
        raise InputError(f"n_samples={n_samples} matrices of {n} states need "
                         f"{n_samples * n * (n + 1) * 8 / 2 ** 30:.1f} GiB; draw fewer samples")
    if model.transition_counts is None:
        raise InputError("model holds no transition counts (it was built from a matrix), so there is nothing to "
                         "sample from; build it from label trajectories with build_model")
    if uncertainty == "bayes":
        draw = _posterior_samples(model, n_samples, seed, prior_count, progress, cancel)
    elif labels is None:
        raise InputError("uncertainty='bootstrap' needs labels= (the label trajectories the model was built from) "
                         "to resample; or use uncertainty='bayes', which samples from the model's counts")
    else:
        draw = _bootstrap_samples(model, as_label_trajectories(labels), n_samples, seed, progress, cancel)
    crossings = model.state_changes()[1] if model.n_states > 1 else None
    if crossings is not None:
        draw.notes += few_crossings_note(f"At lag {model.lag} frames", crossings, uncertainty)
    return draw


def _every_frame(model) -> bool:
    return bool(model.metadata.get("parameters", {}).get("every_frame", True))


def _bootstrap_samples(model, runs, n_samples, seed, progress, cancel) -> ModelSamples:
    lengths = model.metadata.get("frames_per_run")
    if lengths is not None and sorted(int(x) for x in lengths) != sorted(int(r.size) for r in runs):
        raise InputError(f"labels are not the trajectories this model was built from: {len(runs)} run(s) of "
                         f"{sum(r.size for r in runs)} frames, but the model was built from {len(lengths)} run(s) "
                         f"of {sum(lengths)} frames; pass the label trajectories of the model")
    n = model.n_states
    n_lab = max(int(model.states.max()) + 1, max((int(r.max()) for r in runs if r.size), default=-1) + 1)
    blocks, weights, notes = resampling_plan(len(runs), n_samples, np.random.default_rng(seed))
    rows, _ = run_count_rows(runs, model.lag, n_states=n_lab, every_frame=_every_frame(model),
                             blocks_per_run=blocks)
    on_states = StateCounts(rows, n_lab, model.states)
    values = on_states.values(weights)
    Ts = np.full((n_samples, n, n), np.nan)
    pis = np.full((n_samples, n), np.nan)
    bar = progress_bar(n_samples, progress, "bootstrap", cancel)
    try:
        for b in range(n_samples):
            fit = fit_sample(on_states.matrix(values[b]), reversible=model.reversible, initial=model.equilibrium)
            if fit is not None:
                keep, T, pi = fit
                Ts[b][np.ix_(keep, keep)] = T
                pis[b, keep] = pi
            bar.update(1)
    finally:
        bar.close()
    lost = int((~np.isfinite(pis)).any(axis=1).sum())
    if lost:
        notes.append(f"{lost} of {n_samples} bootstrap samples left out states of the model (not in their "
                     f"connected set); numbers that need those states are computed without them.")
    return ModelSamples(model, Ts, pis, "bootstrap", int(weights.shape[1]), notes)


def _posterior_samples(model, n_samples, seed, prior_count, progress, cancel) -> ModelSamples:
    notes = []
    if model.lag > 1 and _every_frame(model):
        notes.append(f"The counts come from overlapping windows at lag {model.lag} (every_frame=True); the posterior "
                     f"is drawn for the counts divided by the lag, about the number of independent transitions. "
                     f"That is an approximation: compare with uncertainty='bootstrap'.")
    n = model.n_states
    Ts = np.empty((n_samples, n, n))
    pis = np.empty((n_samples, n))
    stream = posterior_at_lag(model.transition_counts, n_samples, lag=model.lag, every_frame=_every_frame(model),
                              seed=seed, initial=model.propagator, prior_count=prior_count)
    bar = progress_bar(n_samples, progress, "posterior", cancel)
    try:
        for b, (T, pi) in enumerate(stream):
            Ts[b], pis[b] = T, pi
            bar.update(1)
    finally:
        bar.close()
    return ModelSamples(model, Ts, pis, "bayes", 0, notes)
