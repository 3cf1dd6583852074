"""A 20-lag scan with 50 bootstrap samples on 1e6 frames and 500 states: the time, and the ratio
to 20 x one single-lag estimate (build_model) measured in the same run. A scan without reuse
would cost about 20 x 51 single estimates; the ratio shows how much of that the shared counting
and warm starts save."""
import argparse
import time
import warnings

import numpy as np

import msmkit as mk
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


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--frames", type=float, default=1e6)
    ap.add_argument("--runs", type=int, default=50)
    ap.add_argument("--states", type=int, default=500)
    ap.add_argument("--samples", type=int, default=50)
    a = ap.parse_args()
    rng = np.random.default_rng(0)
    labels = metastable_labels(rng, int(a.frames), a.runs, a.states)
    lags = np.unique(np.geomspace(1, 200, 20).astype(int)).tolist()
    while len(lags) < 20:
        lags.append(lags[-1] + 10)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", mk.DiagnosticWarning)
        single = best_time(lambda: mk.build_model(labels, lags[len(lags) // 2], dt=0.1, unit="ns"), 2)
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
    print(f"suggested lag: {scan.suggested_lag} ({scan.reason[:80]}...)")


if __name__ == "__main__":
    main()
