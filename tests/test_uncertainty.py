"""Intervals on the kinetic numbers of one model (msmkit.uncertainty.sample_models).

References used below:
- two-state chain (closed form, Kemeny & Snell 1960): the mean first-passage time 0 -> 1 is
  tau / T_01, the rate of transition path theory k_01 = T_01 / tau (committors 0 and 1 on the
  two states, Metzner, Schuette & Vanden-Eijnden 2009), the implied timescale
  -tau / ln(1 - T_01 - T_10) and the population pi_0 = T_10 / (T_01 + T_10);
- the two-state posterior: each row is Beta(C_ii + b + 1, C_ij + b + 1), b = the prior count
  (scipy.stats.beta; as in tests/test_posterior.py);
- exact linear algebra (numpy.linalg.solve) for first-passage times of every sample;
- the bias-corrected percentile interval (Efron, J. Am. Stat. Assoc. 82, 171 (1987)) with the
  expansion for few units sqrt(n / (n - 1)) t_{n-1} (Hesterberg, Am. Stat. 69, 371 (2015)),
  written out here with scipy.stats.norm and scipy.stats.t.
"""
from __future__ import annotations

import threading
import warnings

import numpy as np
import pytest
from scipy import stats

import msmkit as mk
from msmkit.errors import Cancelled
from msmkit.posterior import INTERVAL_PRIOR_COUNT as B

TWO = np.array([[0.97, 0.03], [0.05, 0.95]])
FOUR = np.array([[0.90, 0.09, 0.01, 0.00],
                 [0.06, 0.93, 0.00, 0.01],
                 [0.02, 0.00, 0.88, 0.10],
                 [0.00, 0.02, 0.08, 0.90]])


def quiet(fn, *args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", mk.DiagnosticWarning)
        return fn(*args, **kwargs)


@pytest.fixture(scope="module")
def two_state(sample_chain):
    runs = sample_chain(TWO, 400, n_runs=10, seed=5)
    return runs, quiet(mk.build_model, runs, 1, dt=0.5, unit="ns")


def test_two_state_estimates_are_the_closed_forms(two_state):
    runs, model = two_state
    draw = mk.sample_models(model, runs, n_samples=200, seed=0)
    T, tau = model.propagator, model.lag_time
    mfpt = draw.passage_time([0], [1])
    assert mfpt["estimate"][0] == pytest.approx(tau / T[0, 1], rel=1e-10)
    assert mfpt.attrs["unit"] == "ns" and mfpt.attrs["resolution"] == tau
    rate = draw.rate_constant([0], [1])
    assert rate["estimate"][0] == pytest.approx(T[0, 1] / tau, rel=1e-10)
    assert rate.attrs["unit"] == "1/ns"
    flow = draw.throughput([0], [1])
    assert flow["estimate"][0] == pytest.approx(model.equilibrium[0] * T[0, 1], rel=1e-10)
    ts = draw.relaxation_times(1)
    assert ts["estimate"][0] == pytest.approx(-tau / np.log(1 - T[0, 1] - T[1, 0]), rel=1e-10)
    pops = draw.populations()
    assert pops["estimate"][0] == pytest.approx(T[1, 0] / (T[0, 1] + T[1, 0]), rel=1e-10)
    for table in (mfpt, rate, flow, ts, pops):
        assert (table["lower"] <= table["estimate"]).all() and (table["estimate"] <= table["upper"]).all()
        assert table.attrs["uncertainty"] == "bootstrap" and table.attrs["confidence"] == 0.95


def test_two_state_posterior_intervals_are_beta_quantiles(two_state):
    # MFPT 0 -> 1 = tau / (1 - T_00) grows with T_00, so the 2.5 / 97.5 % posterior quantiles are
    # those of T_00 ~ Beta(C_00 + b + 1, C_01 + b + 1) mapped through it; likewise for 1 -> 0 and the rates.
    _, model = two_state
    C = model.transition_counts.toarray()
    tau = model.lag_time
    draw = mk.sample_models(model, uncertainty="bayes", n_samples=4000, seed=1)
    for i, j in ((0, 1), (1, 0)):
        stay = stats.beta(C[i, i] + B + 1, C[i, j] + B + 1)
        mfpt = draw.passage_time([i], [j])
        rate = draw.rate_constant([i], [j])
        assert mfpt.attrs["uncertainty"] == "bayes"
        # levels of the bounds under the exact posterior; 0.01 is about 4 Monte Carlo s.e. at 4000 samples
        assert stay.cdf(1 - tau / mfpt["lower"][0]) == pytest.approx(0.025, abs=0.01)
        assert stay.cdf(1 - tau / mfpt["upper"][0]) == pytest.approx(0.975, abs=0.01)
        assert stay.cdf(1 - tau * rate["upper"][0]) == pytest.approx(0.025, abs=0.01)
        assert stay.cdf(1 - tau * rate["lower"][0]) == pytest.approx(0.975, abs=0.01)


def _numpy_mfpt(T, pi, src, tgt):
    n = T.shape[0]
    c = np.setdiff1d(np.arange(n), tgt)
    m = np.zeros(n)
    m[c] = np.linalg.solve(np.eye(c.size) - T[np.ix_(c, c)], np.ones(c.size))
    return pi[src] @ m[src] / pi[src].sum()


def _bc_interval(values, estimate, confidence, n_units):
    """Bias-corrected percentile interval, expanded for few units (Efron 1987; Hesterberg 2015), with
    quantiles by the (m + 1) p rule (numpy's weibull method)."""
    x = values[np.isfinite(values)]
    z0 = stats.norm.ppf((np.sum(x < estimate) + 0.5 * np.sum(x == estimate)) / x.size)
    z = np.sqrt(n_units / (n_units - 1)) * stats.t.ppf((1 + confidence) / 2, n_units - 1)
    return np.quantile(x, stats.norm.cdf([2 * z0 - z, 2 * z0 + z]), method="weibull")


def test_bootstrap_passage_times_use_every_sample_and_the_bias_corrected_interval(sample_chain):
    runs = sample_chain(FOUR, 1500, n_runs=12, seed=2)
    model = quiet(mk.build_model, runs, 1, dt=2.0, unit="ps")
    draw = mk.sample_models(model, runs, n_samples=200, seed=3)
    assert draw.n_units == 12 and draw.propagators.shape == (200, 4, 4)
    src, tgt = [0, 1], [2, 3]
    by_hand = np.array([2.0 * _numpy_mfpt(T, pi, src, tgt) for T, pi in zip(draw.propagators, draw.equilibria)])
    table = draw.passage_time(src, tgt, confidence=0.9)
    np.testing.assert_allclose([table["lower"][0], table["upper"][0]],
                               _bc_interval(by_hand, table["estimate"][0], 0.9, 12), rtol=1e-9)
    # the macrostate populations: bias-corrected too, with the affinity held fixed
    macro = quiet(model.find_macrostates, 2, labels=runs, n_samples=200, seed=3)
    values = draw.equilibria @ macro.affinity  # the same seed draws the same runs
    table = macro.populations()
    for j in range(2):
        np.testing.assert_allclose([table["population_lower"][j], table["population_upper"][j]],
                                   _bc_interval(values[:, j], table["population"][j], 0.95, 12), rtol=1e-9)


def test_timescales_of_every_sample_are_those_of_scipy(sample_chain):
    # -tau / ln|lambda| of the 2nd and 3rd largest-magnitude eigenvalues of each sampled matrix
    # (scipy.linalg.eigvals, general solver); reversible samples are solved in one batch, a
    # non-reversible model one sample at a time
    import scipy.linalg as la

    runs = sample_chain(FOUR, 1500, n_runs=10, seed=9)
    for reversible in (True, False):
        model = quiet(mk.build_model, runs, 1, dt=0.5, reversible=reversible)
        draw = mk.sample_models(model, runs, n_samples=200, seed=1)
        lam = np.array([np.sort(np.abs(la.eigvals(T)))[::-1][1:3] for T in draw.propagators])
        want = -0.5 / np.log(lam)
        table = draw.relaxation_times(2)
        for j in range(2):
            lo, hi = _bc_interval(want[:, j], table["estimate"][j], 0.95, 10)
            assert (table["lower"][j], table["upper"][j]) == pytest.approx((lo, hi), rel=1e-8)


def test_between_sets_agrees_with_the_pair_tables(sample_chain):
    runs = sample_chain(FOUR, 1500, n_runs=10, seed=4)
    model = quiet(mk.build_model, runs, 1)
    for uncertainty in ("bootstrap", "bayes"):
        draw = quiet(mk.sample_models, model, runs, uncertainty=uncertainty, n_samples=50, seed=0)
        sets = [[0, 1], [2, 3]]
        table = quiet(draw.between_sets, sets)
        assert list(zip(table["from_set"], table["to_set"])) == [(0, 1), (1, 0)]
        np.testing.assert_allclose(table["passage_time"], [model.passage_time(*sets), model.passage_time(*sets[::-1])])
        for row in table.itertuples():
            a, b = sets[row.from_set], sets[row.to_set]
            mfpt, rate = quiet(draw.passage_time, a, b), quiet(draw.rate_constant, a, b)
            assert (row.passage_time_lower, row.passage_time_upper) == pytest.approx(
                (mfpt["lower"][0], mfpt["upper"][0]), rel=1e-10)
            assert (row.rate_constant_lower, row.rate_constant_upper) == pytest.approx(
                (rate["lower"][0], rate["upper"][0]), rel=1e-10)
        assert "lag resolution" in table.attrs["caption"] and table.attrs["rate_unit"] == "1/step"


def test_identical_runs_give_no_spread(sample_chain):
    # every bootstrap sample of identical runs is the full data set (common practice), so every
    # interval collapses onto the estimate
    run = sample_chain(FOUR, 3000, seed=6)[0]
    runs = [run.copy() for _ in range(6)]
    model = quiet(mk.build_model, runs, 1)
    draw = mk.sample_models(model, runs, n_samples=200, seed=0)
    for table in (draw.relaxation_times(2), draw.populations(), draw.passage_time([0], [3]),
                  draw.rate_constant([0], [3])):
        np.testing.assert_allclose(table["lower"], table["estimate"], rtol=1e-6)
        np.testing.assert_allclose(table["upper"], table["estimate"], rtol=1e-6)


def test_samples_that_lose_a_state_are_computed_without_it(sample_chain):
    # state 4 is seen in one run only: bootstrap samples without that run leave it out
    runs = sample_chain(FOUR, 800, n_runs=8, seed=7)
    runs[0] = np.concatenate([runs[0], [4, 4, 4, 0]]).astype(np.int32)
    runs[0][790] = 4  # ... 4 entered from the chain and left again
    model = quiet(mk.build_model, runs, 1)
    assert 4 in model.states
    draw = mk.sample_models(model, runs, n_samples=200, seed=0)
    kept = draw.kept[:, model.index_of([4])[0]]
    assert 0 < kept.sum() < 200 and any("left out states" in n for n in draw.notes)
    assert np.all(np.isnan(draw.equilibria[~kept, model.index_of([4])[0]]))
    assert np.allclose(np.nansum(draw.equilibria, axis=1), 1.0)
    mfpt = draw.passage_time([0, 1], [2, 3])
    assert mfpt.attrs["n_samples"] == 200 and np.isfinite(mfpt["lower"][0])
    assert draw.passage_time([4], [0]).attrs["n_samples"] == kept.sum()


def test_same_seed_same_samples_and_cancel(two_state):
    runs, model = two_state
    for uncertainty in ("bootstrap", "bayes"):
        a = quiet(mk.sample_models, model, runs, uncertainty=uncertainty, n_samples=20, seed=9)
        b = quiet(mk.sample_models, model, runs, uncertainty=uncertainty, n_samples=20, seed=9)
        np.testing.assert_array_equal(a.propagators, b.propagators)
        flag = threading.Event()
        flag.set()
        with pytest.raises(Cancelled):
            mk.sample_models(model, runs, uncertainty=uncertainty, n_samples=20, cancel=flag)


def test_too_few_samples_warn(two_state):
    runs, model = two_state
    draw = mk.sample_models(model, runs, n_samples=50, seed=0)
    with pytest.warns(mk.DiagnosticWarning, match="50 bootstrap samples .* too few for 95% intervals"):
        draw.populations()
    draw = mk.sample_models(model, uncertainty="bayes", n_samples=50, seed=0)
    with pytest.warns(mk.DiagnosticWarning, match="50 posterior samples"):
        draw.passage_time([0], [1])


def test_posterior_of_overlapping_windows_uses_counts_over_the_lag(sample_chain):
    # sliding windows at lag 3 count each transition about 3 times: the posterior of the counts
    # divided by 3 is as wide as the posterior of strided counts of the same data (same number of
    # transitions; exact for the 2-state Beta rows up to the counts' rounding)
    runs = sample_chain(TWO, 3000, n_runs=5, seed=8)
    model = quiet(mk.build_model, runs, 3)
    draw = quiet(mk.sample_models, model, uncertainty="bayes", n_samples=4000, seed=0)
    assert any("divided by the lag" in n for n in draw.notes)
    C = model.transition_counts.toarray() / 3
    stay = stats.beta(C[0, 0] + B + 1, C[0, 1] + B + 1)
    mfpt = draw.passage_time([0], [1])
    assert stay.cdf(1 - model.lag_time / mfpt["lower"][0]) == pytest.approx(0.025, abs=0.01)
    assert stay.cdf(1 - model.lag_time / mfpt["upper"][0]) == pytest.approx(0.975, abs=0.01)


def test_bad_input(two_state, sample_chain):
    runs, model = two_state
    with pytest.raises(mk.InputError, match="uncertainty must be one of 'bootstrap', 'bayes'"):
        mk.sample_models(model, runs, uncertainty="jackknife")
    with pytest.raises(mk.InputError, match="needs labels="):
        mk.sample_models(model)
    with pytest.raises(mk.InputError, match="labels are not the trajectories this model was built from"):
        mk.sample_models(model, runs[:5])
    with pytest.raises(mk.InputError, match="n_samples must be"):
        mk.sample_models(model, runs, n_samples=0)
    with pytest.raises(mk.InputError, match="must be a MarkovModel"):
        mk.sample_models(TWO, runs)
    with pytest.raises(mk.InputError, match="no transition counts"):
        mk.sample_models(quiet(mk.MarkovModel.from_transition_matrix, TWO), runs)
    other = quiet(mk.build_model, runs, 1, reversible=False)
    with pytest.raises(mk.InputError, match="needs reversible=True.*use uncertainty='bootstrap'"):
        mk.sample_models(other, uncertainty="bayes")
    draw = mk.sample_models(model, runs, n_samples=200, seed=0)
    with pytest.raises(mk.InputError, match="confidence must be"):
        draw.populations(confidence=1.5)
    with pytest.raises(mk.InputError, match="source and target must not share"):
        draw.passage_time([0], [0, 1])
    four = quiet(mk.build_model, sample_chain(FOUR, 500, n_runs=6, seed=1), 1)
    with pytest.raises(mk.InputError, match="macrostates must be found on the model"):
        draw.macro_populations(four.find_macrostates(2))
    with pytest.raises(mk.InputError, match="uncertainty='bootstrap' needs labels="):
        model.find_macrostates(2, n_samples=10)
    macro = model.find_macrostates(2, uncertainty="bayes", n_samples=200, seed=0)
    assert {"population_lower", "population_upper"} <= set(macro.populations().columns)


@pytest.mark.slow
def test_coverage_of_passage_times_on_a_two_state_chain(sample_chain):
    # Known chain, 40 replicates of 10 runs: the 95 % intervals of the MFPT 0 -> 1 (truth tau / T_01,
    # closed form) must hold the truth in most replicates for both methods. At nominal 0.95 the
    # chance of 34 or fewer hits out of 40 is about 1.4 % (binomial); intervals that ignore most
    # of the sampling noise (a third as wide) would hold it about half as often.
    # bench/bench_coverage.py --study kinetics measures coverage on larger chains.
    truth = 1 / TWO[0, 1]
    hits = {"bootstrap": 0, "bayes": 0}
    for rep in range(40):
        runs = sample_chain(TWO, 300, n_runs=10, seed=100 + rep)
        model = quiet(mk.build_model, runs, 1)
        for uncertainty in hits:
            draw = quiet(mk.sample_models, model, runs, uncertainty=uncertainty, n_samples=200, seed=rep)
            row = quiet(draw.passage_time, [0], [1])
            hits[uncertainty] += bool(row["lower"][0] <= truth <= row["upper"][0])
    assert hits["bootstrap"] >= 35 and hits["bayes"] >= 35, hits


def test_an_estimate_outside_its_interval_is_flagged(two_state):
    # samples centred away from the model (here: every sampled population shifted by +0.1)
    _, model = two_state
    pi = model.equilibrium + np.array([0.1, -0.1])
    pis = pi * np.exp(0.01 * np.random.default_rng(0).standard_normal((200, 2)))
    shifted = mk.ModelSamples(model, np.repeat(model.propagator[None], 200, axis=0),
                              pis / pis.sum(axis=1, keepdims=True), "bayes")
    with pytest.warns(mk.DiagnosticWarning, match="2 of 2 estimate.* lie outside their 95% interval"):
        shifted.populations()


@pytest.mark.parametrize("uncertainty", ["bootstrap", "bayes"])
def test_few_crossings_of_the_slowest_process_are_noted(sample_chain, two_state, uncertainty):
    """Intervals over fewer than 100 crossings of the slowest process were measured to cover less
    than stated (bench/bench_coverage.py --study kinetics); the samples say so, naming the
    crossings. On two states at lag 1 a crossing is a frame at which a run changes state,
    counted here with numpy (definition)."""
    runs = sample_chain(TWO, 100, n_runs=10, seed=8)
    changes = sum(int(np.count_nonzero(np.diff(r))) for r in runs)
    assert 0 < changes < 100
    model = quiet(mk.build_model, runs, 1)
    draw = quiet(mk.sample_models, model, runs, uncertainty=uncertainty, n_samples=20, seed=0)
    (note,) = [n for n in draw.notes if "cross the slowest process" in n]
    assert f"only {changes} times" in note and uncertainty in note
    assert note in quiet(draw.populations).attrs["notes"]
    runs, model = two_state  # 10 runs x 400 steps: about 150 crossings
    assert sum(int(np.count_nonzero(np.diff(r))) for r in runs) >= 100
    draw = quiet(mk.sample_models, model, runs, uncertainty=uncertainty, n_samples=20, seed=0)
    assert not [n for n in draw.notes if "cross the slowest process" in n]
