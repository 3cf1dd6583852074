"""A 20-lag scan with 50 bootstrap samples on 1e6 frames and 500 states: the time, and the ratio
to 20 x one single-lag estimate (build_model) measured in the same run. A scan without reuse
would cost about 20 x 51 single estimates; the ratio shows how much of that the shared counting
and warm starts save.

Before / after in the same run: on ``--compare`` samples at every lag, the per-sample kernel of
the scan (msmkit._bootstrap.SampleTimescales) is timed against the route every sample took
before it (the general estimator on a sample's CSR matrix, then a dense symmetric eigen-solve of
the leading eigenvalues), both on one thread with one BLAS thread, and the scan time the earlier
route would have needed is extrapolated from that (20 builds + samples x the mean time / 2
threads)."""
import argparse
import time
import warnings

import numpy as np
import scipy.linalg as la
from threadpoolctl import threadpool_limits

import msmkit as mk
from msmkit._bootstrap import SampleTimescales, StateCounts, fit_sample, resampling_plan
from msmkit.counts import run_count_rows
from msmkit.spectral import implied_timescales, magnitude_order
from _timing import best_time


def metastable_labels(rng, n_frames, n_runs, n_states, barrier=4.0):
    """Labels of a Metropolis random walk (steps of +-1 state) on a ring of states with two
    wells separated by barriers of ``barrier`` kT: sticky and metastable, like microstate
    trajectories of molecular dynamics. All runs are advanced together."""
    per = n_frames // n_runs
    x = np.arange(n_states) / n_states
    V = 0.5 * barrier * np.cos(4 * np.pi * x) + 0.3 * np.sin(10 * np.pi * x)
    pos = rng.integers(0, n_states, n_runs)
    out = np.empty((n_runs, per), dtype=np.int32)
    steps = rng.choice([-1, 0, 1], size=(per, n_runs), p=[0.3, 0.4, 0.3])
    accept = np.log(rng.random((per, n_runs)))
    for t in range(per):
        trial = (pos + steps[t]) % n_states
        ok = accept[t] < V[pos] - V[trial]
        pos = np.where(ok, trial, pos)
        out[:, t] = pos
    return list(out)


def earlier_route(C, pi, lag, dt, k):
    """A sample's timescales as every sample was computed before the per-sample kernel: the
    general estimator, then the leading eigenvalues of D^1/2 T D^-1/2 by a dense partial solve."""
    _, T, p = fit_sample(C, reversible=True, initial=pi)
    n = T.shape[0]
    s = np.sqrt(p)
    A = s[:, None] * T / s[None, :]
    A = 0.5 * (A + A.T)
    w = la.eigh(A, eigvals_only=True, subset_by_index=[n - k - 1, n - 1], check_finite=False)
    if 2 * np.min(np.diag(T)) - 1 < -np.min(np.abs(w)):
        w = np.concatenate([w, la.eigh(A, eigvals_only=True, subset_by_index=[0, k], check_finite=False)])
    return implied_timescales(w[magnitude_order(w)][1:k + 1], lag, dt)


def compare_routes(labels, lags, scan, n_units, per_lag):
    """Mean wall time per sample of the earlier route and of the kernel, on ``per_lag``
    samples of every lag (one thread), and the largest relative difference of their timescales."""
    _, weights, _ = resampling_plan(n_units, per_lag, np.random.default_rng(1))
    t_old = t_new = 0.0
    diff = 0.0
    with threadpool_limits(1, user_api="blas"):
        for lag in lags:
            model = scan.model(lag)
            rows, n = run_count_rows(labels, lag)
            on_states = StateCounts(rows, n, model.states)
            values = on_states.values(weights)
            start = time.perf_counter()
            kernel = SampleTimescales(on_states, model, 4)
            new = [kernel(v) for v in values]
            t_new += time.perf_counter() - start
            start = time.perf_counter()
            old = [earlier_route(on_states.matrix(v), model.equilibrium, lag, model.dt, 4) for v in values]
            t_old += time.perf_counter() - start
            diff = max(diff, max(float(np.max(np.abs(a / b - 1))) for a, b in zip(new, old)))
    m = len(lags) * per_lag
    return t_old / m, t_new / m, diff


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--frames", type=float, default=1e6)
    ap.add_argument("--runs", type=int, default=50)
    ap.add_argument("--states", type=int, default=500)
    ap.add_argument("--samples", type=int, default=50)
    ap.add_argument("--compare", type=int, default=4, help="samples per lag timed by both routes (0: none)")
    a = ap.parse_args()
    rng = np.random.default_rng(0)
    labels = metastable_labels(rng, int(a.frames), a.runs, a.states)
    lags = np.unique(np.geomspace(1, 200, 20).astype(int)).tolist()
    while len(lags) < 20:
        lags.append(lags[-1] + 10)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", mk.DiagnosticWarning)
        single = best_time(lambda: mk.build_model(labels, lags[len(lags) // 2], dt=0.1, unit="ns"), 2)
        # the scan runs with one BLAS thread; a build with all of them is the slower baseline on a
        # loaded machine (threads of the dense eigen-solve wait for busy cores), so both are shown
        with threadpool_limits(1, user_api="blas"):
            single_1 = best_time(lambda: mk.build_model(labels, lags[len(lags) // 2], dt=0.1, unit="ns"), 3)
        start = time.perf_counter()
        scan = mk.lag_scan(labels, lags, dt=0.1, unit="ns", n_processes=4, n_samples=a.samples, seed=0)
        t_scan = time.perf_counter() - start
    print(f"lag scan: {len(lags)} lags x (1 + {a.samples} bootstrap samples), {int(a.frames):.0e} frames, "
          f"{a.states} states: {t_scan:.3g} s")
    print(f"single-lag build_model: {single:.3g} s; scan / (20 x single) = {t_scan / (20 * single):.3g}; "
          f"scan / (20 x 51 x single) = {t_scan / (20 * (1 + a.samples) * single):.3g}")
    per_sample = max(t_scan - 20 * single, 0.0) / (20 * a.samples)
    print(f"one bootstrap sample (scan beyond 20 builds, per sample) / one build_model = {per_sample / single:.3g} "
          f"(target: scan / (20 x single) <= 5, a sample <= 0.04 of a build)")
    per_sample_1 = max(t_scan - 20 * single_1, 0.0) / (20 * a.samples)
    print(f"against a build with one BLAS thread ({single_1:.3g} s), as the scan runs: scan / (20 x single) = "
          f"{t_scan / (20 * single_1):.3g}; one bootstrap sample / one build = {per_sample_1 / single_1:.3g}")
    print(f"suggested lag: {scan.suggested_lag} ({scan.reason[:80]}...)")
    if a.compare:
        old, new, diff = compare_routes(labels, lags, scan, a.runs, a.compare)
        before = 20 * single + 20 * a.samples * old / 2
        print(f"per sample, one thread, {a.compare} samples x {len(lags)} lags: earlier route {1e3 * old:.3g} ms "
              f"({old / single:.3g} of a build), kernel {1e3 * new:.3g} ms ({new / single:.3g} of a build): "
              f"{old / new:.3g}x faster; timescales agree to {diff:.2g} (relative)")
        print(f"before (extrapolated, 2 threads): scan ~{before:.3g} s = {before / (20 * single):.3g} x 20 builds; "
              f"after (measured above): {t_scan:.3g} s = {t_scan / (20 * single):.3g} x 20 builds")


if __name__ == "__main__":
    main()
