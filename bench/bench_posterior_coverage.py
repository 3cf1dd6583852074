"""Coverage of nominal 95 % intervals: the bootstrap and the Bayesian posterior side by side,
and the cost of one posterior sample.

Known chains (truth from scipy.linalg.eig): "pairs", four states in two slowly exchanging pairs
(slowest implied timescale 154 steps), at 10 runs x 1000 and x 4000 frames; and the two chains of
bench_coverage.py ("four", 1000 steps; "lattice", 49 states, 2000 steps, lag 2). Each replicate
simulates 10 runs from equilibrium and forms the intervals a user gets:

* timescales: ``lag_scan(..., uncertainty=method)`` (bootstrap: bias-corrected, widened for few
  runs; bayes: equal-tailed posterior intervals);
* populations: ``sample_models(model, runs, uncertainty=method).populations()``.

Coverage = share of replicates whose interval holds the truth (target 0.93-0.97), with the
binomial standard error sqrt(c (1 - c) / R); "below" / "above" = share with the truth below the
lower / above the upper end (0.025 each expected). Populations are pooled over states. Also
printed: the relative bias of the maximum-likelihood estimate, and the median number of
crossings of the slowest process per data set (``MarkovModel.state_changes``).

Speed: time per posterior sample (default thinning) against one reversible maximum-likelihood fit
of the same counts, measured in the same run (ratio = sample / fit).
"""
import argparse
import time
import warnings

import numpy as np

import msmkit as mk
from _chains import sample_chain
from _timing import best_time
from bench_coverage import four_state_chain, lattice_chain, truth

FLUX = np.array([[1000, 60, 2, 0],
                 [60, 800, 3, 1],
                 [2, 3, 700, 50],
                 [0, 1, 50, 900]], dtype=float)  # symmetric: detailed balance by construction

METHODS = ("bootstrap", "bayes")
QUANTITIES = ("slowest timescale", "2nd timescale", "populations")


def pairs_chain() -> np.ndarray:
    return FLUX / FLUX.sum(axis=1, keepdims=True)


def replicate(T, runs, lag, n_samples, seed):
    """{method: (lower, upper) of [t_1, t_2, pi_0 .. pi_n-1]}, the MLE values and the crossings of
    the slowest process; None when the model does not keep every state."""
    n = T.shape[0]
    model = mk.build_model(runs, lag)
    if model.n_states != n:
        return None
    est = np.concatenate([model.relaxation_times(2), model.equilibrium])
    out = {}
    for method in METHODS:
        scan = mk.lag_scan(runs, [lag], n_processes=2, n_samples=n_samples, seed=seed, uncertainty=method)
        pops = mk.sample_models(model, runs, uncertainty=method, n_samples=n_samples, seed=seed).populations()
        p_lo, p_hi = pops["lower"].to_numpy(), pops["upper"].to_numpy()
        out[method] = (np.concatenate([scan.lower[0], p_lo]), np.concatenate([scan.upper[0], p_hi]))
    return out, est, model.state_changes()[1]


def study(name, T, *, n_runs, n_frames, lag, n_reps, n_samples, seed):
    true_t, true_pi = truth(T, 2)
    exact = np.concatenate([true_t, true_pi])
    rng = np.random.default_rng(seed)
    inside = {m: [] for m in METHODS}
    below = {m: [] for m in METHODS}
    width = {m: [] for m in METHODS}
    bias, crossings = [], []
    start = time.perf_counter()
    for rep in range(n_reps):
        got = replicate(T, sample_chain(T, true_pi, n_runs, n_frames, rng), lag, n_samples, seed=rep)
        if got is None:
            continue
        intervals, est, cross = got
        bias.append((est - exact) / exact)
        crossings.append(cross)
        for m, (lo, hi) in intervals.items():
            inside[m].append((lo <= exact) & (exact <= hi))
            below[m].append(exact < lo)
            width[m].append((hi - lo) / exact)
    R = len(bias)
    print(f"\n{name}: {n_runs} runs x {n_frames} frames, lag {lag}, {R} of {n_reps} replicates kept every state, "
          f"{n_samples} samples each ({time.perf_counter() - start:.0f} s); true timescales "
          f"{np.round(true_t, 2).tolist()} steps; median {np.median(crossings):.0f} crossings of the slowest "
          f"process per data set")
    b = np.mean(bias, axis=0)
    print(f"  relative bias of the estimate: timescales {np.round(100 * b[:2], 1).tolist()} %, populations "
          f"{100 * np.mean(np.abs(b[2:])):.1f} % (mean absolute over states)")
    print(f"  {'quantity':<20}" + "".join(f"{m + ' coverage':>20}{'below':>7}{'above':>7}{'width':>7}" for m in METHODS)
          + "   (nominal 0.95, target 0.93-0.97)")
    for q, cols in zip(QUANTITIES, (slice(0, 1), slice(1, 2), slice(2, None))):
        row = f"  {q:<20}"
        for m in METHODS:
            h, lo, w = (np.asarray(x[m])[:, cols] for x in (inside, below, width))
            c = h.mean()
            se = np.sqrt(c * (1 - c) / h.size)
            above = max(1 - c - lo.mean(), 0.0)  # no "-0.000" from rounding
            row += f"{c:>14.3f} +-{se:.3f}{lo.mean():>7.3f}{above:>7.3f}{np.median(w):>7.3f}"
        print(row)


def double_well_counts(n_states=100, n_counts=1e6, seed=2):
    """Counts of a nearest-neighbour walk on a 1-D double well of n_states cells (barrier 4 kT),
    drawn as Poisson numbers around n_counts times the equilibrium flux."""
    rng = np.random.default_rng(seed)
    z = np.linspace(-1.5, 1.5, n_states)
    p = np.exp(-4.0 * (z ** 2 - 1) ** 2)
    p /= p.sum()
    X = np.zeros((n_states, n_states))
    hop = 0.25 * np.minimum(p[:-1], p[1:])
    X[np.arange(n_states - 1), np.arange(1, n_states)] = hop
    X += X.T
    X[np.diag_indices(n_states)] = p - X.sum(axis=1)
    C = rng.poisson(n_counts * X) + (X > 0)  # every neighbour pair seen at least once
    return C[np.ix_(mk.kept_states(C), mk.kept_states(C))]


def speed(C, n=200):
    """(one reversible MLE fit, one posterior sample at the default thinning), in seconds."""
    fit = best_time(lambda: mk.estimate_transition_matrix(C), repeat=10)
    per_sample = best_time(lambda: mk.sample_reversible_posterior(C, n, seed=0, burn_in=0), repeat=3) / n
    return fit, per_sample


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--reps", type=int, default=200, help="replicates per chain and length")
    ap.add_argument("--samples", type=int, default=200, help="bootstrap / posterior samples per replicate")
    ap.add_argument("--runs", type=int, default=10)
    ap.add_argument("--frames", type=int, nargs="+", default=[1000, 4000], help="frames per run (pairs chain)")
    ap.add_argument("--chain", choices=["pairs", "four", "lattice", "all"], default="all")
    ap.add_argument("--no-speed", action="store_true", help="skip the timing part")
    a = ap.parse_args()
    warnings.simplefilter("ignore", mk.DiagnosticWarning)
    if a.chain in ("pairs", "all"):
        for frames in a.frames:
            study("pairs chain (4 states)", pairs_chain(), n_runs=a.runs, n_frames=frames, lag=1, n_reps=a.reps,
                  n_samples=a.samples, seed=0)
    if a.chain in ("four", "all"):
        study("4-state chain of bench_coverage", four_state_chain(), n_runs=a.runs, n_frames=1000, lag=1,
              n_reps=a.reps, n_samples=a.samples, seed=1)
    if a.chain in ("lattice", "all"):
        study("7 x 7 lattice walk", lattice_chain(), n_runs=a.runs, n_frames=2000, lag=2, n_reps=a.reps,
              n_samples=a.samples, seed=2)
    if a.no_speed:
        return
    T = pairs_chain()
    pi = FLUX.sum(axis=1) / FLUX.sum()
    cases = [("4 states, 10 runs x 1000 frames",
              mk.count_transitions(sample_chain(T, pi, a.runs, 1000, np.random.default_rng(1)), 1)),
             ("100-state double well", double_well_counts())]
    print("\nposterior sample (default thin 5) against one reversible MLE fit of the same counts:")
    for name, C in cases:
        fit, per_sample = speed(C)
        print(f"{name}: sample {per_sample * 1e3:.3g} ms, fit {fit * 1e3:.3g} ms, ratio {per_sample / fit:.3g}")


if __name__ == "__main__":
    main()
