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
from ._bootstrap import fit_sample, percentile_interval, resampling_plan, sample_rows
from ._bootstrap import progress_bar as _progress
from ._bootstrap import unflatten as _unflatten
from ._checks import (as_label_trajectories, check_bool, check_dt, check_int, check_probability, check_seed,
                      check_tolerance, check_unit)
from .counts import run_count_rows
from .errors import InputError
from .model import MarkovModel, fingerprint, model_from_counts, _now, _version
from .spectral import eigen_decomposition, implied_timescales

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
        Percentile bootstrap interval (NaN when ``n_samples == 0``).
    samples : ndarray, shape (L, n_samples, k)
        Bootstrap timescales (NaN where a sample had fewer processes).
    dt : float
    unit : str
    confidence : float
    n_samples : int
    suggested_lag : int or None
    reason : str
        Why that lag was suggested, or why none was.
    notes : list of str
        How the uncertainty was obtained, and findings at the scanned lags.
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
        ``lower``, ``upper``, ``resolved`` (timescale above the lag time). Time columns are in
        ``df.attrs['unit']``.
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
        df.attrs["unit"] = self.unit
        return df


def lag_scan(labels, lags, *, dt: float = 1.0, unit: str = "step", n_processes: int = 5,
             reversible: bool = True, n_samples: int = 0, seed=None, confidence: float = 0.95,
             every_frame: bool = True, n_states: int | None = None, n_slow: int = 2, rtol: float = 0.05,
             progress: bool = False, client=None) -> LagScan:
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
    n_processes : int, default 5
        How many of the slowest processes to follow.
    reversible : bool, default True
    n_samples : int, default 0
        Bootstrap samples. Whole runs are resampled with replacement; with fewer than 5 runs,
        contiguous blocks of the runs are resampled instead (said in ``notes``). 0: no interval.
    seed : int, optional
        Seeds the resampling; the same seed gives the same intervals.
    confidence : float, default 0.95
        Coverage of the percentile interval.
    every_frame : bool, default True
        Sliding-window counting.
    n_states : int, optional
    n_slow : int, default 2
        How many of the slowest timescales must level off for a lag to be suggested (only those
        resolved at that lag count; the slowest always does).
    rtol : float, default 0.05
        Relative change below which two timescales count as equal even when their intervals do
        not overlap (and the only criterion when ``n_samples == 0``).
    progress : bool
        Show a progress bar.
    client : dask.distributed.Client, optional
        Count the runs on the cluster's workers and fit the bootstrap samples there, in batches
        of samples as tasks (needs the extra ``dask``). The same seed gives the same samples
        and the same timescales as in memory.

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
    reversible, every_frame = check_bool(reversible, "reversible"), check_bool(every_frame, "every_frame")
    rtol, progress = check_tolerance(rtol, "rtol"), check_bool(progress, "progress")
    rng = np.random.default_rng(check_seed(seed))

    blocks, weights, notes = resampling_plan(len(runs), n_samples, rng)

    L = len(lags)
    ts = np.full((L, n_processes), np.nan)
    samples = np.full((L, n_samples, n_processes), np.nan)
    models = {}
    metadata = {"labels_sha256": fingerprint(runs), "frames_per_run": [int(r.size) for r in runs],
                "package_version": _version()}
    remote = None
    if client is not None:
        from . import distributed as _dist
        from .counts import _prepare

        n_states = _prepare(runs, lags[0], n_states)[2]
        remote = _dist.scatter_labels(client, runs)
    bar = _progress(L * (1 + n_samples), progress, "lag scan")
    pool = ThreadPoolExecutor(min(2, os.cpu_count() or 1))
    try:
        for a, lag in enumerate(lags):
            if remote is not None:
                n = n_states
                rows = _dist.count_rows(client, remote, [r.size for r in runs], lag, n, every_frame, blocks)
            else:
                rows, n = run_count_rows(runs, lag, n_states=n_states, every_frame=every_frame, blocks_per_run=blocks)
            full = _unflatten(np.asarray(rows.sum(axis=0)).ravel(), n)
            meta = dict(metadata, created=_now(),
                        parameters={"lag": int(lag), "dt": dt, "unit": unit, "reversible": bool(reversible),
                                    "every_frame": bool(every_frame), "n_states": n})
            model = model_from_counts(full, lag, dt=dt, unit=unit, reversible=reversible, metadata=meta,
                                      warn=False)
            models[int(lag)] = model
            got = model.relaxation_times(n_processes)
            ts[a, :got.size] = got
            bar.update(1)
            if n_samples:
                initial = np.zeros(n)
                initial[model.states] = model.equilibrium
                sampled = sample_rows(weights, rows)  # (n_samples, n*n): all samples in one product
                if remote is not None:
                    samples[a] = _dist.bootstrap_timescales(client, sampled, n, lag, dt, reversible,
                                                            initial, n_processes, bar)
                    continue
                def one(b, sampled=sampled, n=n, lag=lag, initial=initial):
                    return _sample_timescales(sampled.getrow(b), n, lag, dt, reversible, initial, n_processes)

                # samples are independent; the estimate and eigen-solve release the interpreter lock
                for b, got in enumerate(pool.map(one, range(n_samples))):
                    samples[a, b, :got.size] = got
                    bar.update(1)
    finally:
        pool.shutdown()
        bar.close()

    if n_samples:
        lower, upper = percentile_interval(samples, confidence, axis=1)
    else:
        lower = np.full_like(ts, np.nan)
        upper = np.full_like(ts, np.nan)

    lags_arr = np.asarray(lags, dtype=np.int64)
    suggested, reason = suggest_lag(lags_arr, ts, lower, upper, dt=dt, unit=unit, n_slow=n_slow, rtol=rtol,
                                    confidence=confidence)
    notes += _scan_findings(lags_arr, ts, models, dt, unit)
    return LagScan(lags_arr, ts, lower, upper, samples, dt, unit, confidence, n_samples, suggested, reason,
                   notes, models)


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


def _sample_timescales(row, n, lag, dt, reversible, initial, k) -> np.ndarray:
    """Timescales of one bootstrap sample given as a flattened count row; NaN-free, may be short."""
    fit = fit_sample(_unflatten(row, n), reversible=reversible, initial=initial)
    if fit is None:
        return np.empty(0)
    _, T, pi = fit
    w = eigen_decomposition(T, pi, k=min(k + 1, T.shape[0]), reversible=reversible)
    return implied_timescales(w[1:k + 1], lag, dt)


def suggest_lag(lags, timescales, lower, upper, *, dt: float, unit: str, n_slow: int = 2, rtol: float = 0.05,
                confidence: float = 0.95):
    """The smallest lag from which the slowest timescales stay constant, with the reason in words.

    A lag qualifies when (1) the slowest timescale exceeds the lag time there, and (2) at every
    larger scanned lag where it is still resolved, each of the ``n_slow`` slowest timescales
    resolved at the candidate lag stays at the candidate's value: it lies inside the candidate's
    bootstrap interval, or differs by at most ``rtol`` relatively. At least one larger lag must
    confirm it.

    Returns
    -------
    (lag or None, reason : str)
    """
    lags = np.asarray(lags)
    times = lags * dt
    has_ci = np.any(np.isfinite(lower))
    how = (f"each later value lies inside the {100 * confidence:g}% interval at the smaller lag or differs "
           f"from it by at most {100 * rtol:g}%"
           if has_ci else f"they differ by at most {100 * rtol:g}% (no bootstrap intervals were computed)")
    if timescales.shape[0] < 2:
        return None, ("Only one lag was scanned: a lag can only be suggested where the timescales are seen "
                      "to level off across several lags.")
    never_resolved = True
    for a in range(len(lags)):
        t0 = timescales[a]
        if not (np.isfinite(t0[0]) and t0[0] > times[a]):
            continue
        never_resolved = False
        procs = [p for p in range(min(n_slow, t0.size)) if np.isfinite(t0[p]) and t0[p] > times[a]]
        later = [b for b in range(a + 1, len(lags)) if timescales[b, 0] > times[b]]
        if not later:
            continue
        ok = True
        for b in later:
            for p in procs:
                tb = timescales[b, p]
                if p > 0 and not tb > times[b]:
                    continue  # a faster process that the larger lag no longer resolves
                if not _agree(t0[p], tb, lower[a, p], upper[a, p], rtol):
                    ok = False
                    break
            if not ok:
                break
        if ok:
            names = "slowest timescale" if len(procs) == 1 else f"{len(procs)} slowest timescales"
            confirm = ", ".join(str(int(lags[b])) for b in later)
            return int(lags[a]), (
                f"Lag {int(lags[a])} frames ({times[a]:g} {unit}) is the smallest scanned lag from which the "
                f"{names} stay constant at every larger scanned lag where they are resolved ({confirm} frames): "
                f"{how}. The slowest timescale there, {t0[0]:.4g} {unit}, is above the lag time.")
    if never_resolved:
        return None, (f"No scanned lag is shorter than the slowest implied timescale: nothing is resolved. "
                      f"Scan shorter lags, or the data hold no process slower than {times[0]:g} {unit}.")
    return None, (f"The slowest timescales keep changing with the lag across the scanned range "
                  f"({int(lags[0])}-{int(lags[-1])} frames; two values count as equal when {how}). "
                  f"Scan longer lags, refine the state definition, or collect more data.")


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


def _scan_findings(lags, ts, models, dt, unit) -> list[str]:
    found = []
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
