"""Tests of msmkit.lagscan: implied timescales across lags, bootstrap intervals, suggested lag.

External references:
- implied timescales of a Markov chain do not depend on the lag; lumping a hidden chain into
  fewer observed states adds memory, so short-lag timescales come out too fast and grow with the
  lag (Swope, Pitera & Suits, J. Phys. Chem. B 108, 6571 (2004); Prinz et al., J. Chem. Phys.
  134, 174105 (2011), Sec. III -- the variational bound);
- the bootstrap standard error estimates the sampling standard error (Efron, Ann. Stat. 7, 1
  (1979)), here compared with first-order error propagation (conftest.timescale_sigma, common
  practice);
- build_model at the same lag (same counts, same estimator) for LagScan.model;
- uncertainty="bayes": for two states the posterior of msmkit.posterior is a product of Beta
  distributions, one per row (derived in the notes of that module and checked against scipy there), so the
  posterior of the timescale -lag / ln(T_00 + T_11 - 1) is sampled here from scipy.stats.beta; at
  lag 1 the posterior spread approaches the first-order sampling error (Bernstein-von Mises,
  common practice).
"""
import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.linalg as la
import scipy.sparse as sp
from scipy import stats

from msmkit.errors import DiagnosticWarning, InputError
from msmkit.estimate import estimate_transition_matrix
import msmkit.lagscan as lagscan_module
from msmkit.lagscan import LagScan, lag_scan, suggest_lag
from msmkit.model import build_model

LAGS = [1, 2, 4, 8]


def quiet(func, *args, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiagnosticWarning)
        return func(*args, **kw)


def true_chain():
    X = np.array([[900.0, 30, 2], [30, 500, 25], [2, 25, 400]])  # same as conftest.reversible_chain
    return X / X.sum(axis=1, keepdims=True)


@pytest.fixture(scope="module")
def markov_runs(sample_chain):
    return sample_chain(true_chain(), 2000, n_runs=100, seed=21)


@pytest.fixture(scope="module")
def markov_scan(markov_runs):
    return lag_scan(markov_runs, LAGS, dt=0.5, unit="ns", n_processes=2, n_samples=40, seed=0)


def hidden_chain(p=0.02):
    """Four hidden states in a line A1 - A2 - B2 - B1, hop probability p per step. Observed: A or B.
    Only A2 and B2 exchange, so whether an observed A is about to leave depends on the hidden
    state: the observed process has memory over about 1/p steps."""
    return np.array([[1 - p, p, 0, 0], [p, 1 - 2 * p, p, 0], [0, p, 1 - 2 * p, p], [0, 0, p, 1 - p]])


# --------------------------------------------------------------------------- Markov data

def test_structure_and_units(markov_scan, markov_runs):
    scan = markov_scan
    assert isinstance(scan, LagScan)
    assert scan.lags.tolist() == LAGS and scan.lags.dtype == np.int64
    np.testing.assert_array_equal(scan.lag_times, np.array(LAGS) * 0.5)
    assert scan.timescales.shape == scan.lower.shape == scan.upper.shape == (4, 2)
    assert scan.samples.shape == (4, 40, 2)
    assert scan.unit == "ns" and scan.confidence == 0.95 and scan.n_samples == 40
    assert np.all(scan.lower <= scan.upper)
    assert scan.notes == []  # 100 runs: whole runs are resampled; every lag resolves its process


def test_full_data_timescales_equal_build_model(markov_scan, markov_runs):
    for a, lag in enumerate(LAGS):
        model = quiet(build_model, markov_runs, lag, dt=0.5, unit="ns")
        np.testing.assert_allclose(markov_scan.timescales[a], model.relaxation_times(2), rtol=1e-10)
        scanned = markov_scan.model(lag)
        np.testing.assert_allclose(scanned.propagator, model.propagator, rtol=1e-10, atol=1e-14)
        np.testing.assert_array_equal(scanned.transition_counts.toarray(), model.transition_counts.toarray())
        assert scanned.lag == lag and scanned.unit == "ns"


def test_markov_data_timescales_match_truth_and_suggest_smallest_lag(markov_scan):
    # a Markov chain has the same implied timescales at every lag (scipy.linalg.eig of the truth)
    w = np.sort(la.eigvals(true_chain()).real)[::-1]
    expected = -0.5 / np.log(w[1:])
    for a in range(len(LAGS)):
        resolved = expected > LAGS[a] * 0.5
        # within three half-widths of the 95 % bootstrap interval (about 6 standard errors)
        half = (markov_scan.upper[a] - markov_scan.lower[a]) / 2
        assert np.all(np.abs(markov_scan.timescales[a] - expected)[resolved] <= 3 * half[resolved])
    assert markov_scan.suggested_lag == 1
    assert markov_scan.reason.startswith("Lag 1 frames (0.5 ns) is the smallest scanned lag")


def test_bootstrap_spread_matches_first_order_error(markov_scan, markov_runs, timescale_sigma):
    # at lag 1 the counts out of each state are multinomial: first-order propagation gives the
    # sampling standard error, which the bootstrap over runs must reproduce (Efron 1979). With 40
    # samples the bootstrap standard deviation itself is uncertain by ~1/sqrt(80) = 11 %; allow
    # a factor 1.5 either way.
    model = markov_scan.model(1)
    counts_out = np.asarray(model.transition_counts.sum(axis=1)).ravel()
    for k in (1, 2):
        _, _, sigma = timescale_sigma(true_chain(), counts_out, 1, 0.5, which=k)
        spread = np.std(markov_scan.samples[0, :, k - 1], ddof=1)
        assert 1 / 1.5 < spread / sigma < 1.5, (k, spread, sigma)


def test_table(markov_scan):
    df = markov_scan.table()
    assert isinstance(df, pd.DataFrame)
    assert list(df.columns) == ["lag", "lag_time", "process", "timescale", "lower", "upper", "resolved",
                                "estimate_outside"]
    assert not df["estimate_outside"].any()
    assert len(df) == 8 and df.attrs["unit"] == "ns"
    assert df["process"].tolist() == [1, 2] * 4
    np.testing.assert_array_equal(df["timescale"], markov_scan.timescales.ravel())
    np.testing.assert_array_equal(df["resolved"], df["timescale"] > df["lag_time"])
    assert not df.loc[(df.lag == 8) & (df.process == 2), "resolved"].item()  # 3.2 ns < 4 ns


def test_model_of_unscanned_lag(markov_scan):
    with pytest.raises(InputError, match=r"lag 3 was not scanned; choose one of \[1, 2, 4, 8\]"):
        markov_scan.model(3)
    with pytest.raises(InputError, match=r"lag must be an integer"):
        markov_scan.model("1")


# --------------------------------------------------------------------------- data with memory

def test_hidden_states_make_short_lags_non_markovian(sample_chain):
    H = hidden_chain()
    hidden = sample_chain(H, 3000, n_runs=60, seed=1)
    observed = [(h >= 2).astype(np.int32) for h in hidden]
    scan = lag_scan(observed, [1, 2, 5, 10, 20, 50], n_processes=1, n_samples=0)
    t = scan.timescales[:, 0]
    true_t = -1 / np.log(np.sort(la.eigvals(H).real)[-2])  # about 85 steps
    # variational bound: the lumped model's timescale is too fast and grows toward the truth
    assert np.all(np.diff(t) > 0)
    assert np.all(t < true_t)
    assert scan.suggested_lag is None or scan.suggested_lag > 1
    assert isinstance(scan.reason, str) and scan.reason
    if scan.suggested_lag is None:
        assert "keep changing with the lag" in scan.reason


# --------------------------------------------------------------------------- resampling

def test_same_seed_same_intervals(sample_chain):
    runs = sample_chain(true_chain(), 300, n_runs=6, seed=2)
    a = lag_scan(runs, [1, 3], n_processes=2, n_samples=8, seed=3)
    b = lag_scan(runs, [1, 3], n_processes=2, n_samples=8, seed=3)
    c = lag_scan(runs, [1, 3], n_processes=2, n_samples=8, seed=4)
    np.testing.assert_array_equal(a.lower, b.lower)
    np.testing.assert_array_equal(a.upper, b.upper)
    np.testing.assert_array_equal(a.samples, b.samples)
    assert not np.array_equal(a.samples, c.samples)


def test_no_samples_no_interval(sample_chain):
    runs = sample_chain(true_chain(), 300, n_runs=3, seed=2)
    scan = lag_scan(runs, [1, 2], n_processes=2, n_samples=0)
    assert np.all(np.isnan(scan.lower)) and np.all(np.isnan(scan.upper))
    assert scan.samples.shape == (2, 0, 2)
    assert not any("block" in n for n in scan.notes)  # nothing was resampled
    assert "no bootstrap intervals were computed" in scan.reason


def test_few_runs_use_blocks_and_say_so(sample_chain):
    runs = sample_chain(true_chain(), 600, n_runs=3, seed=9)
    scan = lag_scan(runs, [1, 2], n_processes=1, n_samples=6, seed=0)
    note = next(n for n in scan.notes if "block" in n)
    assert "Only 3 run(s)" in note and "7 contiguous blocks per run" in note and "too narrow" in note
    assert np.all(np.isfinite(scan.lower)) and np.all(scan.lower < scan.upper)
    one = lag_scan(runs[0], [1], n_processes=1, n_samples=4, seed=0)
    assert any("Only 1 run(s)" in n and "20 contiguous blocks" in n for n in one.notes)
    many = lag_scan(sample_chain(true_chain(), 200, n_runs=5, seed=9), [1], n_processes=1, n_samples=4, seed=0)
    assert not any("block" in n for n in many.notes)


def test_more_timescales_than_processes_are_nan(sample_chain):
    runs = sample_chain(true_chain(), 300, n_runs=5, seed=2)
    scan = lag_scan(runs, [1, 2], n_processes=4, n_samples=3, seed=1, progress=True)
    assert np.all(np.isfinite(scan.timescales[:, :2])) and np.all(np.isnan(scan.timescales[:, 2:]))
    assert np.all(np.isnan(scan.samples[:, :, 2:]))


def test_scan_notes_unresolved_lag_and_dropped_counts(sample_chain):
    runs = sample_chain(true_chain(), 400, n_runs=5, seed=2)
    runs[0] = np.concatenate([runs[0], [5]])  # 5: entered once, never left -> dropped at every lag
    scan = lag_scan(runs, [1, 50], n_processes=1)
    assert any("At lag(s) [50] frames the slowest timescale is shorter than the lag itself" in n for n in scan.notes)
    share = 1 / sum(r.size - 1 for r in runs)
    assert share < 0.01  # below the 1 % threshold of the note
    assert not any("outside the largest connected set" in n for n in scan.notes)
    assert scan.model(1).dropped_states.tolist() == [5]
    tiny = [np.array([0, 1, 0, 1, 0, 1, 0, 2])]  # 1 of 7 counts dropped
    scan = lag_scan(tiny, [1], n_processes=1)
    assert any("14.3% dropped at lag 1" in n for n in scan.notes), scan.notes


# --------------------------------------------------------------------------- the suggestion rule

def test_suggest_lag_rules():
    lags = np.array([1, 2, 4, 8, 16])
    nan = np.full((5, 1), np.nan)
    flat = np.array([[40.0], [40.5], [39.8], [40.2], [40.1]])
    assert suggest_lag(lags, flat, nan, nan, dt=1.0, unit="ns")[0] == 1
    rising = np.array([[20.0], [26.0], [32.0], [38.0], [44.0]])
    lag, reason = suggest_lag(lags, rising, nan, nan, dt=1.0, unit="ns")
    assert lag is None and "keep changing" in reason and "no bootstrap intervals" in reason
    levels = np.array([[20.0], [30.0], [39.2], [40.0], [39.6]])
    assert suggest_lag(lags, levels, nan, nan, dt=1.0, unit="ns")[0] == 4
    # a later value inside a narrow candidate interval counts as agreement even beyond rtol ...
    slow = np.array([[20.0], [30.0], [38.0], [40.0], [41.0]])  # 41 is 8 % above 38
    assert suggest_lag(lags, slow, slow - 4, slow + 4, dt=1.0, unit="ns")[0] == 4
    # ... not one inside an interval wider than half the estimate: it would agree with anything
    lag, reason = suggest_lag(lags, rising, rising - 20, rising + 20, dt=1.0, unit="ns")
    assert lag is None and "is wider than 0.5 x the estimate" in reason
    fast = np.array([[0.5], [0.6], [0.7], [0.8], [0.9]])
    lag, reason = suggest_lag(lags, fast, nan, nan, dt=1.0, unit="ns")
    assert lag is None and "nothing is resolved" in reason
    lag, reason = suggest_lag(lags[:1], flat[:1], nan[:1], nan[:1], dt=1.0, unit="ns")
    assert lag is None and "Only one lag was scanned" in reason


# --------------------------------------------------------------------------- bad input

@pytest.mark.parametrize("kw, message", [
    ({"lags": []}, r"lags is empty"),
    ({"lags": [0, 2]}, r"lags must be positive integers \(frames\), but got \[0\]"),
    ({"lags": [1, 2.5]}, r"lags must be an integer, but got 2\.5"),
    ({"lags": [1, 500]}, r"lags \[500\] are not shorter than the longest trajectory \(400 frames\)"),
    ({"confidence": 1.0}, r"confidence must be strictly between 0 and 1"),
    ({"n_samples": -1}, r"n_samples must be an integer not less than 0"),
    ({"n_processes": 0}, r"n_processes must be an integer not less than 1"),
    ({"unit": ""}, r"unit must be a non-empty string"),
])
def test_bad_input(sample_chain, kw, message):
    runs = sample_chain(true_chain(), 400, n_runs=2, seed=0)
    args = {"lags": [1, 2]}
    args.update(kw)
    with pytest.raises(InputError, match=message):
        lag_scan(runs, **args)


def test_lags_sorted_and_unique(sample_chain):
    runs = sample_chain(true_chain(), 300, n_runs=5, seed=0)
    assert lag_scan(runs, [4, 1, 4, 2], n_processes=1).lags.tolist() == [1, 2, 4]
    assert lag_scan(runs, 3, n_processes=1).lags.tolist() == [3]


def test_bootstrap_on_threads_leaves_warning_filters_alone(sample_chain, reversible_chain, monkeypatch):
    # Samples are fitted on worker threads (here at every pattern size); the process-wide warning
    # filters must come out of a scan exactly as they went in (warnings.catch_warnings is not
    # thread-safe; common practice).
    runs = sample_chain(reversible_chain, 400, n_runs=8, seed=2)
    before = list(warnings.filters)
    monkeypatch.setattr(lagscan_module, "THREADED_PATTERN", 0)
    a = lag_scan(runs, [1, 2], n_samples=12, seed=5)
    assert warnings.filters == before
    monkeypatch.setattr(lagscan_module, "THREADED_PATTERN", np.inf)
    b = lag_scan(runs, [1, 2], n_samples=12, seed=5)  # threads do not change the answer
    np.testing.assert_array_equal(a.samples, b.samples)


# --------------------------------------------------------------------------- an honest suggestion

def two_wells():
    """Four states, two pairs {0, 1} and {2, 3} exchanging slowly: slowest implied timescale
    61.0 steps (from scipy.linalg.eigvals: -1 / ln lambda_2), the others about 5 steps. Detailed
    balance by construction (symmetric weights, common practice)."""
    X = np.array([[1, 0.1, 0, 0], [0.1, 1, 0.02, 0], [0, 0.02, 1, 0.1], [0, 0, 0.1, 1.0]])
    return X / X.sum(axis=1, keepdims=True)


def test_two_wells_reference_timescale():
    w = np.sort(la.eigvals(two_wells()).real)[::-1]
    assert -1 / np.log(w[1]) == pytest.approx(61.0, abs=0.05)


@pytest.mark.slow
def test_no_lag_suggested_from_runs_shorter_than_the_slow_process(sample_chain):
    # 3 runs x 60 frames, slowest timescale 61 steps: each run is shorter than one relaxation and
    # the slow process is crossed a few times. Before, a lag was suggested in 29 of these 30
    # replicates (measured), on intervals wider than the estimate; now none may be, with the
    # reason in words.
    suggested, reasons = [], []
    for r in range(30):
        runs = sample_chain(two_wells(), 60, n_runs=3, seed=500 + r)
        scan = quiet(lag_scan, runs, [1, 2, 4, 8, 16], n_processes=2, n_samples=20, seed=r)
        if scan.suggested_lag is not None:
            suggested.append(r)
        else:
            reasons.append(scan.reason)
    assert len(suggested) <= 1, suggested
    for reason in reasons:
        assert reason.startswith("No lag is suggested: ") and "Collect more or longer runs" in reason, reason


def test_well_sampled_two_wells_get_a_suggestion(sample_chain):
    runs = sample_chain(two_wells(), 1000, n_runs=10, seed=3)
    scan = quiet(lag_scan, runs, [1, 2, 4, 8, 16], n_processes=2, n_samples=20, seed=0)
    assert scan.suggested_lag is not None, scan.reason
    a = int(np.flatnonzero(scan.lags == scan.suggested_lag)[0])
    # the suggestion rests on a narrow interval above the lag time, containing the truth (61 steps)
    assert scan.upper[a, 0] - scan.lower[a, 0] <= 0.5 * scan.timescales[a, 0]
    assert scan.lower[a, 0] > scan.lag_times[a] and scan.lower[a, 0] <= 61.0 <= scan.upper[a, 0]
    assert "the data cross the slowest process" in scan.reason


def test_suggestion_needs_support_narrow_intervals_and_two_later_lags():
    lags = np.array([1, 2, 4, 8])
    flat = np.array([[40.0], [40.5], [39.8], [40.2]])
    narrow = (flat - 2, flat + 2)
    assert suggest_lag(lags, flat, *narrow, dt=1.0, unit="ns", crossings=[50] * 4, run_time=500.0)[0] == 1
    lag, reason = suggest_lag(lags, flat, *narrow, dt=1.0, unit="ns", crossings=[5, 4, 3, 3], run_time=500.0)
    assert lag is None and "cross the slowest process only 5 time(s) at lag 1 frames" in reason
    lag, reason = suggest_lag(lags, flat, *narrow, dt=1.0, unit="ns", crossings=[50] * 4, run_time=30.0)
    assert lag is None and "longer than the longest run (30 ns)" in reason
    low = (flat - np.array([[39.5], [2], [2], [2]]), flat + 2)  # lag 1: interval reaches below 1 ns
    lag, reason = suggest_lag(lags, flat, *low, dt=1.0, unit="ns")
    assert lag == 2 and reason.startswith("Lag 2 frames")
    near = np.array([[1.9], [1.9], [1.9]])  # resolved at lag 1 only, interval [0.96, 1.91]
    lag, reason = suggest_lag(lags[:3], near, near - 0.94, near + 0.01, dt=1.0, unit="ns")
    assert lag is None and "reaches down to 0.96 ns, not above the lag time 1 ns" in reason
    lag, reason = suggest_lag(lags[:2], flat[:2], narrow[0][:2], narrow[1][:2], dt=1.0, unit="ns")
    assert lag is None and "fewer than 2 larger scanned lags resolve the slowest timescale" in reason
    # an estimate outside the interval made for it is refused, and flagged in the table
    off = (flat + 1, flat + 3)
    lag, reason = suggest_lag(lags, flat, *off, dt=1.0, unit="ns")
    assert lag is None and "lies outside the 95% interval made for it" in reason


def test_estimate_outside_its_interval_is_flagged():
    from msmkit.lagscan import _scan_findings
    lags = np.array([1, 2])
    ts = np.array([[10.0, 3.0], [11.0, 3.5]])
    lower = np.array([[8.0, 3.1], [9.0, 3.0]])  # 3.0 lies below [3.1, 4.0]
    upper = np.array([[12.0, 4.0], [13.0, 4.0]])
    scan = LagScan(lags, ts, lower, upper, np.empty((2, 0, 2)), 1.0, "ns", 0.95, 20, None, "")
    assert scan.table()["estimate_outside"].tolist() == [False, True, False, False]
    note = next(n for n in _scan_findings(lags, ts, {}, 1.0, "ns", lower, upper) if "outside" in n)
    assert note.startswith("At lag(s) [1] frames 1 timescale(s) lie outside the interval")


def test_samples_stay_on_the_full_data_states(sample_chain):
    # Seven runs of a slow two-state chain (labels 0, 1) and three runs of a fast one on labels
    # 2, 3: the full-data model keeps the slow pair. A sample drawing mostly fast runs must still
    # be fitted on states 0 and 1, never report the fast system's timescale. Exact two-state
    # timescales -1 / ln(1 - 2p) (eigenvalue 1 - 2p of [[1-p, p], [p, 1-p]], common practice).
    def two_state(p):
        return np.array([[1 - p, p], [p, 1 - p]])

    slow = sample_chain(two_state(0.01), 1500, n_runs=7, seed=31)
    fast = [r + 2 for r in sample_chain(two_state(0.2), 1500, n_runs=3, seed=32)]
    slow_t, fast_t = -1 / np.log(1 - 0.02), -1 / np.log(1 - 0.4)  # 49.5 and 1.96 steps
    scan = quiet(lag_scan, slow + fast, [1, 2], n_processes=1, n_samples=60, seed=0)
    assert scan.model(1).states.tolist() == [0, 1]
    assert np.all(np.isfinite(scan.samples))
    # the fast timescale lies more than 10x below every sample and the interval
    assert np.min(scan.samples) > 10 * fast_t
    assert np.all(scan.lower > 10 * fast_t)
    assert np.all(scan.lower < slow_t) and np.all(scan.upper > slow_t)


# --------------------------------------------------------------------------- coverage

def test_too_few_samples_warn(sample_chain):
    runs = sample_chain(true_chain(), 300, n_runs=6, seed=2)
    with pytest.warns(DiagnosticWarning, match=r"20 bootstrap samples are too few for 95% intervals.*n_samples >= 200"):
        lag_scan(runs, [1], n_processes=1, n_samples=20, seed=0)
    with pytest.warns(DiagnosticWarning, match=r"n_samples >= 100"):
        lag_scan(runs, [1], n_processes=1, n_samples=20, seed=0, confidence=0.9)
    with warnings.catch_warnings():
        warnings.simplefilter("error", DiagnosticWarning)
        lag_scan(runs, [1], n_processes=1, n_samples=0)
    with pytest.raises(InputError, match=r"interval must be one of 'bca', 'bc', 'percentile'"):
        lag_scan(runs, [1], n_samples=0, interval="student")


@pytest.mark.slow
def test_interval_coverage_on_a_known_chain(sample_chain):
    # Replicates of 10 runs from a known chain; the share of 95 % intervals that hold the exact
    # slowest timescale (scipy.linalg.eig of the truth) must be 0.95 within 3 binomial standard
    # errors, sqrt(0.95 * 0.05 / R) (common practice): with R = 80 that is 0.877-1, so the test
    # catches gross under- or over-coverage only (plain unwidened percentiles gave 0.925 on this
    # case); the finer figures per method are printed by bench/bench_coverage.py.
    T = true_chain()
    exact = -1 / np.log(np.sort(la.eigvals(T).real)[::-1][1])
    R = 80
    hits = []
    for rep in range(R):
        runs = sample_chain(T, 400, n_runs=10, seed=1000 + rep)
        scan = quiet(lag_scan, runs, [1], n_processes=1, n_samples=200, seed=rep)
        hits.append(scan.lower[0, 0] <= exact <= scan.upper[0, 0])
    coverage = np.mean(hits)
    assert abs(coverage - 0.95) <= 3 * np.sqrt(0.95 * 0.05 / R), coverage


# --------------------------------------------------------------------------- the per-sample kernel

def _random_walk_counts(rng, n, extra, lazy):
    """A strongly connected sparse count matrix: a ring of n states plus ``extra`` random
    links in both directions, Poisson counts; ``lazy`` scales the counts of staying."""
    i = np.concatenate([np.arange(n), np.arange(n), rng.integers(0, n, extra)])
    j = np.concatenate([(np.arange(n) + 1) % n, np.arange(n), rng.integers(0, n, extra)])
    i, j = np.concatenate([i, j]), np.concatenate([j, i])
    mean = np.where(i == j, lazy, 1.0) * rng.uniform(5, 200, i.size)
    C = sp.coo_matrix((rng.poisson(mean) + (i != j), (i, j)), shape=(n, n)).tocsr()
    C.sum_duplicates()
    return C


def _reference_timescales(C, lag, k):
    """Timescales of the reversible MLE on the largest connected set: estimate_transition_matrix
    and the eigenvalues of scipy.linalg.eig sorted by magnitude (exact linear algebra)."""
    from msmkit.counts import kept_states
    keep = kept_states(C)
    T = estimate_transition_matrix(C[keep][:, keep], reversible=True, tol=1e-13)
    w = la.eig(T, right=False)
    w = np.real(w[np.argsort(-np.abs(w))])[1:k + 1]
    return -lag / np.log(np.abs(w))


@pytest.mark.parametrize("n, extra, lazy, seed", [(400, 200, 20.0, 0), (150, 0, 5.0, 1), (400, 200, 0.0, 2),
                                                   (101, 0, 0.0, 3), (1200, 900, 5.0, 4), (1200, 900, 0.0, 6)])
def test_pattern_fit_equals_the_estimator(n, extra, lazy, seed, monkeypatch):
    # CountPattern.reversible_fit and flow_eigenvalues against estimate_transition_matrix and
    # scipy.linalg.eig on random sparse counts (above DENSE_FLOW_STATES: the sparse paths; a
    # plain ring (extra=0) is banded, random links are not: both factorizations are used);
    # lazy=0 leaves no staying counts on most states, so eigenvalues near -1 compete in
    # magnitude (the Gershgorin bound cannot exclude them). From ITERATIVE_STATES on, a wide
    # band takes conjugate gradients in the Newton steps and plain Lanczos for the eigenvalues:
    # the reference estimate is then made by the direct sparse LU route.
    import msmkit.estimate as estimate
    import msmkit.spectral as spectral
    from msmkit.estimate import ITERATIVE_STATES, CountPattern
    from msmkit.spectral import DENSE_FLOW_STATES, FlowSpectrum, flow_eigenvalues
    assert n > DENSE_FLOW_STATES
    iterative = n - 1 >= ITERATIVE_STATES
    rng = np.random.default_rng(seed)
    C = _random_walk_counts(rng, n, extra, lazy)
    Cc = C.tocoo()
    pattern = CountPattern(Cc.row, Cc.col, n, anchor=int(np.argmax(np.asarray(C.sum(axis=1)))))
    solves = []
    monkeypatch.setattr(estimate, "conjugate_gradients",
                        lambda *a, **kw: solves.append(1) or spectral.conjugate_gradients(*a, **kw))
    start = rng.uniform(0.5, 1.5, n)  # a poor warm start: the fit must still reach the MLE
    fit = pattern.reversible_fit(Cc.data.astype(float), start / start.sum())
    assert fit.converged
    assert bool(solves) == (iterative and pattern._band is None)
    with monkeypatch.context() as direct:
        direct.setattr(estimate, "ITERATIVE_STATES", 10 ** 9)
        T_ref, info = estimate_transition_matrix(C, reversible=True, tol=1e-13, return_info=True)
    X = pattern.flow_matrix(fit.flows).toarray()
    np.testing.assert_allclose(X, X.T, rtol=0, atol=0)
    np.testing.assert_allclose(X / X.sum(axis=1, keepdims=True), T_ref, rtol=0, atol=1e-11)
    np.testing.assert_allclose(fit.equilibrium, info.equilibrium, rtol=1e-9)
    w_ref = la.eig(T_ref, right=False)
    w_ref = w_ref[np.argsort(-np.abs(w_ref))][:6]
    w = flow_eigenvalues(pattern.flow_matrix(fit.flows), 6, shift=1 + 1e-4)
    np.testing.assert_allclose(w, np.real(w_ref), rtol=0, atol=1e-10)
    spectrum = FlowSpectrum(pattern.sym_i, pattern.sym_j, n)
    assert spectrum.banded == (extra == 0)
    # the stated tolerance of FlowSpectrum.eigenvalues: with the shift a hundredth of the gap
    # 1 - |lambda_5| above 1 (as the bootstrap kernel chooses it), the implied timescales
    # -1 / ln|lambda| to about tol relative (first order; checked with tenfold slack) against
    # scipy.linalg.eig
    shift = 1 + 0.01 * (1 - abs(w_ref[5]))
    w_tol = spectrum.eigenvalues(fit.flows, 6, shift=shift, start=np.sqrt(fit.equilibrium), tol=1e-10)
    np.testing.assert_allclose(-1 / np.log(np.abs(w_tol[1:])), -1 / np.log(np.abs(w_ref[1:])), rtol=1e-9)
    A, a, diag = spectrum.symmetric(fit.flows)
    solve = spectrum._solver(a, diag, 1.01, -1.0)  # the factorization itself, not a fallback
    b = rng.normal(size=n)
    np.testing.assert_allclose(1.01 * solve(b) - A @ solve(b), b, atol=1e-10)
    if lazy == 0.0:
        assert np.any(np.real(w_ref[1:]) < 0)  # the case meant: a negative one among the leading
    if not spectrum.banded:
        # plain Lanczos that runs out of restarts hands over to shift-invert: the same values
        monkeypatch.setattr(spectral, "PLAIN_LANCZOS_RESTARTS", 1)
        w_si = spectrum.eigenvalues(fit.flows, 6, shift=shift, start=np.sqrt(fit.equilibrium), tol=1e-10)
        np.testing.assert_allclose(w_si, np.real(w_ref), rtol=0, atol=1e-10)


def test_pattern_fit_falls_back_to_the_banded_lu_when_cholesky_fails(monkeypatch):
    # A banded pattern's Newton matrix is factorised by Cholesky; should LAPACK report it not
    # positive definite (rounding), the banded LU of the Jacobian takes over and must reach the
    # same maximum-likelihood estimate (against estimate_transition_matrix).
    import msmkit.estimate as estimate
    from msmkit.estimate import CountPattern
    rng = np.random.default_rng(7)
    n = 150
    C = _random_walk_counts(rng, n, 0, 5.0)
    Cc = C.tocoo()
    pattern = CountPattern(Cc.row, Cc.col, n, anchor=int(np.argmax(np.asarray(C.sum(axis=1)))))
    assert pattern._band is not None
    calls, lu = [], []
    monkeypatch.setattr(estimate, "banded_cholesky", lambda ab: calls.append(1) and None)
    dgbtrf = estimate.lapack.dgbtrf
    monkeypatch.setattr(estimate.lapack, "dgbtrf", lambda *a: lu.append(1) or dgbtrf(*a))
    start = rng.uniform(0.5, 1.5, n)
    fit = pattern.reversible_fit(Cc.data.astype(float), start / start.sum())
    assert calls and len(lu) == len(calls) and fit.converged
    T_ref, info = estimate_transition_matrix(C, reversible=True, tol=1e-13, return_info=True)
    X = pattern.flow_matrix(fit.flows).toarray()
    np.testing.assert_allclose(X / X.sum(axis=1, keepdims=True), T_ref, rtol=0, atol=1e-11)
    np.testing.assert_allclose(fit.equilibrium, info.equilibrium, rtol=1e-9)


def test_sample_kernel_equals_the_estimator_on_every_sample():
    # SampleTimescales (the lag scan's per-sample kernel, fast route and general route) against
    # the estimator + scipy.linalg.eig on the same resampled counts, units of a random walk
    # among 100 states of which some are visited by few units (some samples disconnect them).
    from msmkit._bootstrap import SampleTimescales, StateCounts, resampling_plan
    from msmkit.counts import run_count_rows
    from msmkit.model import model_from_counts
    rng = np.random.default_rng(5)
    n = 100
    C = _random_walk_counts(rng, n, 40, 10.0)
    T = C.toarray() / np.asarray(C.sum(axis=1))
    runs = []
    for r in range(8):  # each run wanders over part of the ring
        x = [int(rng.integers(0, n))]
        for u in rng.random(3000):
            x.append(int(np.searchsorted(np.cumsum(T[x[-1]]), u * 0.999999999)))
        runs.append(np.array(x))
    lag, k = 3, 4
    rows, n_labels = run_count_rows(runs, lag)
    full = np.asarray(rows.sum(axis=0)).ravel()
    model = quiet(model_from_counts, sp.csr_matrix(full.reshape(n_labels, n_labels)), lag, dt=1.0, unit="step",
                  reversible=True)
    on_states = StateCounts(rows, n_labels, model.states)
    kernel = SampleTimescales(on_states, model, k)
    _, weights, _ = resampling_plan(len(runs), 12, np.random.default_rng(0))
    values = on_states.values(weights)
    general = 0
    for b in range(values.shape[0]):
        Cb = on_states.matrix(values[b])
        general += not kernel.pattern.is_connected(values[b])
        ref = _reference_timescales(Cb, lag, k)
        np.testing.assert_allclose(kernel(values[b]), ref, rtol=1e-8)
    assert 0 < general < values.shape[0]  # both routes were taken


# --------------------------------------------------------------------------- uncertainty="bayes"

@pytest.fixture(scope="module")
def bayes_scan(markov_runs):
    return lag_scan(markov_runs, LAGS, dt=0.5, unit="ns", n_processes=2, n_samples=300, seed=0,
                    uncertainty="bayes")


@pytest.mark.parametrize("lag", [1, 2])
def test_bayes_timescale_of_two_states_follows_the_beta_posterior(sample_chain, lag):
    # Reference (module docstring): T_00 ~ Beta(C_00 + b + 1, C_01 + b + 1) and T_11 likewise,
    # independent, with the intervals' prior count b = -1; sliding-window counts at lag 2 enter
    # divided by 2. The equal-tailed
    # interval must leave 2.5 % of the reference posterior beyond each end; with 4000 nearly
    # independent samples a level is uncertain by about 0.0025, allowed 0.008 (three of that).
    # The posterior of the undivided counts at lag 2 is narrower: only 0.002-0.003 of it lies beyond
    # each end of the interval (measured), so the check tells the two apart.
    T = np.array([[0.95, 0.05], [0.08, 0.92]])
    runs = sample_chain(T, 3000, n_runs=4, seed=3)
    scan = lag_scan(runs, [lag], n_processes=1, n_samples=4000, seed=0, uncertainty="bayes")
    C = quiet(build_model, runs, lag).transition_counts.toarray() / lag
    b = -1.0  # msmkit.posterior.INTERVAL_PRIOR_COUNT: the likelihood alone
    rng = np.random.default_rng(1)
    t00 = stats.beta(C[0, 0] + b + 1, C[0, 1] + b + 1).rvs(200_000, random_state=rng)
    t11 = stats.beta(C[1, 1] + b + 1, C[1, 0] + b + 1).rvs(200_000, random_state=rng)
    reference = -lag / np.log(t00 + t11 - 1)
    assert scan.uncertainty == "bayes" and scan.table().attrs["uncertainty"] == "bayes"
    assert np.mean(reference < scan.lower[0, 0]) == pytest.approx(0.025, abs=0.008)
    assert np.mean(reference > scan.upper[0, 0]) == pytest.approx(0.025, abs=0.008)
    assert np.median(scan.samples[0, :, 0]) == pytest.approx(np.median(reference), rel=0.02)


def test_bayes_intervals_are_equal_tailed_and_contain_the_truth(bayes_scan, markov_scan):
    # equal-tailed: the 2.5 and 97.5 % quantiles of the samples by the (m + 1) p rule (numpy's
    # weibull method), not widened
    lo, hi = np.percentile(bayes_scan.samples, [2.5, 97.5], axis=1, method="weibull")
    np.testing.assert_allclose(bayes_scan.lower, lo, rtol=1e-12)
    np.testing.assert_allclose(bayes_scan.upper, hi, rtol=1e-12)
    # the same full-data models as the bootstrap scan; only the intervals differ
    np.testing.assert_array_equal(bayes_scan.timescales, markov_scan.timescales)
    # the truth (scipy.linalg.eigvals of the simulated chain) lies inside every interval in this
    # seeded case: 100 runs of 2000 frames, lags 1-8
    w = np.sort(la.eigvals(true_chain()).real)[::-1]
    expected = np.broadcast_to(-0.5 / np.log(w[1:3]), bayes_scan.lower.shape)
    assert np.all((bayes_scan.lower <= expected) & (expected <= bayes_scan.upper)), \
        (bayes_scan.lower, expected, bayes_scan.upper)
    assert bayes_scan.suggested_lag == 1  # the lag rule reads the intervals whatever their method
    assert any("credible intervals from 300 samples of the posterior" in n for n in bayes_scan.notes)
    assert markov_scan.uncertainty == "bootstrap" and markov_scan.table().attrs["uncertainty"] == "bootstrap"


def test_bayes_spread_matches_first_order_error(bayes_scan, timescale_sigma):
    # at lag 1 (independent transitions) the posterior standard deviation approaches the sampling
    # error of first-order propagation; 300 correlated samples: allow 25 %
    model = bayes_scan.model(1)
    counts_out = np.asarray(model.transition_counts.sum(axis=1)).ravel()
    for k in (1, 2):
        _, _, sigma = timescale_sigma(true_chain(), counts_out, 1, 0.5, which=k)
        spread = np.std(bayes_scan.samples[0, :, k - 1], ddof=1)
        assert 1 / 1.25 < spread / sigma < 1.25, (k, spread, sigma)


def test_bayes_same_seed_same_intervals(sample_chain):
    runs = sample_chain(true_chain(), 300, n_runs=6, seed=2)
    a, b, c = (quiet(lag_scan, runs, [1, 3], n_processes=2, n_samples=20, seed=s, uncertainty="bayes")
               for s in (3, 3, 4))
    np.testing.assert_array_equal(a.samples, b.samples)
    assert not np.array_equal(a.samples, c.samples)


def test_bayes_refuses_non_reversible_and_unknown_methods(sample_chain):
    runs = sample_chain(true_chain(), 300, n_runs=6, seed=2)
    with pytest.raises(InputError, match=r"uncertainty='bayes'.*reversible=True.*uncertainty='bootstrap'"):
        lag_scan(runs, [1], n_samples=10, reversible=False, uncertainty="bayes")
    with pytest.raises(InputError, match=r"uncertainty must be one of 'bootstrap', 'bayes', but got 'jackknife'"):
        lag_scan(runs, [1], uncertainty="jackknife")


@pytest.mark.parametrize("uncertainty", ["bootstrap", "bayes"])
def test_scan_notes_few_crossings_for_either_method(sample_chain, uncertainty):
    """Fewer than 100 crossings of the slowest process at a scanned lag: a note says that the
    intervals cover less than stated (measured, bench/bench_coverage.py), for the bootstrap and
    the posterior alike; at lag 1 on two states a crossing is a change of state (numpy count)."""
    T = np.array([[0.97, 0.03], [0.05, 0.95]])
    runs = sample_chain(T, 100, n_runs=10, seed=8)
    changes = sum(int(np.count_nonzero(np.diff(r))) for r in runs)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiagnosticWarning)
        scan = lag_scan(runs, [1, 2], n_samples=20, seed=0, uncertainty=uncertainty)
    (note,) = [n for n in scan.notes if "cross the slowest process" in n]
    assert note.startswith("At lag(s) [1, 2] frames") and uncertainty in note
    assert f"only {min(changes, scan.model(2).state_changes()[1]):.3g} times" in note
