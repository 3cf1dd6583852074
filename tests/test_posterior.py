"""Posterior sampling of reversible transition matrices (msmkit.posterior).

References used by the checks:
- two states: every row-stochastic 2x2 matrix obeys detailed balance, and with the reference measure of
  msmkit.posterior the posterior is a product of Beta distributions, one per row (derived in the
  module notes; compared with scipy.stats.beta);
- exact algebra: detailed balance and row sums of every sample;
- large counts: the posterior concentrates at the maximum-likelihood estimate with a spread
  shrinking as 1/sqrt(N) (common practice, Bernstein-von Mises);
- three states: self-normalized importance sampling of the same posterior density written out
  in full here, with Dirichlet proposals drawn by numpy (independent of the sampler's moves).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

import msmkit as mk
from msmkit.errors import InputError
from msmkit.posterior import iter_reversible_posterior, sample_reversible_posterior


def _batch_se(values: np.ndarray, n_batches: int = 40) -> np.ndarray:
    """Monte Carlo standard error of the mean of correlated samples by batch means (common practice)."""
    b = values[: len(values) // n_batches * n_batches].reshape(n_batches, -1, *values.shape[1:]).mean(axis=1)
    return b.std(axis=0, ddof=1) / np.sqrt(n_batches)


@pytest.mark.parametrize("prior_count", [0.0, -0.5, -1.0])
def test_two_states_rows_are_independent_betas(prior_count):
    C = np.array([[12, 5], [3, 20]])
    Ts = sample_reversible_posterior(C, 20000, seed=3, thin=1, prior_count=prior_count)
    b = prior_count
    refs = [stats.beta(C[0, 0] + b + 1, C[0, 1] + b + 1), stats.beta(C[1, 1] + b + 1, C[1, 0] + b + 1)]
    for s, ref in enumerate(refs):
        x = Ts[:, s, s]
        se_mean = _batch_se(x)
        assert abs(x.mean() - ref.mean()) < 4 * se_mean
        se_var = _batch_se((x - ref.mean()) ** 2)
        assert abs(np.mean((x - ref.mean()) ** 2) - ref.var()) < 4 * se_var
        # whole distribution (every 10th sample, nearly independent at thin=1 on two states)
        assert stats.kstest(x[::10], ref.cdf).pvalue > 1e-3
    # the two rows are independent under this posterior
    assert abs(np.corrcoef(Ts[:, 0, 0], Ts[:, 1, 1])[0, 1]) < 0.05


def test_two_states_wrong_prior_is_detected():
    """The Beta check above can fail: samples under prior 0 do not match the Beta of prior -0.5."""
    C = np.array([[2, 1], [1, 3]])
    Ts = sample_reversible_posterior(C, 20000, seed=4, thin=1, prior_count=0.0)
    wrong = stats.beta(C[0, 0] + 0.5, C[0, 1] + 0.5)
    assert abs(Ts[:, 0, 0].mean() - wrong.mean()) > 4 * _batch_se(Ts[:, 0, 0])


def test_samples_obey_detailed_balance_rows_and_sparsity():
    C = np.array([[50, 4, 0, 0],
                  [3, 40, 6, 0],
                  [0, 5, 30, 2],
                  [0, 0, 1, 10]])
    Ts, pis = sample_reversible_posterior(C, 300, seed=0, return_equilibrium=True)
    assert Ts.shape == (300, 4, 4) and pis.shape == (300, 4)
    np.testing.assert_allclose(Ts.sum(axis=2), 1.0, rtol=0, atol=1e-13)
    X = pis[:, :, None] * Ts
    np.testing.assert_allclose(X, np.transpose(X, (0, 2, 1)), rtol=0, atol=1e-15)
    # pi is the equilibrium of each sample: pi T = pi
    np.testing.assert_allclose(np.einsum("si,sij->sj", pis, Ts), pis, rtol=0, atol=1e-13)
    pattern = (C + C.T) > 0
    assert np.all(Ts[:, ~pattern] == 0) and np.all(Ts[:, pattern] > 0)
    assert len({Ts[k, 0, 1] for k in range(300)}) > 100  # the chain moves


def test_large_counts_concentrate_at_the_mle():
    T_true = np.array([[0.90, 0.08, 0.02],
                       [0.10, 0.85, 0.05],
                       [0.05, 0.10, 0.85]])
    X = mk.equilibrium_distribution(T_true)[:, None] * T_true
    X = 0.5 * (X + X.T)  # a reversible chain (common practice: symmetrize the flux)
    sds, shifts = [], []
    for N in (2_000, 32_000):
        C = np.round(N * X)
        mle = mk.estimate_transition_matrix(C)
        Ts = sample_reversible_posterior(C, 3000, seed=1, thin=3)
        mean, sd = Ts.mean(axis=0), Ts.std(axis=0)
        # bias of the mean against the spread, O(1/N) against O(1/sqrt N)
        sds.append(sd)
        shifts.append(np.max(np.abs(mean - mle) / sd))
    # the shift of the mean in units of the spread falls as 1/sqrt(N) (prior and skew are O(1) counts)
    assert shifts[0] < 0.4 and shifts[1] < 0.15
    ratio = sds[0] / sds[1]
    off = ~np.eye(3, dtype=bool)
    np.testing.assert_allclose(ratio[off], 4.0, rtol=0.15)


def _log_density(C, prior_count):
    """The posterior of msmkit.posterior written out in log-flux coordinates: unique flux elements
    x on the pattern (i <= j), the last one held at 1, y = log of the others. With
    f(X) = prod_ij T_ij^(C_ij + b) * prod_{i<j} x_ij * prod_i x_i^(-k_i) (degree -dim X, so any
    slice of the cone carries the same distribution), the density of y is f(X(y)) * prod exp(y)."""
    n = C.shape[0]
    S = C + C.T
    iu, ju = np.nonzero(np.triu(S))
    diag = iu == ju
    mask = S > 0
    k = mask.sum(axis=1).astype(float)

    def matrices(y):
        x = np.concatenate([np.exp(y), np.ones((y.shape[0], 1))], axis=1)
        X = np.zeros((y.shape[0], n, n))
        X[:, iu, ju] = x
        X[:, ju, iu] = x
        return x, X

    def logp(y):
        x, X = matrices(y)
        xr = X.sum(axis=2)
        T = X / xr[:, :, None]
        return (np.sum(np.where(mask, (C + prior_count) * np.log(np.where(mask, T, 1.0)), 0.0), axis=(1, 2))
                + np.sum(np.log(x[:, :-1][:, ~diag[:-1]]), axis=1) - np.log(xr) @ k + y.sum(axis=1))

    return logp, matrices, len(iu) - 1


def _posterior_means_by_importance(C, prior_count, n_draws, rng):
    """Self-normalized importance sampling of that density with a multivariate-t proposal (5 degrees
    of freedom) centerd at the mode (scipy.optimize) with the finite-difference Hessian as scale."""
    from scipy import optimize
    logp, matrices, d = _log_density(C, prior_count)
    mode = optimize.minimize(lambda y: -logp(y[None])[0], np.zeros(d), method="BFGS").x
    h = 1e-4
    E = np.eye(d) * h
    H = np.array([[(logp((mode + E[a] + E[b])[None])[0] - logp((mode + E[a] - E[b])[None])[0]
                    - logp((mode - E[a] + E[b])[None])[0] + logp((mode - E[a] - E[b])[None])[0]) / (4 * h * h)
                   for b in range(d)] for a in range(d)])
    cov = np.linalg.inv(-H)
    prop = stats.multivariate_t(loc=mode, shape=cov * 1.3, df=5, seed=rng)
    y = prop.rvs(size=n_draws)
    logw = logp(y) - prop.logpdf(y)
    w = np.exp(logw - logw.max())
    w /= w.sum()
    _, X = matrices(y)
    xr = X.sum(axis=2)
    T = X / xr[:, :, None]
    pi = xr / xr.sum(axis=1, keepdims=True)
    mean_T = np.einsum("s,sij->ij", w, T)
    mean_pi = w @ pi
    # delta-method standard error of a self-normalized estimate (common practice)
    se_T = np.sqrt(np.einsum("s,sij->ij", w ** 2, (T - mean_T) ** 2))
    se_pi = np.sqrt(w ** 2 @ (pi - mean_pi) ** 2)
    return mean_T, mean_pi, se_T, se_pi, 1.0 / np.sum(w ** 2)


@pytest.mark.parametrize("C", [np.array([[8, 3, 1], [2, 6, 2], [1, 3, 9]]),
                               np.array([[8, 3, 0], [2, 6, 2], [0, 3, 9]])],
                         ids=["full", "sparse"])
@pytest.mark.parametrize("prior_count", [-0.5, -1.0])
def test_three_states_match_importance_sampling(C, prior_count):
    rng = np.random.default_rng(11)
    ref_T, ref_pi, se_T_ref, se_pi_ref, ess = _posterior_means_by_importance(C, prior_count, 200_000, rng)
    assert ess > 50_000  # the reference itself is precise
    Ts, pis = sample_reversible_posterior(C, 20000, seed=5, thin=2, return_equilibrium=True, prior_count=prior_count)
    pattern = (C + C.T) > 0
    z_T = (Ts.mean(axis=0) - ref_T)[pattern] / np.hypot(_batch_se(Ts), se_T_ref)[pattern]
    z_pi = (pis.mean(axis=0) - ref_pi) / np.hypot(_batch_se(pis), se_pi_ref)
    assert np.max(np.abs(z_T)) < 4.5 and np.max(np.abs(z_pi)) < 4.5
    # and the reference can tell priors apart: prior 0 moves the means by many standard errors
    other_T, *_ = _posterior_means_by_importance(C, 0.0, 200_000, rng)
    assert np.max(np.abs(other_T - ref_T)[pattern] / se_T_ref[pattern]) > 10


def test_seed_reproducible_and_iterator_matches_array():
    C = np.array([[20, 3, 1], [2, 15, 4], [1, 5, 30]])
    a = sample_reversible_posterior(C, 5, seed=7)
    b = sample_reversible_posterior(C, 5, seed=7)
    np.testing.assert_array_equal(a, b)
    it = [T for T, _ in iter_reversible_posterior(C, 5, seed=7)]
    np.testing.assert_array_equal(a, np.stack(it))
    assert not np.array_equal(a, sample_reversible_posterior(C, 5, seed=8))
    np.testing.assert_array_equal(a, sample_reversible_posterior(C, 5, seed=7, progress=True))


def test_degenerate_chains():
    """One state: T = [[1]]; two states that always swap: T = [[0, 1], [1, 0]] (the only
    reversible matrix on that pattern)."""
    np.testing.assert_array_equal(sample_reversible_posterior([[5]], 3, seed=0), np.ones((3, 1, 1)))
    Ts = sample_reversible_posterior([[0, 3], [2, 0]], 3, seed=0)
    np.testing.assert_allclose(Ts, np.broadcast_to([[0.0, 1.0], [1.0, 0.0]], (3, 2, 2)), atol=1e-15)


def test_too_large_sample_array_is_refused_with_the_iterator_named():
    C = np.eye(400) * 5 + np.eye(400, k=1) + np.eye(400, k=-1)  # 400 states, one band of pairs
    with pytest.raises(InputError, match="iter_reversible_posterior"):
        sample_reversible_posterior(C, 2000, seed=0)  # 2.6 GiB


def test_initial_matrix_is_used_and_checked():
    C = np.array([[20, 3, 1], [2, 15, 4], [1, 5, 30]])
    mle = mk.estimate_transition_matrix(C)
    a = sample_reversible_posterior(C, 3, seed=2, initial=mle, burn_in=0, thin=1)
    b = sample_reversible_posterior(C, 3, seed=2, burn_in=0, thin=1)
    np.testing.assert_allclose(a, b, rtol=1e-9)
    nonrev = mk.estimate_transition_matrix(C, reversible=False)
    with pytest.raises(InputError, match="detailed balance"):
        sample_reversible_posterior(C, 3, initial=nonrev)
    with pytest.raises(InputError, match="shape"):
        sample_reversible_posterior(C, 3, initial=np.eye(2))
    with pytest.raises(InputError, match="positive wherever"):
        sample_reversible_posterior(C, 3, initial=np.eye(3))


@pytest.mark.parametrize("counts, kwargs, match", [
    (np.ones((2, 3)), {}, "square"),
    (np.array([[1, -1], [1, 1]]), {}, "non-negative"),
    (np.array([[5, 0], [0, 5]]), {}, "strongly connected"),
    (np.zeros((2, 2)), {}, "no transitions"),
    (np.ones((2, 2)), {"prior_count": -1.5}, "prior_count"),
    (np.ones((2, 2)), {"thin": 0}, "thin"),
    (np.ones((2, 2)), {"burn_in": -1}, "burn_in"),
    (np.ones((2, 2)), {"burn_in": 2.5}, "burn_in"),
])
def test_bad_input_names_the_argument(counts, kwargs, match):
    with pytest.raises(InputError, match=match):
        sample_reversible_posterior(counts, 3, **kwargs)
    with pytest.raises(InputError, match="n_samples"):
        sample_reversible_posterior(np.ones((2, 2)), 0)


def test_exported_from_package():
    assert mk.sample_reversible_posterior is sample_reversible_posterior
    assert mk.iter_reversible_posterior is iter_reversible_posterior
    assert {"sample_reversible_posterior", "iter_reversible_posterior"} <= set(mk.__all__)


@pytest.mark.slow
def test_credible_intervals_cover_a_known_chain(sample_chain):
    """Frequentist coverage of central 95 % credible intervals on simulated data (the full study with
    more replicates is bench/bench_posterior_coverage.py): a four-state chain in two slowly exchanging
    pairs, 10 runs x 1000 frames from equilibrium, lag 1; truth from scipy.linalg.eigvals."""
    import scipy.linalg as la
    flux = np.array([[1000, 60, 2, 0], [60, 800, 3, 1], [2, 3, 700, 50], [0, 1, 50, 900]], float)
    T = flux / flux.sum(axis=1, keepdims=True)
    pi = flux.sum(axis=1) / flux.sum()
    t_true = -1.0 / np.log(np.sort(la.eigvals(T).real)[-2])
    truth = np.concatenate([[t_true], pi])
    hits = []
    for rep in range(40):
        C = mk.count_transitions(sample_chain(T, 1000, n_runs=10, seed=100 + rep), 1)
        assert mk.kept_states(C).size == 4
        Ts, pis = sample_reversible_posterior(C, 300, seed=rep, return_equilibrium=True)
        lam2 = np.array([np.sort(np.linalg.eigvals(t).real)[-2] for t in Ts])
        values = np.column_stack([-1.0 / np.log(lam2), pis])
        lo, hi = np.percentile(values, [2.5, 97.5], axis=0)
        hits.append((lo <= truth) & (truth <= hi))
    coverage = np.mean(hits, axis=0)
    # 40 replicates: binomial sd 0.034 at 0.95; 0.85 is three below
    assert np.all(coverage >= 0.85), coverage
    assert np.mean(coverage) <= 0.99, coverage  # not uselessly wide either
