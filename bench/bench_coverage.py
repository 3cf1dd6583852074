"""How often do the nominal 95 % bootstrap intervals cover the truth?

Trajectories are simulated from chains whose timescales and stationary populations are known
exactly (eigen-decomposition of the true matrix with scipy), the model is built and
bootstrapped as a user would, and the share of replicates whose interval holds the true value
is printed per quantity and interval method, against the nominal level. Per-state populations
are pooled over the states. Binomial standard error of a coverage c from R replicates:
sqrt(c (1 - c) / R) (about 0.015 at c = 0.95 and R = 200).

Chains: a 4-state chain with one slow exchange, and a 49-state Metropolis walk on a 7 x 7
lattice with two wells (slowest timescale about 118 steps).
"""
from __future__ import annotations

import argparse
import time
import warnings

import numpy as np
import scipy.linalg as la

import msmkit as mk
from _chains import sample_chain
from msmkit._bootstrap import bootstrap_interval

#: (name, interval method, expanded for few runs)
METHODS = (("pct", "percentile", False), ("bc", "bc", False), ("bca", "bca", False),
           ("pct+x", "percentile", True), ("bc+x", "bc", True), ("bca+x", "bca", True))


def four_state_chain() -> np.ndarray:
    """Reversible: symmetric flows normalized by rows; slow exchange between {0, 1} and {2, 3}."""
    X = np.array([[900.0, 30, 2, 0], [30, 500, 5, 1], [2, 5, 600, 40], [0, 1, 40, 800]])
    return X / X.sum(axis=1, keepdims=True)


def lattice_chain(side: int = 7, depth: float = 2.5, barrier: float = 1.5) -> np.ndarray:
    """Metropolis walk (kT = 1) on a side x side lattice: two Gaussian wells of ``depth`` and a
    ridge of ``barrier`` along the middle column; each step tries one of 4 neighbours."""
    x, y = np.meshgrid(np.arange(side), np.arange(side), indexing="ij")
    c = (side - 1) / 2
    E = -depth * (np.exp(-((x - 1) ** 2 + (y - c) ** 2) / 2) + np.exp(-((x - side + 2) ** 2 + (y - c) ** 2) / 2))
    E = (E + barrier * (x == side // 2)).ravel()
    n = side * side
    T = np.zeros((n, n))
    for i in range(n):
        xi, yi = divmod(i, side)
        for dx, dy in ((1, 0), (-1, 0), (0, 1), (0, -1)):
            xj, yj = xi + dx, yi + dy
            if 0 <= xj < side and 0 <= yj < side:
                T[i, xj * side + yj] = 0.25 * min(1.0, np.exp(E[i] - E[xj * side + yj]))
        T[i, i] = 1.0 - T[i].sum()
    return T


def truth(T: np.ndarray, k: int):
    """(k slowest timescales in steps, stationary distribution) from scipy.linalg.eig."""
    w, vl = la.eig(T, left=True, right=False)
    order = np.argsort(-np.abs(w))
    pi = np.real(vl[:, order[0]])
    return -1.0 / np.log(np.abs(w[order[1:k + 1]])), pi / pi.sum()


def replicate(T, runs, lag, k, n_samples, seed):
    """Estimates, bootstrap samples and jackknife values of (timescales, populations), or None
    when the model does not keep every state."""
    n = T.shape[0]
    model = mk.build_model(runs, lag)
    if model.n_states != n:
        return None
    scan = mk.lag_scan(runs, [lag], n_processes=k, n_samples=n_samples, seed=seed)
    pops = model.bootstrap_stationary(runs, n_samples=n_samples, seed=seed)
    jk_t = np.full((len(runs), k), np.nan)
    jk_p = np.full((len(runs), n), np.nan)
    for r in range(len(runs)):
        m = mk.build_model(runs[:r] + runs[r + 1:], lag, n_states=n)
        got = m.relaxation_times(k)
        jk_t[r, :got.size] = got
        jk_p[r, m.states] = m.equilibrium
    est_t = model.relaxation_times(k)
    return (est_t, scan.samples[0], jk_t), (model.equilibrium, pops, jk_p)


def study(name, T, *, n_runs, n_steps, lag, k, n_reps, n_samples, sizes, confidence, seed):
    true_t, true_pi = truth(T, k)
    true_t = true_t * 1.0  # in steps; the model's lag is in frames of one step
    rng = np.random.default_rng(seed)
    hits = {}
    widths = {}
    bias = {"timescale": [], "population": []}
    used = 0
    start = time.perf_counter()
    for rep in range(n_reps):
        runs = sample_chain(T, true_pi, n_runs, n_steps, rng)
        got = replicate(T, runs, lag, k, max(sizes), seed=rep)
        if got is None:
            continue
        used += 1
        for what, (est, samples, jk), exact in zip(("timescale", "population"), got, (true_t, true_pi)):
            bias[what].append((est - exact) / exact)
            for B in sizes:
                for name_, method, expand in METHODS:
                    lo, hi = bootstrap_interval(samples[:B], est, confidence, method=method, jackknife=jk,
                                                n_units=n_runs if expand else None)
                    key = (what, B, name_)
                    hits.setdefault(key, []).append((lo <= exact) & (exact <= hi))
                    widths.setdefault(key, []).append((hi - lo) / exact)
    elapsed = time.perf_counter() - start
    print(f"\n{name}: {n_runs} runs x {n_steps} steps, lag {lag}, {used} of {n_reps} replicates kept every "
          f"state ({elapsed:.0f} s); true timescales {np.round(true_t, 2).tolist()} steps")
    for what in ("timescale", "population"):
        b = np.mean(bias[what], axis=0)
        shown = np.round(100 * b[:k], 2).tolist() if what == "timescale" else f"{100 * np.mean(b):+.2f} (mean over states)"
        print(f"  relative bias of the {what} estimate, %: {shown}")
    print(f"  {'quantity':<22}{'samples':>8}" + "".join(f"{m[0]:>9}" for m in METHODS) + "   (nominal "
          f"{confidence:.2f}; median relative width of bca+x in brackets; +x: expanded for few runs)")
    for what, label in (("timescale", "slowest timescale"), ("timescale", "2nd timescale"),
                        ("population", "state populations")):
        col = 1 if label == "2nd timescale" else 0
        for B in sizes:
            row = []
            for name_, _, _ in METHODS:
                h = np.asarray(hits[(what, B, name_)])
                row.append(np.mean(h[:, col]) if what == "timescale" else np.mean(h))
            wd = np.asarray(widths[(what, B, "bca+x")])
            wd = np.median(wd[:, col]) if what == "timescale" else np.median(wd)
            print(f"  {label:<22}{B:>8}" + "".join(f"{c:>9.3f}" for c in row) + f"   [{wd:.3f}]")
    return hits


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--reps", type=int, default=200, help="replicates per chain")
    ap.add_argument("--runs", type=int, default=10)
    ap.add_argument("--samples", type=int, nargs="+", default=[20, 50, 100, 200])
    ap.add_argument("--confidence", type=float, default=0.95)
    ap.add_argument("--chain", choices=["four", "lattice", "both"], default="both")
    a = ap.parse_args()
    warnings.simplefilter("ignore", mk.DiagnosticWarning)
    if a.chain in ("four", "both"):
        study("4-state chain", four_state_chain(), n_runs=a.runs, n_steps=1000, lag=1, k=2, n_reps=a.reps,
              n_samples=max(a.samples), sizes=a.samples, confidence=a.confidence, seed=1)
    if a.chain in ("lattice", "both"):
        study("7 x 7 lattice walk", lattice_chain(), n_runs=a.runs, n_steps=2000, lag=2, k=2, n_reps=a.reps,
              n_samples=max(a.samples), sizes=a.samples, confidence=a.confidence, seed=2)


if __name__ == "__main__":
    main()
