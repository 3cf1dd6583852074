"""How often do the nominal 95 % bootstrap intervals cover the truth?

Trajectories are simulated from chains whose timescales and stationary populations are known
exactly (eigen-decomposition of the true matrix with scipy), the model is built and
bootstrapped as a user would, and the share of replicates whose interval holds the true value
is printed per quantity and interval method, against the nominal level. Per-state populations
are pooled over the states. Binomial standard error of a coverage c from R replicates:
sqrt(c (1 - c) / R) (about 0.015 at c = 0.95 and R = 200).

Chains: a 4-state chain with one slow exchange, and a 49-state Metropolis walk on a 7 x 7
lattice with two wells (slowest timescale about 118 steps).

``--study kinetics`` checks the tables of :func:`msmkit.sample_models` at their defaults, for
both ways of sampling ("bootstrap", "bayes"): the slowest timescale, the state populations, the
mean first-passage times and the rate constants between two sets of states in both directions.
The truth is exact linear algebra on the known matrix at the model's lag (numpy only): passage
times from (I - P_cc) m = 1 with P = T^lag (Kemeny & Snell 1960), rates k_AB = F / (tau
sum_i pi_i q-_i) from committors solved on P (Metzner, Schuette & Vanden-Eijnden 2009).
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
    pops = mk.sample_models(model, runs, n_samples=n_samples, seed=seed).equilibria
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


# ----------------------------------------------------------------------------- kinetics tables
def exact_kinetics(T, lag, a, b):
    """(MFPT a -> b, MFPT b -> a, rate a -> b, rate b -> a) of the chain T observed every ``lag``
    steps, in steps; numpy only (an independent reference for msmkit.kinetics)."""
    P = np.linalg.matrix_power(T, lag)
    n = P.shape[0]
    w, vl = la.eig(P, left=True, right=False)
    pi = np.real(vl[:, np.argmax(np.real(w))])
    pi /= pi.sum()

    def mfpt(src, tgt):
        c = np.setdiff1d(np.arange(n), tgt)
        m = np.zeros(n)
        m[c] = np.linalg.solve(np.eye(c.size) - P[np.ix_(c, c)], np.ones(c.size))
        return lag * pi[src] @ m[src] / pi[src].sum()

    def committor(Q, src, tgt):  # probability to reach tgt before src
        c = np.setdiff1d(np.arange(n), np.union1d(src, tgt))
        q = np.zeros(n)
        q[tgt] = 1.0
        q[c] = np.linalg.solve(np.eye(c.size) - Q[np.ix_(c, c)], Q[np.ix_(c, tgt)].sum(axis=1))
        return q

    def rate(src, tgt):
        R = P.T * pi[None, :] / pi[:, None]  # time-reversed chain
        qf, qb = committor(P, src, tgt), committor(R, tgt, src)
        f = (pi * qb)[:, None] * P * qf[None, :]
        np.fill_diagonal(f, 0.0)
        return f[src].sum() / (lag * pi @ qb)

    return np.array([mfpt(a, b), mfpt(b, a), rate(a, b), rate(b, a)]), pi


#: the rows of the kinetics study: (label, table, index of the value in exact_kinetics)
KINETIC_ROWS = (("slowest timescale", None), ("state populations", None), ("MFPT A -> B", 0),
                ("MFPT B -> A", 1), ("rate A -> B", 2), ("rate B -> A", 3))


def kinetics_replicate(model, runs, a, b, uncertainty, n_samples, seed, confidence, options):
    """{row label: (lower, upper, estimate)} from the default tables of sample_models."""
    draw = mk.sample_models(model, runs, uncertainty=uncertainty, n_samples=n_samples, seed=seed,
                            **(options if uncertainty == "bayes" else {}))
    ts = draw.relaxation_times(1, confidence=confidence)
    pops = draw.populations(confidence=confidence)
    out = {"slowest timescale": ts, "state populations": pops}
    for label, src, tgt, which in (("MFPT A -> B", a, b, "passage_time"), ("MFPT B -> A", b, a, "passage_time"),
                                   ("rate A -> B", a, b, "rate_constant"), ("rate B -> A", b, a, "rate_constant")):
        out[label] = getattr(draw, which)(src, tgt, confidence=confidence)
    return {k: (v["lower"].to_numpy(), v["upper"].to_numpy(), v["estimate"].to_numpy()) for k, v in out.items()}


def kinetics_study(name, T, a, b, *, n_runs, n_steps, lag, n_reps, n_samples, confidence, seed,
                   methods=("bootstrap", "bayes"), options=None):
    true_k, pi = exact_kinetics(T, lag, a, b)
    true_t = truth(np.linalg.matrix_power(T, lag), 1)[0] * lag
    exact = {"slowest timescale": true_t, "state populations": pi}
    exact.update({label: true_k[[i]] for label, i in KINETIC_ROWS if i is not None})
    rng = np.random.default_rng(seed)
    hits = {(m, r): [] for m in methods for r, _ in KINETIC_ROWS}
    widths = {(m, r): [] for m in methods for r, _ in KINETIC_ROWS}
    used = 0
    start = time.perf_counter()
    for rep in range(n_reps):
        runs = sample_chain(T, pi, n_runs, n_steps, rng)
        model = mk.build_model(runs, lag)
        if model.n_states != T.shape[0]:
            continue
        used += 1
        for method in methods:
            got = kinetics_replicate(model, runs, a, b, method, n_samples, rep, confidence, options or {})
            for label, (lo, hi, _) in got.items():
                x = exact[label]
                hits[(method, label)].append((lo <= x) & (x <= hi))
                widths[(method, label)].append((hi - lo) / x)
    elapsed = time.perf_counter() - start
    print(f"\n{name}: {n_runs} runs x {n_steps} steps, lag {lag}, {used} of {n_reps} replicates kept every state "
          f"({elapsed:.0f} s), {n_samples} samples per method; A = {list(map(int, a))}, B = {list(map(int, b))}"
          + (f"; posterior options {options}" if options else ""))
    print(f"  exact at lag {lag}: slowest timescale {true_t[0]:.4g}, MFPT A->B {true_k[0]:.4g}, B->A {true_k[1]:.4g} "
          f"steps; rate A->B {true_k[2]:.4g}, B->A {true_k[3]:.4g} per step")
    se = np.sqrt(confidence * (1 - confidence) / max(used, 1))
    print(f"  {'quantity':<20}" + "".join(f"{m:>11}" for m in methods) + "   median width/truth  (nominal "
          f"{confidence:.2f}, binomial s.e. at nominal {se:.3f})")
    for label, _ in KINETIC_ROWS:
        cov = [np.mean(hits[(m, label)]) for m in methods]
        wd = [np.median(widths[(m, label)]) for m in methods]
        print(f"  {label:<20}" + "".join(f"{c:>11.3f}" for c in cov) + "   " + " / ".join(f"{w:.3f}" for w in wd))
    return hits


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--reps", type=int, default=200, help="replicates per chain")
    ap.add_argument("--runs", type=int, default=10)
    ap.add_argument("--samples", type=int, nargs="+", default=[20, 50, 100, 200])
    ap.add_argument("--confidence", type=float, default=0.95)
    ap.add_argument("--chain", choices=["four", "lattice", "both"], default="both")
    ap.add_argument("--study", choices=["intervals", "kinetics", "both"], default="both",
                    help="intervals: the interval methods on timescales and populations; kinetics: the tables of "
                         "sample_models (bootstrap and posterior) with passage times and rates")
    ap.add_argument("--methods", nargs="+", choices=["bootstrap", "bayes"], default=["bootstrap", "bayes"],
                    help="kinetics study: the ways of sampling to check")
    ap.add_argument("--seed", type=int, default=0, help="added to each chain's fixed seed (0: the figures of the "
                                                        "README); another value gives fresh replicates to pool")
    ap.add_argument("--prior-count", type=float, default=None, help="kinetics study, bayes: prior count "
                                                                   "(default: that of sample_models)")
    a = ap.parse_args()
    warnings.simplefilter("ignore", mk.DiagnosticWarning)
    if a.study in ("kinetics", "both"):
        samples = max(a.samples)
        extra = dict(methods=tuple(a.methods), options={} if a.prior_count is None else {"prior_count": a.prior_count})
        if a.chain in ("four", "both"):
            kinetics_study("4-state chain", four_state_chain(), np.array([0, 1]), np.array([2, 3]), n_runs=a.runs,
                           n_steps=1000, lag=1, n_reps=a.reps, n_samples=samples, confidence=a.confidence, seed=11 + a.seed,
                           **extra)
        if a.chain in ("lattice", "both"):
            side = 7
            x = np.arange(side * side) // side
            kinetics_study("7 x 7 lattice walk", lattice_chain(side), np.flatnonzero(x <= 1), np.flatnonzero(x >= side - 2),
                           n_runs=a.runs, n_steps=2000, lag=2, n_reps=a.reps, n_samples=samples,
                           confidence=a.confidence, seed=12 + a.seed, **extra)
        if a.study == "kinetics":
            return
    if a.chain in ("four", "both"):
        study("4-state chain", four_state_chain(), n_runs=a.runs, n_steps=1000, lag=1, k=2, n_reps=a.reps,
              n_samples=max(a.samples), sizes=a.samples, confidence=a.confidence, seed=1 + a.seed)
    if a.chain in ("lattice", "both"):
        study("7 x 7 lattice walk", lattice_chain(), n_runs=a.runs, n_steps=2000, lag=2, k=2, n_reps=a.reps,
              n_samples=max(a.samples), sizes=a.samples, confidence=a.confidence, seed=2 + a.seed)


if __name__ == "__main__":
    main()
