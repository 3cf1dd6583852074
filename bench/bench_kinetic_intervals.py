"""Interval methods on the kinetics of one model, bootstrap over runs: how often nominal 95 %
intervals of the slowest timescale, the mean first-passage times and the rate constants between
two sets cover the truth, for plain, bias-corrected and BCa percentile intervals, with and
without the widening for few runs (msmkit._bootstrap.bootstrap_interval).

The chain is the 4-state chain of bench_coverage.py (slowest timescale 99.7 steps, about 54
crossings of the slow process in 10 runs x 1000 steps). The truth and every sample's numbers
come from exact linear algebra on the matrices (bench_coverage.exact_kinetics, numpy only); the
jackknife values for BCa from leave-one-run-out models. Binomial s.e. of a coverage c from R
replicates: sqrt(c (1 - c) / R), 0.011 at c = 0.95 and R = 400. With the same --seed and
--reps the bc+x column repeats the bootstrap column of ``bench_coverage.py --study kinetics
--chain four`` (the same runs and samples)."""
import argparse
import time
import warnings

import numpy as np

import msmkit as mk
from _chains import sample_chain
from bench_coverage import exact_kinetics, four_state_chain, truth
from msmkit._bootstrap import bootstrap_interval

#: (label, interval method, widened for few runs)
METHODS = (("pct+x", "percentile", True), ("bc+x", "bc", True), ("bca+x", "bca", True), ("bca", "bca", False))
ROWS = ("slowest timescale", "MFPT A -> B", "MFPT B -> A", "rate A -> B", "rate B -> A")


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--reps", type=int, default=400)
    ap.add_argument("--seed", type=int, default=11)
    ap.add_argument("--samples", type=int, default=200)
    a = ap.parse_args()
    warnings.simplefilter("ignore", mk.DiagnosticWarning)
    T = four_state_chain()
    src, tgt = np.array([0, 1]), np.array([2, 3])
    true_k, pi = exact_kinetics(T, 1, src, tgt)
    exact = np.concatenate([truth(T, 1)[0], true_k])

    def numbers(P):
        if not np.all(np.isfinite(P)):
            return np.full(exact.size, np.nan)
        return np.concatenate([truth(P, 1)[0], exact_kinetics(P, 1, src, tgt)[0]])

    rng = np.random.default_rng(a.seed)
    hits = {m[0]: [] for m in METHODS}
    above = {m[0]: [] for m in METHODS}
    start = time.perf_counter()
    for rep in range(a.reps):
        runs = sample_chain(T, pi, 10, 1000, rng)
        model = mk.build_model(runs, 1)
        if model.n_states != 4:
            continue
        draw = mk.sample_models(model, runs, n_samples=a.samples, seed=rep)
        values = np.array([numbers(P) for P in draw.propagators])
        jk = np.array([numbers(mk.build_model(runs[:r] + runs[r + 1:], 1, n_states=4).propagator)
                       for r in range(len(runs))])
        est = numbers(model.propagator)
        for label, method, widen in METHODS:
            lo, hi = bootstrap_interval(values, est, 0.95, method=method, jackknife=jk,
                                        n_units=len(runs) if widen else None)
            hits[label].append((lo <= exact) & (exact <= hi))
            above[label].append(exact > hi)
    used = len(hits["bc+x"])
    print(f"4-state chain, 10 runs x 1000 steps, lag 1, {a.samples} bootstrap samples, {used} replicates "
          f"({time.perf_counter() - start:.0f} s); coverage of nominal 0.95 (truth above the interval in brackets)")
    print(f"  {'quantity':<20}" + "".join(f"{m[0]:>16}" for m in METHODS))
    for r, row in enumerate(ROWS):
        print(f"  {row:<20}" + "".join(f"{np.mean(np.asarray(hits[m[0]])[:, r]):>9.3f} [{np.mean(np.asarray(above[m[0]])[:, r]):.3f}]"
                                       for m in METHODS))


if __name__ == "__main__":
    main()
