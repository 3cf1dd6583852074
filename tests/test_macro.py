"""Tests of msmkit.macro: PCCA+ affinity, coarse matrices, choosing the number of sets.

References for the checks: Deuflhard & Weber, Linear Algebra Appl. 398, 161 (2005) (PCCA+
recovers the blocks of nearly uncoupled chains; feasibility of affinity); Röblitz & Weber,
Adv. Data Anal. Classif. 7, 147 (2013) (crispness objective, Galerkin projection); Kemeny &
Snell, Finite Markov Chains (1960) (first-passage times).
"""
import warnings

import numpy as np
import pytest
import scipy.linalg as la
from hypothesis import given, settings
from hypothesis import strategies as st

from msmkit.errors import DiagnosticWarning, InputError
from msmkit.macro import (Macrostates, check_macrostate_gap, lumped_propagator, find_macrostates,
                          pcca_affinity, suggest_n_macrostates)


def stationary(T):
    """Stationary distribution via scipy.linalg.eig (a general-purpose reference library)."""
    w, v = la.eig(T.T)
    p = np.real(v[:, np.argmin(np.abs(w - 1))])
    return p / p.sum()


def block_chain(sizes, coupling, seed, *, reversible=True):
    """Random block-diagonal chain plus a small all-to-all coupling (nearly decomposable)."""
    rng = np.random.default_rng(seed)
    n = sum(sizes)
    C = coupling * rng.random((n, n))
    start = 0
    for s in sizes:
        C[start:start + s, start:start + s] += rng.random((s, s)) + 1.0  # well mixed inside
        start += s
    if reversible:
        C = C + C.T
    T = C / C.sum(axis=1, keepdims=True)
    blocks = np.repeat(np.arange(len(sizes)), sizes)
    return T, stationary(T), blocks


def same_partition(a, b):
    """True when two label vectors define the same partition (up to renaming)."""
    pairs = set(zip(a.tolist(), b.tolist()))
    return len(pairs) == len(set(a.tolist())) == len(set(b.tolist()))


def assert_valid_memberships(chi, n, m):
    # Deuflhard & Weber 2005, Sec. 3: affinity are non-negative and each row sums to 1.
    assert chi.shape == (n, m)
    assert chi.min() >= 0
    np.testing.assert_allclose(chi.sum(axis=1), 1.0, atol=1e-12)


blocks_strategy = st.tuples(st.lists(st.integers(2, 6), min_size=2, max_size=4),
                            st.integers(0, 10_000), st.booleans())


# --------------------------------------------------------------------------- PCCA+

@settings(max_examples=20, deadline=None)
@given(blocks_strategy)
def test_pcca_recovers_blocks_of_nearly_decomposable_chains(args):
    # Deuflhard & Weber 2005, Sec. 2-3: for a nearly uncoupled chain the affinity are nearly
    # the characteristic functions of the blocks; the gap after the m-th eigenvalue selects m
    # (common practice). Non-reversible chains go through the Schur-vector route (Röblitz &
    # Weber 2013, Sec. 4.3).
    sizes, seed, rev = args
    T, pi, blocks = block_chain(sizes, 1e-3, seed, reversible=rev)
    m = len(sizes)
    with warnings.catch_warnings():
        warnings.simplefilter("error", DiagnosticWarning)
        macro = find_macrostates(T, pi, m, states=np.arange(100, 100 + T.shape[0]))
    assert_valid_memberships(macro.affinity, T.shape[0], m)
    assert same_partition(macro.macro_index, blocks)
    assert macro.crispness > 0.97
    Tc = macro.lumped_propagator
    np.testing.assert_allclose(Tc.sum(axis=1), 1.0, atol=1e-10)
    assert Tc.min() >= -1e-10
    # Galerkin projection keeps the macrostate populations stationary (Röblitz & Weber 2013)
    np.testing.assert_allclose(macro.stationary_populations @ Tc, macro.stationary_populations, atol=1e-10)
    eig = np.sort(np.real(la.eigvals(T)))[::-1]
    n, _ = suggest_n_macrostates(eig, max_sets=6)
    assert n == m


def test_memberships_are_ordered_by_population_and_keyed_by_label():
    T, pi, blocks = block_chain([3, 6, 2], 1e-4, 1)
    labels = np.array([11, 3, 7, 40, 41, 42, 43, 44, 45, 90, 91])
    macro = find_macrostates(T, pi, 3, states=labels, time_per_step=0.5, unit="ns")
    pops = macro.stationary_populations
    assert np.all(np.diff(pops) <= 0)
    assert pops.sum() == pytest.approx(1.0)
    assert set(macro.macro_of) == set(labels.tolist())
    for s in macro.members:  # every crisp set is one block, named by labels
        assert len(set(blocks[np.isin(labels, s)])) == 1
    assert macro.macro_of[11] == macro.macro_of[3] == macro.macro_of[7]
    table = macro.affinity_table()
    assert list(table.index) == labels.tolist()


def test_crispness_equals_objective_computed_from_memberships():
    # Röblitz & Weber 2013: I(chi) = sum_j <chi_j, chi_j>_pi / <chi_j, 1>_pi, at most m,
    # equal to m only for crisp affinity.
    T, pi, _ = block_chain([4, 4, 5], 0.05, 2)
    macro = find_macrostates(T, pi, 3)
    chi = macro.affinity
    direct = ((chi * pi[:, None] * chi).sum(axis=0) / (pi @ chi)).sum() / 3
    assert macro.crispness == pytest.approx(direct, rel=1e-6)
    assert 0 < macro.crispness < 1


def test_optimisation_improves_crispness():
    # The optimization starts from the feasible inner-simplex solution (Röblitz & Weber 2013,
    # Sec. 3.4) and must raise the objective on a fuzzy chain; it is bounded by m.
    T, pi, _ = block_chain([4, 5, 3, 4], 0.1, 3)
    chi0 = pcca_affinity(T, pi, 4, optimize=False)
    chi1 = pcca_affinity(T, pi, 4)

    def objective(chi):
        return ((chi * pi[:, None] * chi).sum(axis=0) / (pi @ chi)).sum()

    # measured on this chain: 3.728 -> 3.842 (of at most 4); the optimum is clearly better
    assert objective(chi1) > objective(chi0) + 0.05
    assert objective(chi1) <= 4 + 1e-12
    assert_valid_memberships(chi0, 16, 4)
    assert_valid_memberships(chi1, 16, 4)


def test_symmetric_and_schur_routes_agree_on_reversible_chains():
    # For a reversible T the real Schur vectors of D^1/2 T D^-1/2 span the same invariant
    # subspace as its eigenvectors (linear algebra), so both routes give the same affinity.
    T, pi, _ = block_chain([3, 4, 5], 0.02, 4)
    a = pcca_affinity(T, pi, 3, reversible=True)
    b = pcca_affinity(T, pi, 3, reversible=False)
    np.testing.assert_allclose(a, b, atol=1e-6)


def test_one_set_and_as_many_sets_as_states():
    T, pi, _ = block_chain([2, 3], 0.01, 5)
    chi = pcca_affinity(T, pi, 1)
    np.testing.assert_array_equal(chi, np.ones((5, 1)))
    np.testing.assert_allclose(lumped_propagator(T, pi, chi), [[1.0]])
    # n sets for n states: every state is its own set, and the coarse matrix is T itself
    # (Galerkin projection with chi = a permutation matrix).
    macro = find_macrostates(T, pi, 5)
    chi = macro.affinity
    np.testing.assert_allclose(np.sort(chi, axis=1)[:, -1], 1.0, atol=1e-8)
    perm = np.argmax(chi, axis=0)
    np.testing.assert_allclose(macro.lumped_propagator, T[np.ix_(perm, perm)], atol=1e-8)


def test_coarse_matrix_of_crisp_sets_is_the_weighted_lumping():
    # For crisp affinity the Galerkin projection is the pi-weighted lumping
    # Tc_IJ = sum_{i in I, j in J} pi_i T_ij / sum_{i in I} pi_i (Deuflhard & Weber 2005, Sec. 3).
    T, pi, blocks = block_chain([3, 3, 2], 0.2, 6, reversible=False)
    chi = np.eye(3)[blocks]
    expect = np.array([[pi[blocks == I] @ T[np.ix_(blocks == I, blocks == J)].sum(axis=1)
                        / pi[blocks == I].sum() for J in range(3)] for I in range(3)])
    np.testing.assert_allclose(lumped_propagator(T, pi, chi), expect, rtol=1e-12)


def test_two_state_chain():
    # Two states, two sets: affinity are the identity, coarse matrix is T (linear algebra).
    T = np.array([[0.9, 0.1], [0.3, 0.7]])
    pi = np.array([0.75, 0.25])
    macro = find_macrostates(T, pi, 2)
    np.testing.assert_allclose(macro.affinity, np.eye(2), atol=1e-12)
    np.testing.assert_allclose(macro.lumped_propagator, T, atol=1e-12)
    np.testing.assert_allclose(macro.stationary_populations, pi)


def test_degenerate_eigenvalues_warn():
    # T = (1 - 4e) I + e 11^T has eigenvalues 1 and (1 - 4e) three times (linear algebra):
    # any 2-set split of the 3-fold degenerate subspace is arbitrary.
    e = 0.01
    T = (1 - 4 * e) * np.eye(4) + e * np.ones((4, 4))
    with pytest.warns(DiagnosticWarning, match="nearly\\) equal"):
        chi = pcca_affinity(T, np.full(4, 0.25), 2)
    assert_valid_memberships(chi, 4, 2)


def test_splitting_a_complex_pair_is_refused():
    # T = (I + P)/2 with P the 3-cycle has eigenvalues 1 and (1 + e^{+-2 pi i/3})/2
    # (linear algebra); 2 sets would split the conjugate pair.
    P = np.roll(np.eye(3), 1, axis=1)
    T = 0.5 * (np.eye(3) + P)
    with pytest.raises(InputError, match="complex-conjugate"):
        pcca_affinity(T, np.full(3, 1 / 3), 2)
    assert_valid_memberships(pcca_affinity(T, np.full(3, 1 / 3), 3), 3, 3)


# --------------------------------------------------------------------------- number of sets

def test_suggest_from_timescale_gap():
    # Timescales -1/ln(lambda): 99.5, 49.5, 1.44, 1.09 steps; largest ratio after the 3rd
    # eigenvalue (49.5 / 1.44), so 3 sets (common practice).
    n, reason = suggest_n_macrostates([1.0, 0.99, 0.98, 0.5, 0.4], time_per_step=0.1, unit="ns")
    assert n == 3
    assert "34.3 times" in reason and "4.95 ns" in reason
    # order and complex type do not matter: real parts are sorted
    assert suggest_n_macrostates(np.array([0.5, 1.0, 0.98, 0.4, 0.99], dtype=complex))[0] == 3


def test_suggest_one_set_when_nothing_is_slow():
    # lambda_2 = 0.2 decays within one step (timescale 0.62 steps): no metastable sets.
    n, reason = suggest_n_macrostates([1.0, 0.2, 0.1])
    assert n == 1 and "no process is slower" in reason
    assert suggest_n_macrostates([1.0])[0] == 1
    assert suggest_n_macrostates([1.0, 0.9, 0.85, 0.8], max_sets=2)[0] == 2


def test_gap_check_warns_only_without_a_gap():
    eig = [1.0, 0.99, 0.98, 0.5, 0.4]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert check_macrostate_gap(eig, 3) == pytest.approx(np.log(0.5) / np.log(0.98))
        assert np.isnan(check_macrostate_gap(eig, 1))
    # 99.5 / 49.5 = 2.01: fine for the default min_ratio 1.5, not for 2.5
    with pytest.warns(DiagnosticWarning, match="not separated by a gap"):
        check_macrostate_gap(eig, 2, min_ratio=2.5)
    # 4 sets: 1.44 / 1.09 = 1.32 < 1.5
    with pytest.warns(DiagnosticWarning, match="only 1.32 times slower"):
        check_macrostate_gap(eig, 4)
    # lambda_3 = 0.3: timescale 0.83 steps, shorter than the lag
    with pytest.warns(DiagnosticWarning, match="shorter than one lag time"):
        check_macrostate_gap([1.0, 0.99, 0.3, 0.01], 3)


def test_find_macrostates_warns_when_n_is_not_at_a_gap():
    T, pi, _ = block_chain([4, 4], 1e-3, 8)
    # the third eigenvalue belongs to the fast in-block processes (two blocks, three sets)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        find_macrostates(T, pi, 3)
    messages = [str(w.message) for w in caught if issubclass(w.category, DiagnosticWarning)]
    assert any("shorter than one lag time" in m for m in messages)
    assert any("coarse transition matrix has negative entries" in m for m in messages)


# --------------------------------------------------------------------------- tables

def test_populations_table_free_energies_and_intervals():
    T, pi, _ = block_chain([3, 5], 1e-3, 9)
    rng = np.random.default_rng(0)
    p = pi @ pcca_affinity(T, pi, 2)
    # posterior-style samples of the stationary distribution: the interval is then the plain
    # 2.5 / 97.5 percentiles (numpy) of the macrostate populations, the affinity held fixed
    from msmkit import MarkovModel, ModelSamples
    model = MarkovModel.from_transition_matrix(T)
    pis = pi * np.exp(0.05 * rng.standard_normal((200, pi.size)))
    pis /= pis.sum(axis=1, keepdims=True)
    chi = pcca_affinity(T, pi, 2)
    samples = pis @ chi
    drawn = ModelSamples(model, np.repeat(T[None], 200, axis=0), pis, "bayes")
    macro = find_macrostates(T, pi, 2, samples=drawn)
    df = macro.populations(temperature=300.0)
    np.testing.assert_allclose(df["population"], p)
    # free energy relative to the most populated macrostate: -ln(p / p_max) in kT
    np.testing.assert_allclose(df["free_energy_kT"], -np.log(p / p.max()))
    # kT at 300 K = 2.494 kJ/mol (CODATA 2018 R = 8.314462618 J/mol/K)
    assert df["free_energy_kJ_per_mol"][1] == pytest.approx(df["free_energy_kT"][1] * 2.4943, rel=1e-4)
    np.testing.assert_allclose(df["population_lower"], np.percentile(samples, 2.5, axis=0, method="weibull"))
    np.testing.assert_allclose(df["population_upper"], np.percentile(samples, 97.5, axis=0, method="weibull"))
    assert sorted(sum(map(list, df["states"]), [])) == list(range(8))
    assert "population_lower" not in find_macrostates(T, pi, 2).populations().columns


def test_mfpt_table_between_single_state_macrostates_is_kemeny_snell():
    # With one state per macrostate the table is the Kemeny-Snell MFPT matrix
    # m_ij = (z_jj - z_ij)/pi_j, Z = (I - P + 1 pi^T)^-1 (Kemeny & Snell 1960, Thm 4.4.7).
    T, pi, _ = block_chain([2, 2], 0.3, 10)
    macro = find_macrostates(T, pi, 4, time_per_step=2.0, unit="ps")
    Z = np.linalg.inv(np.eye(4) - T + np.outer(np.ones(4), pi))
    M = (np.diag(Z)[None, :] - Z) / pi[None, :]
    perm = macro.macro_index.argsort()  # state of each macrostate
    table = macro.passage_time_table()
    np.testing.assert_allclose(table.to_numpy(), 2.0 * M[np.ix_(perm, perm)], rtol=1e-9, atol=1e-12)


# --------------------------------------------------------------------------- bad input

def test_bad_input():
    T, pi, _ = block_chain([2, 2], 0.01, 11)
    for bad in (0, 5, 2.5, True, "2"):
        with pytest.raises(InputError, match="n_sets .* must be an integer from 1 to the number of states"):
            pcca_affinity(T, pi, bad)
    with pytest.raises(InputError, match="not the stationary distribution"):
        pcca_affinity(T, np.full(4, 0.25) + [0.1, -0.1, 0, 0], 2)
    with pytest.raises(InputError, match=r"affinity must have shape \(4, m\)"):
        lumped_propagator(T, pi, np.ones((3, 1)))
    with pytest.raises(InputError, match="row 0 sums to 2"):
        lumped_propagator(T, pi, np.ones((4, 2)))
    with pytest.raises(InputError, match="non-negative"):
        lumped_propagator(T, pi, [[1.5, -0.5]] * 4)
    from msmkit import MarkovModel, ModelSamples
    other = MarkovModel.from_transition_matrix(np.full((3, 3), 1 / 3))
    with pytest.raises(InputError, match=r"samples must be drawn .* for a model of these states"):
        find_macrostates(T, pi, 2, samples=ModelSamples(other, np.full((5, 3, 3), 1 / 3), np.full((5, 3), 1 / 3)))
    with pytest.raises(InputError, match="max_sets"):
        suggest_n_macrostates([1, 0.9], max_sets=0)
    with pytest.raises(InputError, match="eigenvalues must be a non-empty"):
        suggest_n_macrostates([])
    macro = find_macrostates(T, pi, 2)
    with pytest.raises(InputError, match="temperature"):
        macro.populations(temperature=-1)
    assert isinstance(macro, Macrostates)


def test_two_state_model_suggests_two_macrostates():
    # A two-state chain has one relaxation process, -1/ln(1 - a - b) steps (analytic, common
    # practice); it lies between the two states, so two macrostates are the only sensible split.
    a, b = 0.01, 0.02
    lam = [1.0, 1.0 - a - b]
    n, reason = suggest_n_macrostates(lam, time_per_step=1.0, unit="ns")
    assert n == 2
    assert f"{-1 / np.log(1 - a - b):.3g} ns" in reason
