"""Coverage of 95 % credible intervals from the reversible posterior, and the cost of one sample.

Known chain: four states in two slowly exchanging pairs (slowest implied timescale 154 steps).
Each replicate simulates 10 runs from equilibrium, counts transitions at lag 1, draws posterior
samples (msmkit.sample_reversible_posterior, default burn-in and thinning) and checks whether the
central 95 % credible interval of the slowest implied timescale and of each state population holds
the true value. Coverage = fraction of replicates that hold it (target 0.93-0.97), with the
binomial standard error.

Speed: time per posterior sample (default thinning) against one reversible maximum-likelihood fit
of the same counts, measured in the same run (ratio = sample / fit).
"""
import argparse
import time

import numpy as np

import msmkit as mk
from _chains import sample_chain
from _timing import best_time

FLUX = np.array([[1000, 60, 2, 0],
                 [60, 800, 3, 1],
                 [2, 3, 700, 50],
                 [0, 1, 50, 900]], dtype=float)  # symmetric: detailed balance by construction


def true_chain():
    T = FLUX / FLUX.sum(axis=1, keepdims=True)
    pi = FLUX.sum(axis=1) / FLUX.sum()
    return T, pi, slowest_timescales(T[None], pi[None])[0]


def slowest_timescales(Ts, pis):
    """Slowest implied timescale -1 / ln(lambda_2) (lag 1, in steps) of each reversible matrix,
    from the symmetrized matrices; NaN where lambda_2 <= 0."""
    s = np.sqrt(pis)
    A = s[:, :, None] * Ts / s[:, None, :]
    lam2 = np.linalg.eigvalsh(0.5 * (A + np.transpose(A, (0, 2, 1))))[:, -2]
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(lam2 > 0, -1.0 / np.log(lam2), np.nan)


def replicate(T, pi, t_true, n_runs, n_frames, n_samples, rng, prior_count=None, thin=None):
    """One simulated data set: (covered?, interval width / truth, crossings, truth below the
    interval?, relative error of the maximum-likelihood estimate) for [timescale, pi_0 .. pi_n-1]."""
    runs = sample_chain(T, pi, n_runs, n_frames, rng)
    C = mk.count_transitions(runs, 1)
    keep = mk.kept_states(C)
    if keep.size < T.shape[0]:
        return None  # a state never visited or never left: no model of the full chain
    options = {} if prior_count is None else {"prior_count": prior_count}
    if thin is not None:
        options["thin"] = thin
    Ts, pis = mk.sample_reversible_posterior(C, n_samples, seed=rng, return_equilibrium=True, **options)
    values = np.column_stack([slowest_timescales(Ts, pis), pis])
    lo, hi = np.nanpercentile(values, 2.5, axis=0), np.nanpercentile(values, 97.5, axis=0)
    truth = np.concatenate([[t_true], pi])
    crossings = int(C[:2, 2:].sum() + C[2:, :2].sum())
    T_ml = mk.estimate_transition_matrix(C, warn=False)
    pi_ml = mk.equilibrium_distribution(T_ml)
    ml = np.concatenate([slowest_timescales(T_ml[None], pi_ml[None]), pi_ml])
    return (lo <= truth) & (truth <= hi), (hi - lo) / truth, crossings, truth < lo, (ml - truth) / truth


def coverage_table(n_runs, n_frames, n_replicates, n_samples, seed=0, prior_count=None, thin=None):
    T, pi, t_true = true_chain()
    rng = np.random.default_rng(seed)
    results = [r for r in (replicate(T, pi, t_true, n_runs, n_frames, n_samples, rng, prior_count, thin)
                           for _ in range(n_replicates)) if r is not None]
    hit = np.array([r[0] for r in results], dtype=float)
    width = np.array([r[1] for r in results])
    crossings = np.array([r[2] for r in results])
    low = np.array([r[3] for r in results], dtype=float).mean(axis=0)
    bias = np.array([r[4] for r in results]).mean(axis=0)
    return t_true, hit.mean(axis=0), np.sqrt(hit.mean(axis=0) * (1 - hit.mean(axis=0)) / len(hit)), \
        np.median(width, axis=0), len(results), np.median(crossings), low, bias


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
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--replicates", type=int, default=150)
    ap.add_argument("--samples", type=int, default=400, help="posterior samples per replicate")
    ap.add_argument("--runs", type=int, default=10)
    ap.add_argument("--frames", type=int, nargs="+", default=[1000, 4000], help="frames per run")
    ap.add_argument("--prior-count", type=float, default=None, help="default: the library default")
    ap.add_argument("--thin", type=int, default=None, help="sweeps between samples (default: the library's)")
    ap.add_argument("--no-speed", action="store_true", help="skip the timing part")
    a = ap.parse_args()
    names = ["slowest timescale"] + [f"population {i}" for i in range(FLUX.shape[0])]
    prior_label = "default" if a.prior_count is None else f"{a.prior_count:g}"
    for frames in a.frames:
        start = time.perf_counter()
        t_true, cov, se, width, n_used, crossings, low, bias = coverage_table(
            a.runs, frames, a.replicates, a.samples, prior_count=a.prior_count, thin=a.thin)
        print(f"\n{a.runs} runs x {frames} frames, lag 1, true slowest timescale {t_true:.1f} steps, "
              f"median {crossings:.0f} crossings between the two pairs per data set; "
              f"{n_used} replicates x {a.samples} posterior samples, prior count {prior_label} "
              f"({time.perf_counter() - start:.0f} s)")
        print(f"{'quantity':<20} {'coverage':>9} {'+-':>6} {'width/true':>11} {'truth below':>12} "
              f"{'truth above':>12} {'MLE bias':>9}  (nominal 0.95, target 0.93-0.97; 0.025 expected "
              f"beyond each end)")
        for name, c, s, w, lo_, b in zip(names, cov, se, width, low, bias):
            print(f"{name:<20} {c:9.3f} {s:6.3f} {w:11.3f} {lo_:12.3f} {1 - c - lo_:12.3f} {100 * b:+8.1f}%")
        print(f"{'pooled':<20} {cov.mean():9.3f}")
    if a.no_speed:
        return
    T, pi, _ = true_chain()
    cases = [("4 states, 10 runs x 1000 frames",
              mk.count_transitions(sample_chain(T, pi, a.runs, 1000, np.random.default_rng(1)), 1)),
             ("100-state double well", double_well_counts())]
    print("\nposterior sample (default thin 5) against one reversible MLE fit of the same counts:")
    for name, C in cases:
        fit, per_sample = speed(C)
        print(f"{name}: sample {per_sample * 1e3:.3g} ms, fit {fit * 1e3:.3g} ms, ratio {per_sample / fit:.3g}")

if __name__ == "__main__":
    main()
