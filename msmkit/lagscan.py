"""Implied timescales across lag times, with bootstrap uncertainty and a suggested lag.

References
----------
Swope, Pitera & Suits, J. Phys. Chem. B 108, 6571 (2004): implied timescales vs lag.
Efron, Ann. Stat. 7, 1 (1979): the bootstrap.
Prinz et al., J. Chem. Phys. 134, 174105 (2011): choosing the lag where timescales level off.
"""
from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np

from ._bootstrap import BLOCK_UNITS, MIN_RUNS_FOR_RUN_BOOTSTRAP  # noqa: F401  (re-exported constants)
from ._bootstrap import SampleTimescales, StateCounts, bootstrap_interval, check_interval, resampling_plan
from ._bootstrap import FEW_CROSSINGS, few_crossings_note, percentile_interval, sample_timescales_batch, warn_few_samples
from ._bootstrap import progress_bar as _progress
from ._bootstrap import unflatten as _unflatten
from ._checks import (as_label_trajectories, check_bool, check_dt, check_int, check_probability, check_seed,
                      check_tolerance, check_unit)
from ._execution import map_sample_batches, place
from .counts import prepare_counting, run_count_rows
from .defaults import PROCESSES
from .errors import InputError
from .model import MarkovModel, fingerprint, model_from_counts, now_utc, package_version
from .posterior import check_uncertainty, posterior_at_lag
from .spectral import flow_eigenvalues, implied_timescales

__all__ = ["LagScan", "lag_scan", "suggest_lag"]


@dataclass(eq=False)
class LagScan:
    """Implied timescales at several lag times.

    Attributes
    ----------
    lags : ndarray of int, shape (L,)
        Scanned lags in frames, ascending.
    timescales : ndarray, shape (L, k)
        The k slowest implied timescales at each lag (full data), in :attr:`unit`.
    lower, upper : ndarray, shape (L, k)
        Interval at :attr:`confidence`: bootstrap (method: ``interval`` of :func:`lag_scan`) or
        equal-tailed posterior credible interval (:attr:`uncertainty`); NaN when ``n_samples == 0``.
    samples : ndarray, shape (L, n_samples, k)
        Bootstrap or posterior timescales (NaN where a sample had fewer processes).
    dt : float
    unit : str
    confidence : float
    n_samples : int
    suggested_lag : int or None
    reason : str
        Why that lag was suggested, or why none was.
    notes : list of str
        How the uncertainty was obtained, and findings at the scanned lags.
    uncertainty : str
        "bootstrap" or "bayes": where the samples come from (:func:`lag_scan`).
    """

    lags: np.ndarray
    timescales: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    samples: np.ndarray
    dt: float
    unit: str
    confidence: float
    n_samples: int
    suggested_lag: int | None
    reason: str
    notes: list = field(default_factory=list)
    models: dict = field(default_factory=dict, repr=False)
    uncertainty: str = "bootstrap"

    @property
    def lag_times(self) -> np.ndarray:
        """The scanned lags in physical time (``lags * dt``, in :attr:`unit`)."""
        return self.lags * self.dt

    def model(self, lag) -> MarkovModel:
        """The full-data :class:`MarkovModel` at one scanned lag (frames)."""
        lag = check_int(lag, "lag", minimum=1)
        if lag not in self.models:
            raise InputError(f"lag {lag} was not scanned; choose one of {self.lags.tolist()}")
        return self.models[lag]

    def table(self):
        """One row per (lag, process): timescale and interval in :attr:`unit`.

        Columns: ``lag`` (frames), ``lag_time``, ``process`` (1 = slowest), ``timescale``,
        ``lower``, ``upper``, ``resolved`` (timescale above the lag time), ``estimate_outside``
        (the timescale lies outside the interval of the same row, which then does not describe
        it). Time columns are in ``df.attrs['unit']``; ``df.attrs`` also holds ``uncertainty``
        and ``confidence``.
        """
        import pandas as pd
        L, k = self.timescales.shape
        df = pd.DataFrame({
            "lag": np.repeat(self.lags, k),
            "lag_time": np.repeat(self.lag_times, k),
            "process": np.tile(np.arange(1, k + 1), L),
            "timescale": self.timescales.ravel(),
            "lower": self.lower.ravel(),
            "upper": self.upper.ravel(),
        })
        df["resolved"] = df["timescale"] > df["lag_time"]
        df["estimate_outside"] = _estimate_outside(self.timescales, self.lower, self.upper).ravel()
        df.attrs.update(unit=self.unit, uncertainty=self.uncertainty, confidence=self.confidence)
        return df


#: bootstrap samples of a lag run on two threads from this many entries of the count pattern on:
#: measured per sample on two cores, two threads took 1.6x the time of one at 500 states and
#: lag 1 (1500 entries), 1.2x at 14 500 entries, 0.9x at 29 000 and 0.55x at 3000 states (97 000);
#: at 1500 states 1.28x at 4500 entries, 1.02x at 18 000, 0.99x at 24 000
THREADED_PATTERN = 25_000


def lag_scan(labels, lags, *, dt: float = 1.0, unit: str = "step", n_processes: int = PROCESSES,
             reversible: bool = True, n_samples: int = 0, seed=None, confidence: float = 0.95,
             every_frame: bool = True, n_states: int | None = None, n_slow: int = 2, rtol: float = 0.05,
             interval: str = "bc", uncertainty: str = "bootstrap", progress: bool = False, client=None,
             cancel=None) -> LagScan:
    """Estimate models at several lags and report their implied timescales with uncertainty.

    Parameters
    ----------
    labels : array_like of int, or list of them
        Label trajectories, one per run.
    lags : sequence of int
        Lags in frames.
    dt : float
        Physical time between frames, in ``unit``.
    unit : str
    n_processes : int, default 4 (``msmkit.defaults.PROCESSES``)
        How many of the slowest processes to follow.
    reversible : bool, default True
    n_samples : int, default 0
        Samples per lag for the intervals (bootstrap or posterior, see ``uncertainty``). Bootstrap:
        whole runs are resampled with replacement; with fewer than 5 runs,
        contiguous blocks of the runs are resampled instead (said in ``notes``). 0: no interval.
        Fewer than 200 (at ``confidence=0.95``; :func:`msmkit._bootstrap.samples_needed`) issue a
        DiagnosticWarning: the interval ends then rest on too few samples.
    seed : int, optional
        Seeds the resampling or the posterior sampler; the same seed gives the same intervals.
    confidence : float, default 0.95
        Nominal coverage of the interval.
    interval : {"bc", "bca", "percentile"}, default "bc"
        How the interval is formed from the samples (:func:`msmkit._bootstrap.bootstrap_interval`):
        bias-corrected percentiles; bias-corrected and accelerated (the acceleration from
        leave-one-run-out fits: one extra fit per resampled unit and lag); or plain percentiles.
        In every case the levels are widened for the narrowness of a bootstrap over few runs.
        Measured by ``bench/bench_coverage.py --study intervals`` (10 runs, 200 samples, nominal
        95 %, 200 replicates of a 4-state chain): plain percentiles without widening cover
        0.90-0.91, the default 0.94-0.95 (on a 49-state lattice walk 0.89-0.92 and 0.94-0.97). Not
        used with ``uncertainty="bayes"``.
    uncertainty : {"bootstrap", "bayes"}, default "bootstrap"
        Where the samples come from. "bootstrap": resampled runs (above). "bayes": at each lag,
        ``n_samples`` draws from the Bayesian posterior of reversible transition matrices given
        the full-data counts on the model's states (:func:`msmkit.posterior.posterior_at_lag`; sliding-window
        counts divided by the lag, as independent transitions), and equal-tailed credible
        intervals from their timescales (no widening; prior count -1, see
        :data:`msmkit.posterior.INTERVAL_PRIOR_COUNT`). Needs ``reversible=True``. Measured with
        10 runs (nominal 95 %, 200 samples): slowest timescale 0.970 at 33 crossings (200
        replicates, bench/bench_posterior_coverage.py; bootstrap 0.960), 0.927 at 54 crossings
        (400 replicates, bench/bench_coverage.py --study kinetics; bootstrap 0.945), 0.958 on a
        49-state lattice walk at 157 crossings (bootstrap 0.963); but the lattice's second
        timescale only 0.858 (120 replicates, bench/bench_posterior_coverage.py; bootstrap 0.933:
        the posterior sits above the truth there). Below :data:`msmkit._bootstrap.FEW_CROSSINGS` crossings a note says so for
        either method. The posterior
        treats transitions as independent given the states; the bootstrap over runs also sees
        correlations between runs' starts and the lack of equilibrium.
    progress : bool
        Show a progress bar.
    client : dask.distributed.Client, optional
        Count the runs on the cluster's workers and fit the bootstrap samples there, in batches
        of samples as tasks (needs the extra ``dask``). The same seed gives the same samples
        and the same timescales as in memory. With ``uncertainty="bayes"`` the runs are counted
        on the cluster and the posterior is sampled in this process (one chain per lag).
    cancel : object with ``is_set()``, optional
        E.g. a ``threading.Event`` set from another thread: asked between units of work (a lag,
        a bootstrap sample); once set, :class:`~msmkit.errors.Cancelled` is raised.

    Returns
    -------
    LagScan

    Notes
    -----
    Work is shared: counts are computed once per lag and per run, and every bootstrap sample is
    a weighted sum of those per-run count matrices (one sparse product); each sample's reversible
    estimate starts from the full-data stationary vector. The same resampled runs are used at
    every lag, so the intervals at neighbouring lags are comparable.
    """
    runs = as_label_trajectories(labels)
    dt, unit = check_dt(dt), check_unit(unit)
    lags = _check_lags(lags, runs)
    n_processes = check_int(n_processes, "n_processes", minimum=1)
    n_samples = check_int(n_samples, "n_samples", minimum=0)
    n_slow = check_int(n_slow, "n_slow", minimum=1)
    confidence = check_probability(confidence, "confidence")
    interval = check_interval(interval)
    reversible, every_frame = check_bool(reversible, "reversible"), check_bool(every_frame, "every_frame")
    bayes = check_uncertainty(uncertainty, reversible) == "bayes"
    rtol, progress = check_tolerance(rtol, "rtol"), check_bool(progress, "progress")
    rng = np.random.default_rng(check_seed(seed))

    blocks, weights, notes = resampling_plan(len(runs), 0 if bayes else n_samples, rng)
    chain_seeds = rng.integers(0, 2 ** 63, size=len(lags)) if bayes else None
    if bayes and n_samples:
        notes.append(f"Intervals: equal-tailed {100 * confidence:g}% credible intervals from {n_samples} samples of "
                     f"the posterior of reversible transition matrices at each lag"
                     + (" (sliding-window counts divided by the lag)." if every_frame else "."))
    warn_few_samples(n_samples, confidence, "lag_scan", stacklevel=2)

    L = len(lags)
    ts = np.full((L, n_processes), np.nan)
    samples = np.full((L, n_samples, n_processes), np.nan)
    models = {}
    metadata = {"labels_sha256": fingerprint(runs), "frames_per_run": [int(r.size) for r in runs],
                "package_version": package_version()}
    if client is not None:
        n_states = prepare_counting(runs, lags[0], n_states)[2]
    placed = place(runs, client)  # label arrays sent to the workers once, for every lag
    n_units = weights.shape[1]
    jack_weights = np.ones((n_units, n_units)) - np.eye(n_units) if n_samples and interval == "bca" \
        and not bayes else np.zeros((0, n_units))
    jack = np.full((L, jack_weights.shape[0], n_processes), np.nan)
    bar = _progress(L * (1 + n_samples + jack_weights.shape[0]), progress, "lag scan", cancel)
    pool = ThreadPoolExecutor(min(2, os.cpu_count() or 1))
    # one BLAS thread throughout: the scan is many small solves (the samples run on the pool's
    # threads); at 500 states a threaded dense eigen-solve was 3-5x slower than one thread when
    # other jobs shared the cores, and barely faster on idle ones
    from threadpoolctl import threadpool_limits  # a dependency of scikit-learn

    limit = threadpool_limits(1, user_api="blas")
    try:
        for a, lag in enumerate(lags):
            rows, n = run_count_rows(placed, lag, n_states=n_states, every_frame=every_frame, blocks_per_run=blocks,
                                     client=client)
            full = _unflatten(np.asarray(rows.sum(axis=0)).ravel(), n)
            meta = dict(metadata, created=now_utc(),
                        parameters={"lag": int(lag), "dt": dt, "unit": unit, "reversible": bool(reversible),
                                    "every_frame": bool(every_frame), "n_states": n})
            model = model_from_counts(full, lag, dt=dt, unit=unit, reversible=reversible, metadata=meta,
                                      warn=False)
            models[int(lag)] = model
            got = model.relaxation_times(n_processes)
            ts[a, :got.size] = got
            bar.update(1)
            if n_samples and bayes:
                samples[a] = _posterior_timescales(model, n_samples, lag, dt, every_frame, n_processes,
                                                   chain_seeds[a], bar)
            elif n_samples:
                # every bootstrap sample and, for BCa, every leave-one-unit-out fit at this lag
                got = _timescales_of(np.vstack([weights, jack_weights]), rows, n, model, lag, dt, reversible,
                                     n_processes, pool, bar, client)
                samples[a], jack[a] = got[:n_samples], got[n_samples:]
    finally:
        pool.shutdown(cancel_futures=True)  # a cancelled scan does not wait for queued samples
        limit.restore_original_limits()
        bar.close()

    if n_samples and bayes:
        lower, upper = percentile_interval(samples, confidence, axis=1)
    elif n_samples:
        lower, upper = bootstrap_interval(samples, ts, confidence, method=interval, jackknife=jack, axis=1,
                                          n_units=n_units)
    else:
        lower = np.full_like(ts, np.nan)
        upper = np.full_like(ts, np.nan)

    lags_arr = np.asarray(lags, dtype=np.int64)
    support = _data_support(models, lags_arr, runs, dt)
    suggested, reason = suggest_lag(lags_arr, ts, lower, upper, dt=dt, unit=unit, n_slow=n_slow, rtol=rtol,
                                    confidence=confidence, **support)
    notes += _scan_findings(lags_arr, ts, models, dt, unit, lower, upper)
    crossings = support["crossings"]
    if n_samples:
        few = lags_arr[crossings < FEW_CROSSINGS].tolist()
        notes += few_crossings_note(f"At lag(s) {few} frames (the fewest shown)", float(crossings.min()),
                                    "bayes" if bayes else "bootstrap")
    return LagScan(lags_arr, ts, lower, upper, samples, dt, unit, confidence, n_samples, suggested, reason,
                   notes, models, "bayes" if bayes else "bootstrap")


def _posterior_timescales(model, n_samples, lag, dt, every_frame, k, seed, bar) -> np.ndarray:
    """Timescales (n_samples, k) of posterior samples of the model's counts, NaN where a sample
    has fewer processes (a model of one state has none)."""
    out = np.full((n_samples, k), np.nan)
    if model.n_states < 2:
        bar.update(n_samples)
        return out
    draws = posterior_at_lag(model.transition_counts, n_samples, lag=lag, every_frame=every_frame, seed=int(seed),
                             initial=model.propagator)
    for b, (T, pi) in enumerate(draws):
        # the symmetric flow pi_i T_ij of a reversible sample: leading eigenvalues without a dense solve
        w = flow_eigenvalues(pi[:, None] * T, min(k + 1, T.shape[0]))
        got = implied_timescales(w[1:k + 1], lag, dt)
        out[b, :got.size] = got
        bar.update(1)
    return out


def _timescales_of(weights, rows, n, model, lag, dt, reversible, k, pool, bar, client) -> np.ndarray:
    """Timescales (n_weights, k) of the resampled data ``weights @ rows`` fitted on the model's
    states, NaN where a sample has fewer processes."""
    out = np.full((weights.shape[0], k), np.nan)
    if not weights.shape[0]:
        return out
    on_states = StateCounts(rows, n, model.states)
    values = on_states.values(weights)  # all samples in one product
    kernel = SampleTimescales(on_states, model, k)
    if client is not None:
        return map_sample_batches(sample_timescales_batch, values, kernel, client=client,
                                  what=f"bootstrap samples at lag {lag}", bar=bar)

    # samples are independent; on the pool's threads (one BLAS thread each, set by lag_scan)
    # only where their solves, which release the interpreter lock, outweigh the numpy glue,
    # which holds it (see THREADED_PATTERN)
    threaded = kernel.pattern.rows.size >= THREADED_PATTERN
    for b, got in enumerate(pool.map(kernel, values) if threaded else map(kernel, values)):
        out[b, :got.size] = got
        bar.update(1)
    return out


def _check_lags(lags, runs) -> list[int]:
    if isinstance(lags, (int, np.integer)):
        lags = [lags]
    try:
        values = [check_int(x, "lags") for x in lags]
    except TypeError:
        raise InputError(f"lags must be a list of positive integers (frames), but got {lags!r}") from None
    if not values:
        raise InputError("lags is empty: give at least one lag in frames")
    bad = [x for x in values if x < 1]
    if bad:
        raise InputError(f"lags must be positive integers (frames), but got {bad}")
    longest = max(r.size for r in runs)
    too_long = [x for x in values if x >= longest]
    if too_long:
        raise InputError(f"lags {too_long} are not shorter than the longest trajectory ({longest} frames); "
                         f"remove them or supply longer trajectories")
    return sorted(set(values))


#: a suggestion needs the candidate's interval narrower than this share of the estimate
#: (upper - lower <= 0.5 x timescale, i.e. about +-25 %); wider intervals agree with anything
MAX_RELATIVE_WIDTH = 0.5
#: a suggestion needs at least this many larger scanned lags that confirm the value
MIN_CONFIRMING_LAGS = 2


def suggest_lag(lags, timescales, lower, upper, *, dt: float, unit: str, n_slow: int = 2, rtol: float = 0.05,
                confidence: float = 0.95, crossings=None, run_time: float | None = None,
                max_width: float = MAX_RELATIVE_WIDTH):
    """The smallest lag from which the slowest timescales stay constant, with the reason in words.

    A lag qualifies when

    1. the slowest timescale exceeds the lag time there;
    2. the data are long enough: the slowest process is crossed at least ``FEW_CROSSINGS`` (20)
       times at that lag (``crossings``), and the slowest timescale is not longer than the
       longest run (``run_time``) -- otherwise no run shows the process relax and a level
       value cannot be told from noise;
    3. with bootstrap intervals, the interval of each followed timescale means something: it
       contains the estimate, it is at most ``max_width`` times the estimate wide, and the
       slowest one's lower end lies above the lag time;
    4. at least two larger scanned lags resolve the slowest timescale, and at every one of them
       each of the ``n_slow`` slowest timescales resolved at the candidate stays at the
       candidate's value: inside the candidate's bootstrap interval, or within ``rtol``
       relatively.

    Parameters
    ----------
    lags : array_like of int, shape (L,)
        Scanned lags in frames, ascending.
    timescales, lower, upper : ndarray, shape (L, k)
        Timescales and their interval in ``unit`` (NaN intervals: none computed).
    dt : float
    unit : str
    n_slow : int
    rtol : float
    confidence : float
        Coverage of the intervals, for the text.
    crossings : array_like of float, shape (L,), optional
        Crossings of the slowest process at each lag (``MarkovModel.state_changes``); not
        checked when missing.
    run_time : float, optional
        Duration of the longest run in ``unit``; not checked when missing.
    max_width : float
        Largest accepted (upper - lower) / timescale.

    Returns
    -------
    (lag or None, reason : str)
    """
    from .spectral import FEW_CROSSINGS

    lags = np.asarray(lags)
    times = lags * dt
    has_ci = np.any(np.isfinite(lower))
    how = (f"each later value lies inside the {100 * confidence:g}% interval at the smaller lag or differs "
           f"from it by at most {100 * rtol:g}%"
           if has_ci else f"they differ by at most {100 * rtol:g}% (no bootstrap intervals were computed, so "
                          f"the precision of the timescales was not checked)")
    if timescales.shape[0] < 2:
        return None, ("Only one lag was scanned: a lag can only be suggested where the timescales are seen "
                      "to level off across several lags.")
    crossings = None if crossings is None else np.asarray(crossings, dtype=float)
    refused = {}  # why resolved candidates were refused: first example of each kind
    never_resolved = True
    for a in range(len(lags)):
        t0 = timescales[a]
        if not (np.isfinite(t0[0]) and t0[0] > times[a]):
            continue
        never_resolved = False
        procs = [p for p in range(min(n_slow, t0.size)) if np.isfinite(t0[p]) and t0[p] > times[a]]
        later = [b for b in range(a + 1, len(lags)) if timescales[b, 0] > times[b]]
        why = _refusal(a, t0, procs, later, lags, times, lower, upper, has_ci, crossings, run_time, max_width,
                       unit, FEW_CROSSINGS, confidence)
        if why is not None:
            refused.setdefault(why[0], why[1])
            continue
        if all(_agree(t0[p], timescales[b, p], lower[a, p], upper[a, p], rtol)
               for b in later for p in procs if p == 0 or timescales[b, p] > times[b]):
            names = "slowest timescale" if len(procs) == 1 else f"{len(procs)} slowest timescales"
            confirm = ", ".join(str(int(lags[b])) for b in later)
            support = "" if crossings is None else (f"; the data cross the slowest process {crossings[a]:.3g} "
                                                    f"times at that lag")
            return int(lags[a]), (
                f"Lag {int(lags[a])} frames ({times[a]:g} {unit}) is the smallest scanned lag from which the "
                f"{names} stay constant at every larger scanned lag where they are resolved ({confirm} frames): "
                f"{how}. The slowest timescale there, {t0[0]:.4g} {unit}, is above the lag time{support}.")
        refused.setdefault("changing", "")
    if never_resolved:
        return None, (f"No scanned lag is shorter than the slowest implied timescale: nothing is resolved. "
                      f"Scan shorter lags, or the data hold no process slower than {times[0]:g} {unit}.")
    kinds = ("data", "interval") if "changing" in refused else ("data", "interval", "later")
    texts = [refused[kind] for kind in kinds if kind in refused]
    if "changing" in refused:
        texts.append(f"the slowest timescales keep changing with the lag across the scanned range "
                     f"({int(lags[0])}-{int(lags[-1])} frames; two values count as equal when {how})")
    reason = "No lag is suggested: " + "; ".join(texts) + "."
    if not has_ci and "changing" not in refused:
        reason += " The precision of the timescales was not checked: no bootstrap intervals were computed."
    if "data" in refused or "interval" in refused:
        return None, reason + " Collect more or longer runs before choosing a lag."
    return None, reason + " Scan longer lags, refine the state definition, or collect more data."


def _refusal(a, t0, procs, later, lags, times, lower, upper, has_ci, crossings, run_time, max_width, unit,
             few_crossings, confidence):
    """Why the candidate lag ``a`` cannot be suggested before the later values are even compared:
    (kind, text) or None. Kinds: "data" (too little data), "interval" (intervals that mean
    nothing), "later" (too few larger lags to confirm)."""
    lag = int(lags[a])
    if crossings is not None and not crossings[a] >= few_crossings:
        return "data", (f"the data cross the slowest process only {crossings[a]:.3g} time(s) at lag {lag} frames "
                        f"(at least {few_crossings} are needed for the timescale to mean something)")
    if run_time is not None and t0[0] > run_time:
        return "data", (f"the slowest timescale at lag {lag} frames, {t0[0]:.4g} {unit}, is longer than the "
                        f"longest run ({run_time:g} {unit}): no run shows the process relax")
    if has_ci:
        conf = f"{100 * confidence:g}%"
        for p in procs:
            lo, hi = lower[a, p], upper[a, p]
            if not (np.isfinite(lo) and np.isfinite(hi)):
                return "interval", f"timescale {p + 1} at lag {lag} frames has no {conf} interval"
            if not lo <= t0[p] <= hi:
                return "interval", (f"at lag {lag} frames timescale {p + 1} ({t0[p]:.4g} {unit}) lies outside the "
                                    f"{conf} interval made for it, [{lo:.4g}, {hi:.4g}]")
            if hi - lo > max_width * t0[p]:
                return "interval", (f"at lag {lag} frames the {conf} interval of timescale {p + 1}, "
                                    f"[{lo:.4g}, {hi:.4g}] {unit}, is wider than {max_width:g} x the estimate "
                                    f"{t0[p]:.4g}: later values would agree with it whatever they are")
        if not lower[a, 0] > times[a]:
            return "interval", (f"at lag {lag} frames the {conf} interval of the slowest timescale reaches down "
                                f"to {lower[a, 0]:.4g} {unit}, not above the lag time {times[a]:g} {unit}")
    if len(later) < MIN_CONFIRMING_LAGS:
        return "later", (f"from lag {lag} frames on fewer than {MIN_CONFIRMING_LAGS} larger scanned lags resolve "
                         f"the slowest timescale to confirm it")
    return None


def _agree(ta, tb, la, ua, rtol) -> bool:
    """Whether the timescale ``tb`` at a larger lag stays at the candidate's value ``ta``: inside
    the candidate's interval [la, ua], or within ``rtol`` of it. (Overlapping intervals would be
    too lenient: neighbouring lags share their data, so their intervals overlap even while the
    timescale is still climbing.)"""
    if not (np.isfinite(ta) and np.isfinite(tb)):
        return False
    if abs(tb - ta) <= rtol * abs(ta):
        return True
    return bool(np.isfinite(la) and np.isfinite(ua) and la <= tb <= ua)


def _data_support(models, lags, runs, dt) -> dict:
    """Crossings of the slowest process at every scanned lag, and the longest run in time: what
    :func:`suggest_lag` weighs against the timescales."""
    return {"crossings": np.array([models[int(lag)].state_changes()[1] for lag in lags]),
            "run_time": max(r.size for r in runs) * dt}


def _estimate_outside(ts, lower, upper) -> np.ndarray:
    """Where the full-data timescale lies outside the bootstrap interval of the same lag (False without one)."""
    with np.errstate(invalid="ignore"):
        return np.isfinite(ts) & np.isfinite(lower) & np.isfinite(upper) & ((ts < lower) | (ts > upper))


def _scan_findings(lags, ts, models, dt, unit, lower=None, upper=None) -> list[str]:
    found = []
    if lower is not None:
        outside = _estimate_outside(ts, lower, upper)
        if outside.any():
            where = sorted({int(lags[a]) for a in np.nonzero(outside)[0]})
            found.append(f"At lag(s) {where} frames {int(outside.sum())} timescale(s) lie outside the "
                         f"interval computed for them (column estimate_outside of the table): the sampled "
                         f"values are skewed or too few, so those intervals do not describe the uncertainty.")
    unresolved = [int(l) for l, t in zip(lags, ts[:, 0]) if np.isfinite(t) and t <= l * dt]
    if unresolved:
        found.append(f"At lag(s) {unresolved} frames the slowest timescale is shorter than the lag itself: "
                     f"those models resolve no process.")
    dropped = [(int(l), m.kept_fraction) for l, m in models.items() if m.kept_fraction < 0.99]
    if dropped:
        worst = min(dropped, key=lambda x: x[1])
        found.append(f"At {len(dropped)} lag(s) more than 1% of the counts fall outside the largest connected "
                     f"set (worst: {100 * (1 - worst[1]):.3g}% dropped at lag {worst[0]}).")
    return found
