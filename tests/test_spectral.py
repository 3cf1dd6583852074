"""Tests of msmkit.spectral: stationary distribution, eigen-analysis, implied timescales and the
plain-language diagnostics of a chain.

External references: scipy.linalg.eig (a general-purpose reference library); the closed form of
the two-state chain (common practice); Perron-Frobenius facts for stochastic matrices (common
practice); implied timescales t = -tau / ln|lambda| (Swope, Pitera & Suits, J. Phys. Chem. B
108, 6571 (2004)).
"""
import numpy as np
import pytest
import scipy.linalg as la
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from msmkit.spectral import (FEW_COUNTS, chain_diagnostics, eigen_decomposition, implied_timescales,
                             obeys_detailed_balance, equilibrium_distribution)


# --------------------------------------------------------------------------- strategies

@st.composite
def stochastic_matrices(draw, reversible=False, max_n=8):
    """Irreducible, aperiodic row-stochastic matrices (a cycle plus self-loops keeps them so)."""
    n = draw(st.integers(2, max_n))
    rng = np.random.default_rng(draw(st.integers(0, 2 ** 32 - 1)))
    X = rng.random((n, n)) * (rng.random((n, n)) < draw(st.floats(0.2, 1.0)))
    X[np.arange(n), (np.arange(n) + 1) % n] += 0.3
    X[np.arange(n), np.arange(n)] += 0.05
    if reversible:
        X = X + X.T  # symmetric flows: T = X / rowsum satisfies detailed balance (common practice)
    return X / X.sum(axis=1, keepdims=True)


def ref_eigenvalues(T):
    """scipy.linalg.eigvals sorted by magnitude, largest first."""
    w = la.eigvals(T)
    return w[np.argsort(-np.abs(w), kind="stable")]


def ref_stationary(T):
    """Left eigenvector for eigenvalue 1 (scipy.linalg.eig)."""
    w, vl = la.eig(T, left=True, right=False)
    p = np.real(vl[:, np.argmin(np.abs(w - 1))])
    return p / p.sum()


# --------------------------------------------------------------------------- two-state chain

@pytest.mark.parametrize("a, b", [(0.1, 0.3), (0.01, 0.002), (0.6, 0.7), (0.5, 0.5)])
def test_two_state_closed_form(a, b):
    # T = [[1-a, a], [b, 1-b]]: eigenvalues 1 and 1-a-b, stationary (b, a)/(a+b),
    # implied timescale -tau/ln|1-a-b| (linear algebra, common practice)
    T = np.array([[1 - a, a], [b, 1 - b]])
    np.testing.assert_allclose(equilibrium_distribution(T), [b / (a + b), a / (a + b)], rtol=1e-12)
    w = eigen_decomposition(T)
    np.testing.assert_allclose(w, [1.0, 1 - a - b], atol=1e-14)
    lag, dt = 3, 0.2
    ts = implied_timescales(w[1:], lag, dt)
    if a + b == 1.0:
        assert ts[0] == 0.0  # eigenvalue 0: the chain forgets in one step
    else:
        np.testing.assert_allclose(ts, [-lag * dt / np.log(abs(1 - a - b))], rtol=1e-12)


# --------------------------------------------------------------------------- against scipy

@settings(max_examples=40, deadline=None)
@given(T=stochastic_matrices())
def test_stationary_matches_scipy_left_eigenvector(T):
    pi = equilibrium_distribution(T)
    np.testing.assert_allclose(pi, ref_stationary(T), rtol=1e-8, atol=1e-13)
    np.testing.assert_allclose(pi @ T, pi, atol=1e-13)
    assert abs(pi.sum() - 1) < 1e-13


@settings(max_examples=40, deadline=None)
@given(T=stochastic_matrices())
def test_general_spectrum_matches_scipy(T):
    w = eigen_decomposition(T, reversible=False)
    ref = ref_eigenvalues(T)
    # Perron-Frobenius (common practice): eigenvalue 1 first, none larger in magnitude
    assert abs(w[0] - 1) < 1e-10
    assert np.all(np.abs(w) <= 1 + 1e-10)
    np.testing.assert_allclose(np.abs(w), np.abs(ref), atol=1e-9)
    # same multiset of eigenvalues (every reference eigenvalue is matched)
    for z in ref:
        assert np.min(np.abs(w - z)) < 1e-7
    wv, V = eigen_decomposition(T, reversible=False, vectors=True)
    np.testing.assert_allclose(T @ V, V * wv[None, :], atol=1e-9)


@settings(max_examples=40, deadline=None)
@given(T=stochastic_matrices(reversible=True))
def test_reversible_spectrum_matches_scipy(T):
    pi = ref_stationary(T)
    assert obeys_detailed_balance(T, pi)
    w, R = eigen_decomposition(T, pi, vectors=True)
    assert np.isrealobj(w) and np.isrealobj(R)
    np.testing.assert_allclose(w, np.real(ref_eigenvalues(T)), atol=1e-10)
    # right eigenvectors: T r = lambda r, normalized sum_i pi_i r_i^2 = 1, pi-orthogonal
    np.testing.assert_allclose(T @ R, R * w[None, :], atol=1e-9)
    np.testing.assert_allclose(R.T @ (pi[:, None] * R), np.eye(T.shape[0]), atol=1e-8)
    # the first right eigenvector of a stochastic matrix is constant
    np.testing.assert_allclose(np.abs(R[:, 0]), 1.0, rtol=1e-9)
    # k limits the count
    assert eigen_decomposition(T, pi, k=2).shape == (2,)


@settings(max_examples=30, deadline=None)
@given(T=stochastic_matrices())
def test_powers_converge_to_stationary(T):
    # an irreducible aperiodic chain has T^n -> 1 pi^T (Perron-Frobenius, common practice)
    P = np.linalg.matrix_power(T, 4000)
    w = eigen_decomposition(T, reversible=False)
    if abs(w[1]) ** 4000 < 1e-12:
        np.testing.assert_allclose(P, np.outer(np.ones(len(T)), equilibrium_distribution(T)), atol=1e-9)


def test_is_reversible():
    T = np.array([[0.8, 0.15, 0.05], [0.05, 0.8, 0.15], [0.15, 0.05, 0.8]])  # cyclic drift
    assert not obeys_detailed_balance(T, np.full(3, 1 / 3))
    X = np.array([[4.0, 1, 2], [1, 3, 0.5], [2, 0.5, 1]])
    T = X / X.sum(axis=1, keepdims=True)
    assert obeys_detailed_balance(T, X.sum(axis=1) / X.sum())


# --------------------------------------------------------------------------- implied timescales

def test_implied_timescales_formula_and_edge_cases():
    w = np.array([1.0, 0.9, -0.5, 0.0, 1.2])
    ts = implied_timescales(w, lag=4, dt=0.5)
    assert ts[0] == np.inf  # stationary
    np.testing.assert_allclose(ts[1], -2.0 / np.log(0.9), rtol=1e-14)
    np.testing.assert_allclose(ts[2], -2.0 / np.log(0.5), rtol=1e-14)  # uses |lambda|
    assert ts[3] == 0.0 and ts[4] == np.inf
    # complex eigenvalue: |lambda|
    np.testing.assert_allclose(implied_timescales(np.array([0.6 + 0.8j * 0.5]), 1, 1.0),
                               [-1 / np.log(abs(0.6 + 0.4j))], rtol=1e-14)


# --------------------------------------------------------------------------- diagnostics

def _diag(T, **kw):
    args = dict(lag=1, dt=1.0, unit="ns")
    args.update(kw)
    return chain_diagnostics(eigen_decomposition(np.asarray(T, float)), **args)


def test_periodic_chain_is_flagged():
    # [[0,1],[1,0]] has eigenvalue -1 and never converges (Perron-Frobenius, common practice)
    T = np.array([[0.0, 1.0], [1.0, 0.0]])
    w = eigen_decomposition(T)
    assert w[0] == pytest.approx(1.0) and w[1] == pytest.approx(-1.0)
    found = _diag(T)
    assert any(line.startswith("Periodic chain") for line in found), found
    assert not any("More than one eigenvalue equals 1" in line for line in found)


def test_periodic_three_cycle_is_flagged():
    T = np.roll(np.eye(3), 1, axis=1)  # eigenvalues: the cube roots of unity
    w = eigen_decomposition(T)
    assert w[0] == pytest.approx(1.0)
    found = _diag(T)
    assert any(line.startswith("Periodic chain") for line in found), found


def test_reducible_chain_is_flagged():
    # a reducible chain has more than one eigenvalue 1 (Perron-Frobenius, common practice)
    T = la.block_diag([[0.9, 0.1], [0.2, 0.8]], [[0.5, 0.5], [0.3, 0.7]])
    w = eigen_decomposition(T, np.full(4, 0.25), reversible=False)
    found = chain_diagnostics(w, lag=1, dt=1.0, unit="ns")
    assert any("More than one eigenvalue equals 1" in line for line in found), found


def test_complex_eigenvalues_flagged_for_cyclic_drift():
    # a non-reversible cyclic 3-state chain (circulant: eigenvalues a + b w + c w^2, w = e^{2 pi i/3})
    T = np.array([[0.8, 0.15, 0.05], [0.05, 0.8, 0.15], [0.15, 0.05, 0.8]])
    w = eigen_decomposition(T)
    omega = np.exp(2j * np.pi / 3)
    expected = 0.8 + 0.15 * omega + 0.05 * omega ** 2  # circulant eigenvalue (linear algebra)
    assert np.iscomplexobj(w)
    assert np.min(np.abs(w - expected)) < 1e-12 and np.min(np.abs(w - np.conj(expected))) < 1e-12
    found = _diag(T)
    assert any("complex" in line and "not reversible" in line for line in found), found


def test_negative_eigenvalue_flagged():
    T = np.array([[0.2, 0.8], [0.8, 0.2]])  # eigenvalue 1 - 0.8 - 0.8 = -0.6
    found = _diag(T)
    assert any("negative" in line and "-0.6" in line for line in found), found


def test_timescale_shorter_than_lag_flagged():
    # lambda = 0.5 at lag 10, dt 0.1: t = -1/ln 0.5 = 1.44 ns > tau = 1 ns: fine;
    # lambda = 0.2: t = 0.62 ns < 1 ns: flagged
    ok = chain_diagnostics(np.array([1.0, 0.5]), lag=10, dt=0.1, unit="ns")
    assert not any("shorter than the lag" in line for line in ok)
    bad = chain_diagnostics(np.array([1.0, 0.5, 0.2]), lag=10, dt=0.1, unit="ns")
    assert any("1 reported timescale(s) are shorter than the lag time (1 ns)" in line for line in bad), bad


def test_few_count_states_flagged_by_label():
    changes = np.array([500, FEW_COUNTS - 1, 200, 0])
    found = chain_diagnostics(np.array([1.0, 0.9, 0.5, 0.3]), lag=1, dt=1.0, unit="ns", changes=changes,
                              states=np.array([3, 7, 42, 50]))
    line = next(line for line in found if "fewer than" in line)
    assert "2 state(s)" in line and "states 7, 50" in line and "staying in a state does not count" in line


def test_dropped_states_reported_with_share():
    found = chain_diagnostics(np.array([1.0, 0.9]), lag=1, dt=1.0, unit="ns",
                              dropped_states=np.array([4, 9]), kept_fraction=0.875)
    line = next(line for line in found if "dropped" in line)
    assert "2 visited state(s)" in line and "states 4, 9" in line and "12.5% of the transition counts" in line


def test_clean_chain_has_no_findings():
    X = np.array([[900.0, 30, 2], [30, 500, 25], [2, 25, 400]])
    T = X / X.sum(axis=1, keepdims=True)
    assert _diag(T, changes=np.array([1000, 1000, 1000]), crossings=1000.0) == []


def test_leading_eigenvalues_of_a_large_chain_match_the_dense_solver():
    # Above ITERATIVE_MIN_STATES the k leading eigenpairs come from ARPACK; they must equal the
    # dense symmetric solution (scipy.linalg.eigvalsh of D^1/2 T D^-1/2, a reference library).
    from msmkit.spectral import ITERATIVE_MIN_STATES
    n = ITERATIVE_MIN_STATES + 200
    rng = np.random.default_rng(3)
    V = 3 * np.cos(np.linspace(0, 4 * np.pi, n)) + rng.normal(scale=0.3, size=n)
    up = 0.3 * np.minimum(1, np.exp(V[:-1] - V[1:]))      # Metropolis birth-death chain: reversible
    down = 0.3 * np.minimum(1, np.exp(V[1:] - V[:-1]))
    T = np.diag(up, 1) + np.diag(down, -1)
    T[np.arange(n), np.arange(n)] = 1 - T.sum(axis=1)
    pi = np.exp(-V) / np.exp(-V).sum()
    w, v = eigen_decomposition(T, pi, k=5, vectors=True)
    s = np.sqrt(pi)
    ref = np.sort(la.eigvalsh(s[:, None] * T / s[None, :]))[::-1][:5]
    np.testing.assert_allclose(w, ref, rtol=0, atol=1e-10)
    np.testing.assert_allclose(T @ v, v * w, atol=1e-8)   # right eigenvectors


def test_conjugate_gradients_solve_like_a_direct_sparse_solve():
    # An SPD system shaped like a Newton system of the reversible estimate (a weighted graph
    # Laplacian of random links plus a positive diagonal, badly scaled rows) against
    # scipy.sparse.linalg.spsolve (a reference library); a failure is None, never a wrong x.
    import scipy.sparse as sp
    import scipy.sparse.linalg as spla
    from msmkit.spectral import conjugate_gradients
    rng = np.random.default_rng(11)
    n = 1500
    i, j = rng.integers(0, n, 6 * n), rng.integers(0, n, 6 * n)
    W = sp.coo_matrix((rng.uniform(0.1, 10, i.size), (i, j)), shape=(n, n)).tocsr()
    W = W + W.T
    W.setdiag(0)
    W.eliminate_zeros()
    L = sp.diags(np.asarray(W.sum(axis=1)).ravel()) - W + sp.diags(rng.uniform(1e-3, 1e-2, n))
    scale = sp.diags(np.exp(rng.uniform(-5, 5, n)))
    M = (scale @ L @ scale).tocsr()
    b = rng.normal(size=n)
    x = conjugate_gradients(M, b, rtol=1e-12)
    ref = spla.spsolve(M.tocsc(), b)
    np.testing.assert_allclose(x, ref, rtol=1e-8, atol=1e-12 * np.abs(ref).max())
    assert conjugate_gradients(M, b, rtol=1e-12, max_iter=2) is None  # not reached: None
    assert conjugate_gradients(-M, b) is None  # negative diagonal: not positive definite
    np.testing.assert_array_equal(conjugate_gradients(M, np.zeros(n)), np.zeros(n))


@pytest.mark.parametrize("lag, every_frame", [(1, True), (4, True), (4, False)])
def test_state_changes_and_crossings_on_sparse_and_dense_counts(lag, every_frame):
    """Changes out of each state (row sum without the diagonal) and crossings between two sides
    (counts from one side to the other, both directions), divided by the lag for sliding
    windows: by explicit sums over the dense matrix (definition; common practice), for dense
    and scipy.sparse input alike."""
    from msmkit.spectral import changes_out, slow_crossings
    rng = np.random.default_rng(3)
    C = rng.poisson(0.7, (9, 9)).astype(float) * (rng.random((9, 9)) < 0.5)
    side = rng.random(9) < 0.4
    div = lag if every_frame else 1
    want_out = np.array([sum(C[i, j] for j in range(9) if j != i) for i in range(9)]) / div
    want_cross = sum(C[i, j] for i in range(9) for j in range(9) if side[i] != side[j]) / div
    for counts in (C, sp.csr_matrix(C), sp.coo_matrix(C).astype(np.int64)):
        np.testing.assert_allclose(changes_out(counts, lag=lag, every_frame=every_frame), want_out, rtol=1e-12)
        assert slow_crossings(counts, side, lag=lag, every_frame=every_frame) == pytest.approx(want_cross, rel=1e-12)
