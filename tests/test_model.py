"""Tests of msmkit.model: MarkovModel and build_model, end to end against outside references.

- two-state chain in closed form (linear algebra, common practice);
- trajectories sampled from known chains: estimates against scipy.linalg.eig of the true matrix,
  with tolerances from the sample size (multinomial errors and first-order error propagation,
  common practice; see conftest.py);
- continuous-time chains: T = expm(K dt) (scipy.linalg.expm) has implied timescales
  -1/lambda(K), independent of the lag (common practice);
- overdamped diffusion in a double well against a fine-grid Smoluchowski operator and Kramers'
  formula in the overdamped (Smoluchowski) limit (Kramers, Physica 7, 284 (1940); Hanggi,
  Talkner & Borkovec, Rev. Mod. Phys. 62, 251 (1990); formula from memory);
- free energies with R = 8.314462618 J/mol/K (CODATA 2018, exact).
"""
import time
import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.linalg as la

import msmkit as mk
from msmkit.errors import DiagnosticWarning, InputError
from msmkit.model import MarkovModel, build_model

R_J_PER_MOL_K = 8.314462618  # CODATA 2018, exact


def quiet(func, *args, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiagnosticWarning)
        return func(*args, **kw)


def ref_timescales(T, lag=1, dt=1.0):
    """Implied timescales from scipy.linalg.eigvals, slowest first (stationary one left out)."""
    w = np.abs(la.eigvals(T))
    w = np.sort(w)[::-1][1:]
    return -lag * dt / np.log(w)


# --------------------------------------------------------------------------- closed forms

@pytest.mark.parametrize("a, b", [(0.1, 0.3), (0.002, 0.01)])
def test_two_state_model_closed_form(a, b):
    # eigenvalue 1-a-b, stationary (b, a)/(a+b), timescale -tau/ln(1-a-b) (common practice)
    T = np.array([[1 - a, a], [b, 1 - b]])
    model = MarkovModel.from_transition_matrix(T, dt=0.5, unit="ns")
    np.testing.assert_allclose(model.equilibrium, [b / (a + b), a / (a + b)], rtol=1e-12)
    np.testing.assert_allclose(model.spectrum(), [1.0, 1 - a - b], rtol=1e-12)
    np.testing.assert_allclose(model.relaxation_times(), [-0.5 / np.log(1 - a - b)], rtol=1e-12)
    assert model.lag == 1 and model.lag_time == 0.5 and model.unit == "ns"
    assert model.reversible and model.transition_counts is None
    assert model.diagnostics == []


def test_two_state_from_data_by_hand():
    # 0 0 1 1 1 0 0 1 at lag 1: C = [[2, 2], [1, 2]] (counted by hand); for two states the
    # reversible and non-reversible MLEs coincide: T = C row-normalized (common practice)
    labels = [np.array([0, 0, 1, 1, 1, 0, 0, 1])]
    for reversible in (True, False):
        model = quiet(build_model, labels, 1, dt=0.1, unit="ns", reversible=reversible)
        np.testing.assert_allclose(model.propagator, [[0.5, 0.5], [1 / 3, 2 / 3]], rtol=1e-12)
        np.testing.assert_allclose(model.equilibrium, [0.4, 0.6], rtol=1e-12)
        a, b = 0.5, 1 / 3
        np.testing.assert_allclose(model.relaxation_times(), [-0.1 / np.log(1 - a - b)], rtol=1e-12)


# --------------------------------------------------------------------------- sampled chains

def test_sampled_reversible_chain_recovers_T_pi_and_timescales(sample_chain, reversible_chain,
                                                                stationary_ref, timescale_sigma):
    T = reversible_chain
    n_runs, n_steps = 100, 2000
    runs = sample_chain(T, n_steps, n_runs=n_runs, seed=2)
    N = n_runs * n_steps
    pi_true = stationary_ref(T)
    lam2 = np.sort(la.eigvals(T).real)[-2]
    for lag in (1, 3):
        model = build_model(runs, lag, dt=0.2, unit="ps")
        Tl = np.linalg.matrix_power(T, lag)
        counts_out = np.asarray(model.transition_counts.sum(axis=1)).ravel()
        # (1) T: multinomial rows; the sliding window at lag L holds L interleaved chains, so count
        # conservatively with n_i / L independent transitions; 5 standard errors per entry
        sigma_T = np.sqrt(Tl * (1 - Tl) / (counts_out[:, None] / lag))
        assert np.all(np.abs(model.propagator - Tl) <= 5 * sigma_T)
        # (2) pi: a time average over a reversible chain has variance at most
        # pi_i (1 - pi_i) / N * (1 + lambda_2) / (1 - lambda_2) (spectral-gap bound, common
        # practice); 5 of those standard errors
        sigma_pi = np.sqrt(pi_true * (1 - pi_true) / N * (1 + lam2) / (1 - lam2))
        assert np.all(np.abs(model.equilibrium - pi_true) <= 5 * sigma_pi)
        # (3) timescales against scipy.linalg.eig of the true matrix: the same at every lag for a
        # Markov chain; 5 first-order standard errors (conftest.timescale_sigma)
        expected = ref_timescales(T, 1, 0.2)
        got = model.relaxation_times(2)
        for k in (1, 2):
            _, t_lag, sigma_t = timescale_sigma(Tl, counts_out / lag, lag, 0.2, which=k)
            np.testing.assert_allclose(t_lag, expected[k - 1], rtol=1e-9)  # same process at every lag
            assert abs(got[k - 1] - expected[k - 1]) <= 5 * sigma_t, (lag, k, got, expected, sigma_t)


def rate_matrix():
    """A reversible 3-state rate matrix: K_ij = S_ij / pi_i with S symmetric (detailed balance
    pi_i K_ij = pi_j K_ji), rows summing to zero. Units: 1/ps."""
    pi = np.array([0.5, 0.3, 0.2])
    S = np.zeros((3, 3))
    S[0, 1] = S[1, 0] = 0.002
    S[1, 2] = S[2, 1] = 0.01
    S[0, 2] = S[2, 0] = 0.0005
    K = S / pi[:, None]
    return K - np.diag(K.sum(axis=1))


def test_rate_matrix_exact_timescales_at_every_lag():
    # T(tau) = expm(K tau) has eigenvalues exp(lambda_K tau): timescales -1/lambda(K) at every lag
    # (scipy.linalg.expm, scipy.linalg.eigvals; common practice)
    K = rate_matrix()
    lam = np.sort(la.eigvals(K).real)[::-1][1:]
    expected = -1.0 / lam
    dt = 0.5
    for lag in (1, 4, 16, 64):
        # (at lag 64 the 11.4 ps process is faster than the 32 ps lag: flagged, rightly)
        model = quiet(MarkovModel.from_transition_matrix, la.expm(K * lag * dt), dt=lag * dt, unit="ps")
        np.testing.assert_allclose(model.relaxation_times(), expected, rtol=1e-9)
        np.testing.assert_allclose(model.equilibrium, [0.5, 0.3, 0.2], rtol=1e-10)
        assert model.reversible


def test_rate_matrix_sampled_timescales_independent_of_lag(sample_chain, timescale_sigma):
    K = rate_matrix()
    dt = 1.0
    expected = -1.0 / np.sort(la.eigvals(K).real)[::-1][1:]  # about 101 and 11.4 ps
    runs = sample_chain(la.expm(K * dt), 1500, n_runs=150, seed=5)
    for lag in (1, 4, 16):
        model = quiet(build_model, runs, lag, dt=dt, unit="ps")  # lag 16 > 11.4 ps: flagged, rightly
        got = model.relaxation_times(2)
        counts_out = np.asarray(model.transition_counts.sum(axis=1)).ravel()
        for k in (1, 2):
            # 5 first-order standard errors with n_i / lag independent counts (conservative)
            _, t_true, sigma_t = timescale_sigma(la.expm(K * lag * dt), counts_out / lag, lag, dt, which=k)
            np.testing.assert_allclose(t_true, expected[k - 1], rtol=1e-9)
            assert abs(got[k - 1] - expected[k - 1]) <= 5 * sigma_t, (lag, k, got, expected, sigma_t)


# --------------------------------------------------------------------------- double well

BARRIER = 5.0  # Delta V in units of kT (kT = 1); Kramers' formula needs Delta V >~ 5 kT


def double_well(x):
    """V(x) = Delta V (x^2 - 1)^2: minima at +-1 (V'' = 8 Delta V), barrier at 0 (V'' = -4 Delta V)."""
    return BARRIER * (x * x - 1.0) ** 2


def smoluchowski_reference(n_cells, half_width=2.5):
    """Symmetrized generator of overdamped diffusion (D = kT/gamma = 1) on a fine grid.

    Finite volumes with Scharfetter-Gummel fluxes: the hop rate from cell i to the neighbouring cell j is
    D/h^2 * B(V_j - V_i) with the Bernoulli function B(z) = z / (e^z - 1), which obeys detailed
    balance with exp(-V) exactly and tends to the Smoluchowski operator as h -> 0. Returns cell
    centers, the diagonal and off-diagonal of the symmetrized (tridiagonal) generator, and the
    Boltzmann weights of the cells.
    """
    edges = np.linspace(-half_width, half_width, n_cells + 1)
    x = 0.5 * (edges[1:] + edges[:-1])
    h = x[1] - x[0]
    dv = np.diff(double_well(x))
    safe = np.where(dv == 0, 1.0, dv)

    def bernoulli(z):
        zs = np.where(z == 0, 1.0, z)
        return np.where(z == 0, 1.0, zs / np.expm1(zs))

    up, down = bernoulli(safe * (dv != 0)) / h ** 2, bernoulli(-safe * (dv != 0)) / h ** 2
    diag = np.zeros(n_cells)
    diag[:-1] -= up
    diag[1:] -= down
    off = np.sqrt(up * down)  # Pi^1/2 Q Pi^-1/2 is symmetric because pi_i up_i = pi_{i+1} down_i
    weights = np.exp(-double_well(x))
    return x, diag, off, weights / weights.sum()


def reference_relaxation_rate(n_cells):
    x, diag, off, _ = smoluchowski_reference(n_cells)
    w = la.eigh_tridiagonal(diag, off, eigvals_only=True, select="i", select_range=(n_cells - 2, n_cells - 1))
    return -w[0]  # the slowest non-zero relaxation rate (w[1] is the stationary 0)


def simulate_double_well(n_walkers, total_time, dt, save_every, seed):
    """Euler-Maruyama for dx = -V'(x) dt + sqrt(2) dW (gamma = kT = 1), vectorised over walkers
    that start from the Boltzmann distribution (inverse CDF on a fine grid)."""
    rng = np.random.default_rng(seed)
    grid = np.linspace(-2.5, 2.5, 20001)
    cdf = np.cumsum(np.exp(-double_well(grid)))
    x = np.interp(rng.random(n_walkers), cdf / cdf[-1], grid)
    n_frames = int(round(total_time / (dt * save_every)))
    frames = np.empty((n_frames, n_walkers))
    kick = np.sqrt(2.0 * dt)
    drift = 4.0 * BARRIER * dt
    for f in range(n_frames):
        noise = rng.standard_normal((save_every, n_walkers))
        noise *= kick
        for s in range(save_every):
            x = x - drift * x * (x * x - 1.0) + noise[s]
        frames[f] = x
    return frames.T


def core_transitions(paths, core=0.8):
    """Number of transitions between the cores x < -core and x > core (recrossings ignored)."""
    n = 0
    for p in paths:
        side = np.where(p > core, 1, np.where(p < -core, -1, 0))
        side = side[side != 0]
        n += int(np.count_nonzero(np.diff(side)))
    return n


def test_double_well_slowest_timescale():  # about 3 s: under the 5 s mark for 'slow'
    # reference: the slowest relaxation rate of the Smoluchowski operator on a fine grid
    rate = reference_relaxation_rate(2000)
    assert abs(reference_relaxation_rate(1000) / rate - 1) < 1e-4  # grid converged
    # Kramers (overdamped): k = omega_min omega_max / (2 pi gamma) exp(-Delta V / kT), relaxation
    # rate 2k for the symmetric well (Kramers 1940; Hanggi et al. 1990). Its corrections are of
    # relative order kT / Delta V = 0.2, which bounds the agreement we may ask for.
    omega_min, omega_max = np.sqrt(8 * BARRIER), np.sqrt(4 * BARRIER)
    kramers = 2 * omega_min * omega_max / (2 * np.pi) * np.exp(-BARRIER)
    assert abs(kramers / rate - 1) < 1.0 / BARRIER
    t_ref = 1.0 / rate  # about 18.0 time units

    # the binning: 40 bins of width 0.1 on [-2, 2] (two more outside, never visited);
    # frames every 0.05, lag 10 frames = 0.5 time units (about 20 intra-well relaxation times
    # 1/V''(min) = 0.025, and 1/36 of t_ref)
    edges = np.linspace(-2.0, 2.0, 41)
    frame_dt, lag = 0.05, 10
    # Markovian regime: the exact model of these bins at this lag, from the reference operator
    # (flows pi_i expm(Q tau)_ij summed over bins), must already give t_ref within 1 %
    x, diag, off, weights = smoluchowski_reference(400)  # 8 cells per bin, nested exactly
    w, U = la.eigh_tridiagonal(diag, off)
    s = np.sqrt(weights)
    member = np.zeros((edges.size + 1, x.size))
    member[np.digitize(x, edges), np.arange(x.size)] = 1.0
    flows = (member * s) @ ((U * np.exp(w * lag * frame_dt)) @ U.T) @ (member * s).T
    keep = flows.sum(axis=1) > 1e-300
    T_bins = flows[np.ix_(keep, keep)] / flows[np.ix_(keep, keep)].sum(axis=1, keepdims=True)
    t_bins = -lag * frame_dt / np.log(np.sort(np.abs(la.eigvals(T_bins)))[-2])
    projection_error = abs(t_bins / t_ref - 1)
    assert projection_error < 0.01

    # simulation: 1500 walkers x 40 time units (about 2.2 t_ref each), dt = 2e-3 (dt V''(min) = 0.08)
    start = time.perf_counter()
    paths = simulate_double_well(1500, 40.0, 2e-3, 25, seed=7)
    labels = [np.digitize(p, edges).astype(np.int32) for p in paths]
    model = quiet(build_model, labels, lag, dt=frame_dt, unit="t")  # fast bin-to-bin modes: flagged
    elapsed = time.perf_counter() - start
    t_msm = model.relaxation_times(1)[0]
    # statistical error: a rate measured from n independent barrier crossings has relative
    # standard error 1/sqrt(n) (Poisson counting, common practice); allow 4 of those, plus the
    # projection error above, plus 2 % for the Euler-Maruyama time step (weak order 1: halving dt
    # twice moved the timescale by less than its 2 % statistical error when this test was set up)
    n_cross = core_transitions(paths)
    assert n_cross > 1000
    tol = 4 / np.sqrt(n_cross) + projection_error + 0.02
    print(f"double well: t_ref {t_ref:.4g}, Kramers {1 / kramers:.4g}, MSM {t_msm:.4g}, tol {tol:.3g}, "
          f"{n_cross} crossings, projection error {projection_error:.2g}, {elapsed:.2f} s")
    assert abs(t_msm / t_ref - 1) <= tol, (t_msm, t_ref, tol, n_cross)
    # and against Kramers, within its own accuracy on top of the statistical one
    assert abs(t_msm * kramers - 1) <= tol + 1.0 / BARRIER


# --------------------------------------------------------------------------- labels and states

def test_sparse_labels_are_reported_by_original_label(sample_chain, reversible_chain):
    dense = sample_chain(reversible_chain, 400, n_runs=20, seed=3)
    names = np.array([3, 7, 42])
    sparse = [names[r] for r in dense]
    m_dense = build_model(dense, 2, dt=1.0)
    m_sparse = build_model(sparse, 2, dt=1.0)
    assert m_sparse.states.tolist() == [3, 7, 42]
    assert m_sparse.n_states == 3 and m_sparse.dropped_states.size == 0 and m_sparse.kept_fraction == 1.0
    np.testing.assert_array_equal(m_sparse.propagator, m_dense.propagator)
    np.testing.assert_array_equal(m_sparse.equilibrium, m_dense.equilibrium)
    assert m_sparse.populations()["state"].tolist() == [3, 7, 42]
    assert m_sparse.index_of([42, 3]).tolist() == [0, 2]
    with pytest.raises(InputError, match=r"label\(s\) 1 that are not in the model's kept set"):
        m_sparse.index_of([1])
    # row 7 -> column 42 of the model is the count 7 -> 42 over all counts out of 7 (non-reversible)
    m_nr = build_model(sparse, 1, reversible=False)
    pairs = np.concatenate([np.stack([r[:-1], r[1:]]) for r in sparse], axis=1)
    out7 = pairs[0] == 7
    expected = np.count_nonzero(out7 & (pairs[1] == 42)) / np.count_nonzero(out7)
    assert m_nr.propagator[1, 2] == pytest.approx(expected, rel=1e-14)


def test_dropped_state_reported_with_its_share_and_warned():
    run = np.array([0, 1, 1, 0, 2, 2, 1, 0] * 5 + [9])  # 9 is entered once and never left
    total = run.size - 1
    with pytest.warns(DiagnosticWarning) as record:
        model = build_model(run, 1)
    assert model.states.tolist() == [0, 1, 2]
    assert model.dropped_states.tolist() == [9]
    assert model.kept_fraction == pytest.approx((total - 1) / total, rel=1e-14)
    line = next(d for d in model.diagnostics if "dropped" in d)
    assert "states 9" in line and f"{100 / total:.3g}% of the transition counts" in line
    # every diagnostic is issued as a DiagnosticWarning, and every warning is a diagnostic
    assert sorted(str(w.message) for w in record if w.category is DiagnosticWarning) == sorted(model.diagnostics)


def test_few_transitions_warned_by_label():
    # counted by hand: the run leaves 5 once (5 -> 8) and 8 once (8 -> 5); staying does not count
    run = np.array([5, 5, 5, 5, 5, 5, 5, 5, 5, 5, 5, 5, 8, 8, 5, 5, 5, 5, 5, 5, 5, 5, 5, 5, 5])
    with pytest.warns(DiagnosticWarning, match=r"2 state\(s\) are left for another state fewer than 10 times "
                                               r"\(states 5, 8;"):
        build_model(run, 1)


def test_state_changes_count_only_changes_between_distinct_states():
    # the crossings of the slow process are the counts between the two sign sides of its eigenvector
    run = np.array([0, 0, 0, 1, 1, 0, 2, 2, 2, 2, 1, 1, 0])
    model = quiet(build_model, run, 1)
    per_state, crossings = model.state_changes()
    # by hand: 0->1, 0->2 (0 left twice); 1->0, 1->0 (twice); 2->1 (once)
    np.testing.assert_array_equal(per_state, [2, 2, 1])
    C = model.transition_counts.toarray()
    side = np.real(model.modes(2)[:, 1]) > 0
    assert crossings == C[np.ix_(side, ~side)].sum() + C[np.ix_(~side, side)].sum()
    # sliding windows at lag 2 see each change about twice: divided by the lag
    lag2 = quiet(build_model, run, 2)
    C2 = lag2.transition_counts.toarray()
    np.testing.assert_allclose(lag2.state_changes()[0], (C2.sum(axis=1) - np.diag(C2)) / 2)
    assert MarkovModel.from_transition_matrix([[0.9, 0.1], [0.2, 0.8]]).state_changes() == (None, None)


def test_model_on_three_state_changes_says_the_sampling_cannot_support_it():
    # 200 frames, 3 changes: plenty of self-transitions (the old rule saw no problem), but the
    # slow process is crossed 3 times only (counted by hand)
    run = np.repeat([0, 1, 0, 1], 50)
    model = quiet(build_model, run, 1)
    assert np.asarray(model.transition_counts.sum(axis=1)).ravel().min() >= 10  # what the old rule counted
    per_state, crossings = model.state_changes()
    np.testing.assert_array_equal(per_state, [2, 1])
    assert crossings == 3
    line = next(d for d in model.diagnostics if d.startswith("The sampling cannot support this model"))
    assert "only 3 time(s)" in line and "Chapman–Kolmogorov" in line
    assert any("2 state(s) are left for another state fewer than 10 times" in d for d in model.diagnostics)


def test_nonreversible_cyclic_data_flags_complex_eigenvalues(sample_chain):
    T = np.array([[0.8, 0.15, 0.05], [0.05, 0.8, 0.15], [0.15, 0.05, 0.8]])
    runs = sample_chain(T, 3000, n_runs=10, seed=4)
    with pytest.warns(DiagnosticWarning, match=r"complex"):
        model = build_model(runs, 1, reversible=False)
    C = model.transition_counts.toarray()
    np.testing.assert_allclose(model.propagator, C / C.sum(axis=1, keepdims=True), rtol=1e-14)
    assert np.iscomplexobj(model.spectrum())
    assert not model.reversible
    # the reversible estimate of the same data has a real spectrum and no such finding
    rev = quiet(build_model, runs, 1, reversible=True)
    assert np.isrealobj(rev.spectrum())
    assert not any("complex" in d for d in rev.diagnostics)


def test_alternating_data_is_flagged_periodic():
    # 0 1 0 1 ...: T = [[0, 1], [1, 0]] at lag 1, eigenvalue -1 (Perron-Frobenius, common practice)
    with pytest.warns(DiagnosticWarning) as record:
        model = build_model(np.tile([0, 1], 50), 1)
    np.testing.assert_array_equal(model.propagator, [[0.0, 1.0], [1.0, 0.0]])
    assert model.spectrum()[0] == pytest.approx(1.0) and model.spectrum()[1] == pytest.approx(-1.0)
    assert any(str(w.message).startswith("Periodic chain") for w in record)


def test_clean_model_issues_no_warning(sample_chain, reversible_chain):
    runs = sample_chain(reversible_chain, 500, n_runs=20, seed=8)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        model = build_model(runs, 1, dt=0.1, unit="ns")
    assert model.diagnostics == []
    assert model.estimation.converged


# --------------------------------------------------------------------------- populations

def test_populations_table_and_free_energies(sample_chain, reversible_chain):
    model = quiet(build_model, sample_chain(reversible_chain, 300, n_runs=10, seed=1), 1)
    p = model.equilibrium
    df = model.populations()
    assert isinstance(df, pd.DataFrame)
    assert list(df.columns) == ["state", "population", "free_energy_kT", "transitions_out"]
    np.testing.assert_allclose(df["population"], p, rtol=0, atol=0)
    np.testing.assert_allclose(df["free_energy_kT"], -np.log(p / p.max()), rtol=1e-12, atol=1e-15)
    assert df["free_energy_kT"].min() == 0.0
    np.testing.assert_array_equal(df["transitions_out"], np.asarray(model.transition_counts.sum(axis=1)).ravel())
    df300 = model.populations(temperature=300)
    assert list(df300.columns) == ["state", "population", "free_energy_kT", "free_energy_kJ_per_mol",
                                   "transitions_out"]
    kT = R_J_PER_MOL_K * 300 / 1000  # kJ/mol; 2.494 kJ/mol at 300 K (CODATA gas constant 8.314462618 J/(mol K))
    assert kT == pytest.approx(2.494, abs=5e-4)
    np.testing.assert_allclose(df300["free_energy_kJ_per_mol"], df300["free_energy_kT"] * kT, rtol=1e-12)
    # a model without counts has no transitions_out column
    assert "transitions_out" not in MarkovModel.from_transition_matrix([[0.9, 0.1], [0.05, 0.95]]).populations()


@pytest.mark.parametrize("temperature", [0, -5.0, np.nan, np.inf, "300", True])
def test_bad_temperature(temperature):
    model = MarkovModel.from_transition_matrix([[0.9, 0.1], [0.05, 0.95]])
    with pytest.raises(InputError, match=r"temperature must be a positive number in kelvin"):
        model.populations(temperature=temperature)


# --------------------------------------------------------------------------- from_transition_matrix

def test_from_transition_matrix_states_and_vectors():
    X = np.array([[6.0, 1, 1], [1, 4, 2], [1, 2, 3]])
    T = X / X.sum(axis=1, keepdims=True)
    model = quiet(MarkovModel.from_transition_matrix, T, dt=2.0, unit="ps", states=[10, 20, 30])
    assert model.states.tolist() == [10, 20, 30]
    np.testing.assert_allclose(model.equilibrium, X.sum(axis=1) / X.sum(), rtol=1e-12)
    w = model.spectrum()
    np.testing.assert_allclose(w, np.sort(la.eigvals(T).real)[::-1], atol=1e-12)
    assert model.spectrum(2).shape == (2,) and model.relaxation_times(1).shape == (1,)
    R = model.modes()
    np.testing.assert_allclose(T @ R, R * w[None, :], atol=1e-12)
    np.testing.assert_allclose(model.relaxation_times(), -2.0 / np.log(np.abs(w[1:])), rtol=1e-12)
    assert "3 states" in repr(model) and "ps" in repr(model)


def test_from_transition_matrix_periodic_is_flagged():
    with pytest.warns(DiagnosticWarning) as record:
        model = MarkovModel.from_transition_matrix([[0.0, 1.0], [1.0, 0.0]])
    assert model.spectrum()[0] == pytest.approx(1.0)
    assert any(d.startswith("Periodic chain") for d in model.diagnostics)
    assert sorted(str(w.message) for w in record) == sorted(model.diagnostics)


@pytest.mark.parametrize("T, kw, message", [
    ([[0.5, 0.4], [0.2, 0.8]], {}, r"must be row-stochastic \(every row sums to 1\), but row 0 sums to 0\.9"),
    ([[1.2, -0.2], [0.2, 0.8]], {}, r"must be non-negative, but propagator\[0, 1\] = -0\.2"),
    ([[np.nan, 1.0], [0.2, 0.8]], {}, r"holds NaN or infinite entries"),
    ([[0.5, 0.5, 0.0]], {}, r"square \(n x n\) transition matrix with n >= 1, but has shape \(1, 3\)"),
    ([[1.0, 0.0], [0.0, 1.0]], {}, r"irreducible .* splits into 2 communicating classes"),
    ([["a"]], {}, r"must be a square row-stochastic matrix of numbers"),
    ([[0.5, 0.5], [0.2, 0.8]], {"states": [1, 1]}, r"states must be 2 distinct integer labels"),
    ([[0.5, 0.5], [0.2, 0.8]], {"states": [1.5, 2]}, r"states must be 2 distinct integer labels"),
    ([[0.5, 0.5], [0.2, 0.8]], {"dt": 0}, r"dt \(time between frames\) must be a finite positive number"),
    ([[0.5, 0.5], [0.2, 0.8]], {"unit": ""}, r"unit must be a non-empty string"),
])
def test_from_transition_matrix_bad_input(T, kw, message):
    with pytest.raises(InputError, match=message):
        MarkovModel.from_transition_matrix(T, **kw)


# --------------------------------------------------------------------------- provenance

def test_metadata_records_parameters_and_fingerprint():
    runs = [np.array([0, 1, 1, 0, 1, 0, 0, 1] * 4), np.array([1, 0, 0, 1, 1])]
    model = quiet(build_model, runs, 2, dt=0.1, unit="ns", every_frame=False)
    meta = model.metadata
    assert meta["parameters"] == {"lag": 2, "dt": 0.1, "unit": "ns", "reversible": True, "every_frame": False,
                                  "n_states": 2}
    assert meta["frames_per_run"] == [32, 5]
    assert meta["package_version"] == mk.__version__
    assert len(meta["labels_sha256"]) == 64
    other = quiet(build_model, [runs[0], runs[1][::-1]], 2, dt=0.1, unit="ns", every_frame=False)
    assert other.metadata["labels_sha256"] != meta["labels_sha256"]
    # strided counting at lag 2 (by hand for the second run: pairs (1,0) and (0,1))
    expected = mk.count_transitions(runs, 2, every_frame=False).toarray()
    np.testing.assert_array_equal(model.transition_counts.toarray(), expected)


def test_macrostate_population_intervals_cover_the_truth(sample_chain, stationary_ref):
    # Two blocks of two states, weakly coupled: the true macrostate populations are sums of the
    # stationary distribution (scipy.linalg.eig) over each block. The bootstrap interval over
    # runs (Efron 1979) must cover them, and the point estimate must lie inside its interval.
    T = np.array([[0.90, 0.09, 0.01, 0.00],
                  [0.06, 0.93, 0.00, 0.01],
                  [0.02, 0.00, 0.88, 0.10],
                  [0.00, 0.02, 0.08, 0.90]])
    pi = stationary_ref(T)
    runs = sample_chain(T, 2000, n_runs=30, seed=4)
    model = mk.build_model(runs, 1)
    macro = model.find_macrostates(2, labels=runs, n_samples=60, seed=0)
    table = macro.populations()
    for row in table.itertuples():
        block = list(row.states)
        assert sorted(block) in ([0, 1], [2, 3])
        truth = pi[block].sum()
        assert row.population_lower <= truth <= row.population_upper
        assert row.population_lower <= row.population <= row.population_upper
    with pytest.warns(mk.DiagnosticWarning, match="too few"):
        samples = mk.sample_models(model, runs, n_samples=5, seed=1).populations()
    assert len(samples) == 4 and samples.attrs["n_samples"] == 5
    with pytest.raises(mk.InputError, match="needs labels="):
        model.find_macrostates(2, n_samples=10)


def test_splitting_probability_backward_in_time_on_a_model():
    # For a reversible chain the committor backward in time is 1 - the forward one
    # (E & Vanden-Eijnden, J. Stat. Phys. 123, 503 (2006)).
    T = np.array([[0.90, 0.09, 0.01, 0.00],
                  [0.09, 0.90, 0.00, 0.01],
                  [0.01, 0.00, 0.90, 0.09],
                  [0.00, 0.01, 0.09, 0.90]])
    model = MarkovModel.from_transition_matrix(T, dt=1.0, unit="ps")
    forward = model.splitting_probability([0], [3])
    backward = model.splitting_probability([0], [3], reverse_time=True)
    np.testing.assert_allclose(backward, 1 - forward, atol=1e-12)


def test_passage_times_are_said_to_be_at_lag_resolution(sample_chain, reversible_chain):
    # The model at lag tau of a Markov chain is T^tau (Chapman–Kolmogorov, common practice): its
    # first-passage time 0 -> 2 only sees multiples of tau and comes out longer than the exact
    # one of T at lag 1 (numpy.linalg.solve of (I - T_cc) m = 1, Kemeny & Snell 1960).
    T = reversible_chain
    exact = np.linalg.solve(np.eye(2) - T[:2, :2], np.ones(2))[0]
    coarse = MarkovModel.from_transition_matrix(np.linalg.matrix_power(T, 20), dt=20.0)
    assert coarse.passage_time([0], [2]) > exact + 10  # more than half a lag too long
    for doc in (mk.mean_passage_time.__doc__, mk.passage_time_matrix.__doc__, MarkovModel.passage_time.__doc__):
        assert "lag resolution" in doc
    # the table says it in its caption, with the resolution
    runs = sample_chain(T, 2000, n_runs=10, seed=8)
    model = quiet(build_model, runs, 4, dt=0.5, unit="ns")
    table = model.find_macrostates(2).passage_time_table()
    assert table.attrs["resolution"] == 2.0 and table.attrs["unit"] == "ns"
    assert "computed at lag resolution (2 ns)" in table.attrs["caption"]
    # and the diagnostics say it when the lag is not small against the slowest timescale
    slowest = model.relaxation_times(1)[0]
    coarse_lag = int(np.ceil(0.15 * slowest / 0.5))
    far = quiet(build_model, runs, coarse_lag, dt=0.5, unit="ns")
    assert any("computed at lag resolution" in d for d in far.diagnostics)
    assert not any("lag resolution" in d for d in quiet(build_model, runs, 1, dt=0.5, unit="ns").diagnostics)
