"""Tests of msmkit.estimate: the non-reversible and reversible maximum-likelihood estimators.

External references:
- non-reversible MLE T_ij = c_ij / c_i (Prinz et al., J. Chem. Phys. 134, 174105 (2011), Eq. 21);
- reversible MLE: the optimality conditions of the likelihood on symmetric flow matrices X
  (T_ij = x_ij / x_i), d lnL / d x_ij = (c_ij + c_ji)/x_ij - c_i/x_i - c_j/x_j = 0, and the
  self-consistent iteration x_ij <- (c_ij + c_ji) / (c_i/x_i + c_j/x_j) that solves them
  (Bowman, Beauchamp, Boxer & Pande, J. Chem. Phys. 131, 124101 (2009); Prinz et al. 2011,
  Sec. IV.D) -- implemented here independently of the code under test;
- every two-state chain obeys detailed balance, and symmetric counts give a row-normalized
  estimate that is already reversible, so in both cases the reversible and non-reversible MLEs
  coincide (common practice);
- scipy.linalg.eig for the eigenvalue 1 and the stationary vector.
"""
import warnings

import numpy as np
import pytest
import scipy.linalg as la
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from msmkit.counts import count_transitions
from msmkit.errors import DiagnosticWarning, InputError
from msmkit.estimate import EstimationInfo, estimate_transition_matrix, log_likelihood


# --------------------------------------------------------------------------- references

def bowman_iteration(C, n_iter=200_000, tol=1e-15):
    """The plain self-consistent iteration on the flow matrix X (Bowman et al. 2009)."""
    C = np.asarray(C, dtype=float)
    S = C + C.T
    c = C.sum(axis=1)
    X = S / S.sum()
    for _ in range(n_iter):
        x = X.sum(axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            new = np.where(S > 0, S / (c[:, None] / x[:, None] + c[None, :] / x[None, :]), 0.0)
        new /= new.sum()
        if np.max(np.abs(new - X)) < tol * np.max(new):
            X = new
            break
        X = new
    return X / X.sum(axis=1, keepdims=True)


def likelihood_gradient(C, T, pi):
    """Relative gradient of ln L with respect to the symmetric flows x_ij = pi_i T_ij, on the
    pattern of C + C^T: (c_ij + c_ji)/x_ij - c_i/x_i - c_j/x_j, divided by c_i/x_i + c_j/x_j."""
    C = np.asarray(C, dtype=float)
    X = pi[:, None] * T
    x = X.sum(axis=1)
    c = C.sum(axis=1)
    S = C + C.T
    scale = c[:, None] / x[:, None] + c[None, :] / x[None, :]
    on = S > 0
    return ((S[on] / X[on]) - scale[on]) / scale[on]


def ref_stationary(T):
    """The stationary vector of the floating-point matrix T in exact rational arithmetic: the
    Grassmann-Taksar-Heyman state reduction (Grassmann, Taksar & Heyman, Oper. Res. 33, 1107
    (1985)) on fractions.Fraction, rounded once at the end. scipy.linalg.eig's left vector was the
    reference before; on metastable counts the small entries of that vector are off by up to ~1e-7
    relative."""
    from fractions import Fraction

    n = T.shape[0]
    A = [[Fraction(float(v)) for v in row] for row in T]
    for k in range(n - 1, 0, -1):
        out = sum(A[k][:k])
        for i in range(k):
            A[i][k] /= out
        for i in range(k):
            for j in range(k):
                A[i][j] += A[i][k] * A[k][j]
    x = [Fraction(1)]
    for k in range(1, n):
        x.append(sum(x[i] * A[i][k] for i in range(k)))
    total = sum(x)
    return np.array([float(v / total) for v in x])


# --------------------------------------------------------------------------- strategies

@st.composite
def count_matrices(draw, max_n=7, well_conditioned=False, symmetric=False):
    """Strongly connected integer count matrices (a cycle of counts guarantees connectivity)."""
    n = draw(st.integers(2, max_n))
    rng = np.random.default_rng(draw(st.integers(0, 2 ** 32 - 1)))
    if well_conditioned:
        C = rng.integers(5, 60, size=(n, n))
    else:
        high = draw(st.sampled_from([3, 30, 1000, 10 ** 5]))
        density = draw(st.floats(0.1, 1.0))
        C = rng.integers(0, high, size=(n, n)) * (rng.random((n, n)) < density)
        C[np.arange(n), (np.arange(n) + 1) % n] += rng.integers(1, 5, size=n)
    if symmetric:
        C = C + C.T
    return C


# --------------------------------------------------------------------------- properties

@settings(max_examples=50, deadline=None)
@given(C=count_matrices())
def test_reversible_mle_properties(C):
    T, info = estimate_transition_matrix(C, reversible=True, return_info=True)
    n = C.shape[0]
    assert T.shape == (n, n)
    assert np.all(T >= 0)
    np.testing.assert_allclose(T.sum(axis=1), 1.0, rtol=0, atol=1e-12)
    assert info.converged and info.method == "reversible-mle"
    pi = info.equilibrium
    # detailed balance pi_i T_ij = pi_j T_ji, ~1e-12 relative to the largest flow
    X = pi[:, None] * T
    assert np.max(np.abs(X - X.T)) <= 1e-12 * X.max()
    # the reported pi is the stationary vector of T (exact rational arithmetic)
    np.testing.assert_allclose(pi, ref_stationary(T), rtol=1e-9, atol=1e-15)
    # eigenvalue 1 present (stochastic matrix, Perron-Frobenius)
    assert np.min(np.abs(la.eigvals(T) - 1)) < 1e-10
    # no probability where neither c_ij nor c_ji was observed
    assert np.all(T[(C + C.T) == 0] == 0)
    # it maximises the likelihood among reversible matrices: better than the symmetrized-counts
    # estimate (C + C^T row-normalized, reversible by construction), no better than the
    # unconstrained maximum (row-normalized C)
    S = (C + C.T).astype(float)
    ll = log_likelihood(C, T)
    ll_sym = log_likelihood(C, S / S.sum(axis=1, keepdims=True))
    ll_free = log_likelihood(C, C / C.sum(axis=1, keepdims=True))
    slack = 1e-10 * abs(ll_free) + 1e-12
    assert ll >= ll_sym - slack
    assert ll <= ll_free + slack
    assert info.log_likelihood == pytest.approx(ll, rel=1e-12, abs=1e-12)
    # first-order optimality on symmetric flow matrices (Bowman et al. 2009)
    assert np.max(np.abs(likelihood_gradient(C, T, pi))) < 1e-8


@settings(max_examples=40, deadline=None)
@given(C=count_matrices(max_n=6, well_conditioned=True))
def test_reversible_mle_equals_plain_fixed_point(C):
    T_fast = estimate_transition_matrix(C, reversible=True, accelerate=True)
    T_plain, info = estimate_transition_matrix(C, reversible=True, accelerate=False, max_iter=1_000_000,
                                               return_info=True)
    assert info.converged
    np.testing.assert_allclose(T_fast, T_plain, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(T_fast, bowman_iteration(C), rtol=1e-9, atol=1e-12)


@settings(max_examples=30, deadline=None)
@given(C=count_matrices(symmetric=True))
def test_symmetric_counts_give_row_normalised_estimate(C):
    T = estimate_transition_matrix(C, reversible=True)
    np.testing.assert_allclose(T, C / C.sum(axis=1, keepdims=True), rtol=1e-9, atol=1e-13)


@settings(max_examples=40, deadline=None)
@given(C=count_matrices())
def test_nonreversible_mle_is_row_normalised(C):
    T, info = estimate_transition_matrix(C, reversible=False, return_info=True)
    np.testing.assert_allclose(T, C / C.sum(axis=1, keepdims=True), rtol=1e-14, atol=0)
    assert info.method == "row-normalized" and info.iterations == 0 and info.converged
    np.testing.assert_allclose(info.equilibrium, ref_stationary(T), rtol=1e-7, atol=1e-14)


@pytest.mark.parametrize("C", [[[5, 3], [2, 7]], [[0, 1], [40, 2]], [[1000, 1], [3, 10]]])
def test_two_state_reversible_equals_row_normalised(C):
    C = np.array(C)
    np.testing.assert_allclose(estimate_transition_matrix(C, reversible=True),
                               C / C.sum(axis=1, keepdims=True), rtol=1e-10)


def test_metastable_counts_converge_fast_and_are_optimal():
    # three well-sampled basins joined by single transitions: the plain iteration is slow here
    rng = np.random.default_rng(3)
    blocks = [rng.integers(2000, 20000, size=(3, 3)) for _ in range(3)]
    C = la.block_diag(*blocks)
    C[2, 3] = C[3, 2] = 1
    C[5, 6] = 1
    C[8, 0] = 2
    T, info = estimate_transition_matrix(C, return_info=True)
    assert info.converged and info.iterations < 200
    assert np.max(np.abs(likelihood_gradient(C, T, info.equilibrium))) < 1e-8
    X = info.equilibrium[:, None] * T
    assert np.max(np.abs(X - X.T)) <= 1e-12 * X.max()


def test_sparse_and_dense_inputs_agree_and_initial_does_not_change_the_answer():
    rng = np.random.default_rng(7)
    C = rng.integers(0, 50, size=(6, 6)) * (rng.random((6, 6)) < 0.6)
    C[np.arange(6), (np.arange(6) + 1) % 6] += 1
    T_dense = estimate_transition_matrix(C)
    np.testing.assert_allclose(estimate_transition_matrix(sp.csr_matrix(C)), T_dense, rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(estimate_transition_matrix(C, initial=np.arange(1, 7.0)), T_dense,
                               rtol=1e-9, atol=1e-13)


def test_non_convergence_is_reported():
    C = la.block_diag([[500, 1], [1, 500]], [[400, 2], [3, 300]])
    C[1, 2] = C[2, 1] = 1
    with pytest.warns(DiagnosticWarning, match=r"did not converge in 3 iterations"):
        T, info = estimate_transition_matrix(C, accelerate=False, max_iter=3, return_info=True)
    assert not info.converged and info.iterations == 3
    # still a reversible stochastic matrix
    np.testing.assert_allclose(T.sum(axis=1), 1.0, atol=1e-12)
    X = info.equilibrium[:, None] * T
    assert np.max(np.abs(X - X.T)) <= 1e-12 * X.max()


def test_estimation_info_is_frozen():
    _, info = estimate_transition_matrix([[3, 1], [1, 3]], return_info=True)
    assert isinstance(info, EstimationInfo)
    with pytest.raises(AttributeError):
        info.converged = False


# --------------------------------------------------------------------------- sampled chains

@pytest.mark.parametrize("reversible", [False, True])
def test_sampled_chain_recovers_transition_matrix(sample_chain, reversible_chain, reversible):
    # At lag 1 the counts out of state i are multinomial given the visits n_i, so each estimated
    # T_ij has standard error sqrt(T_ij (1 - T_ij) / n_i) (common practice). The reversible MLE
    # of a reversible chain is no less precise asymptotically. Allow 5 standard errors per entry
    # (two-sided 5-sigma: ~6e-7 chance per entry).
    T = reversible_chain
    runs = sample_chain(T, 2000, n_runs=50, seed=11)
    C = count_transitions(runs, 1).toarray()
    That = estimate_transition_matrix(C, reversible=reversible)
    n_i = C.sum(axis=1)
    sigma = np.sqrt(T * (1 - T) / n_i[:, None])
    assert np.all(np.abs(That - T) <= 5 * sigma + 1e-12)


# --------------------------------------------------------------------------- log-likelihood

def test_log_likelihood_by_hand():
    C = np.array([[3, 1], [0, 2]])
    T = np.array([[0.5, 0.5], [0.25, 0.75]])
    expected = 3 * np.log(0.5) + 1 * np.log(0.5) + 2 * np.log(0.75)
    assert log_likelihood(C, T) == pytest.approx(expected, rel=1e-14)
    assert log_likelihood(sp.csr_matrix(C), T) == pytest.approx(expected, rel=1e-14)
    assert log_likelihood(C, np.array([[1.0, 0.0], [0.25, 0.75]])) == -np.inf


# --------------------------------------------------------------------------- bad input

@pytest.mark.parametrize("counts, message", [
    (np.ones((2, 3)), r"counts must be a square matrix, but has shape \(2, 3\)"),
    (np.ones((2, 2, 2)), r"counts must be a square matrix, but has shape \(2, 2, 2\)"),
    (np.ones(4), r"counts must be a square matrix, but has shape \(4,\)"),
    ([[1, 2], [3]], r"counts must be a square matrix, but the rows have different lengths"),
    (np.array([[1.0, -1.0], [1.0, 1.0]]), r"counts must be finite and non-negative"),
    (np.array([[1.0, np.nan], [1.0, 1.0]]), r"counts must be finite and non-negative"),
    (np.array([["a", "b"], ["c", "d"]]), r"counts must be a numeric matrix"),
    (np.zeros((3, 3)), r"counts hold no transitions"),
    (np.zeros((0, 0)), r"counts is an empty matrix"),
    (np.array([[5, 1, 0], [1, 5, 0], [0, 0, 4]]),
     r"counts must be strongly connected .* 2 separate sets of sizes \[2, 1\].*kept_states"),
    (np.array([[5, 1], [0, 5]]), r"counts must be strongly connected"),
])
@pytest.mark.parametrize("reversible", [True, False])
def test_bad_counts(counts, message, reversible):
    with pytest.raises(InputError, match=message):
        estimate_transition_matrix(counts, reversible=reversible)


@pytest.mark.parametrize("initial", [np.ones(2), np.array([1.0, 0.0, 1.0]), np.array([1.0, np.nan, 1.0])])
def test_bad_initial(initial):
    with pytest.raises(InputError, match=r"initial must be a positive vector of length 3"):
        estimate_transition_matrix(np.array([[5, 1, 1], [1, 5, 1], [1, 1, 5]]), initial=initial)


def test_no_warning_when_converged():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        estimate_transition_matrix(np.array([[5, 1, 1], [1, 5, 1], [1, 1, 5]]))


@pytest.mark.parametrize("extra", [2, 0])  # random long-range entries (wide band), or a plain ring (narrow)
def test_thousands_of_states_take_conjugate_gradients_and_reach_the_same_optimum(monkeypatch, extra):
    # From ITERATIVE_STATES on, Newton directions come from conjugate gradients
    # (msmkit.spectral.conjugate_gradients); the estimate must satisfy the optimality conditions
    # of the likelihood (Bowman et al. 2009, see likelihood_gradient) and equal the direct route.
    import msmkit.estimate as estimate
    import msmkit.spectral as spectral
    n = estimate.ITERATIVE_STATES + 300
    rng = np.random.default_rng(4)
    i = np.concatenate([np.arange(n), np.arange(n), rng.integers(0, n, extra * n)])
    j = np.concatenate([(np.arange(n) + 1) % n, np.arange(n), rng.integers(0, n, extra * n)])
    C = sp.coo_matrix((rng.poisson(30, i.size) + 1, (i, j)), shape=(n, n)).tocsr()
    calls = []
    monkeypatch.setattr(estimate, "conjugate_gradients",
                        lambda *a, **kw: calls.append(1) or spectral.conjugate_gradients(*a, **kw))
    T, info = estimate_transition_matrix(C, return_info=True, initial=rng.uniform(0.5, 1.5, n))
    assert calls and info.converged
    assert np.max(np.abs(likelihood_gradient(C.toarray(), T, info.equilibrium))) < 1e-8
    monkeypatch.setattr(estimate, "ITERATIVE_STATES", 10 ** 9)
    T_direct, info_direct = estimate_transition_matrix(C, return_info=True, initial=rng.uniform(0.5, 1.5, n))
    np.testing.assert_allclose(T, T_direct, rtol=0, atol=1e-12)
    np.testing.assert_allclose(info.equilibrium, info_direct.equilibrium, rtol=1e-9)


def test_symmetric_jacobian_from_the_upper_half_matches_finite_differences():
    # The banded Newton route factorises M = diag(pi) (-J) diag(c / pi)^-1 assembled from the
    # upper half of the pattern alone; J is checked here as the central finite difference of the
    # stationarity residual in log pi (common practice), and M must be symmetric.
    from msmkit.estimate import _SymmetricCounts
    rng = np.random.default_rng(3)
    n = 9
    C = sp.random(n, n, density=0.4, random_state=4, data_rvs=lambda k: rng.integers(1, 20, k)).tocsr()
    C = (C + sp.diags(rng.integers(5, 30, n))).tocsr()
    row = np.asarray(C.sum(axis=1)).ravel()
    S = _SymmetricCounts(C, row)
    pi = rng.uniform(0.5, 1.5, n)
    h = 1e-6
    J = np.empty((n, n))
    for k in range(n):
        up, down = np.log(pi), np.log(pi)
        up[k] += h
        down[k] -= h
        J[:, k] = (S.residual(np.exp(up))[0] - S.residual(np.exp(down))[0]) / (2 * h)
    ratio = row / pi
    M_reference = -pi[:, None] * J / ratio[None, :]
    off, diag = S.symmetric_jacobian(pi)
    i, j = S._upper.off_i, S._upper.off_j
    M = np.diag(diag)
    M[i, j] = off
    M[j, i] = off
    np.testing.assert_allclose(M, M_reference, rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(M_reference, M_reference.T, rtol=1e-6, atol=1e-8)
