"""Tests of msmkit.kinetics: first-passage times, committors, reactive flux, routes.

Reference values come from outside the code under test: the Kemeny-Snell fundamental matrix,
closed forms for birth-death chains, series sums, brute-force path enumeration, and an
"augmented" chain that remembers which set it visited last (whose stationary distribution
gives the committor backward in time and the reactive flux without any transition path theory).
"""
import itertools
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from msmkit.errors import DiagnosticWarning, InputError
from msmkit.kinetics import (Route, TransitionPaths, splitting_probability, mean_passage_time, passage_time_matrix,
                             hitting_steps, transition_paths)


# --------------------------------------------------------------------------- helpers

def random_chain(n, seed, *, reversible=False, sparsity=0.0):
    """A random irreducible, aperiodic chain (a cycle plus self-loops keeps it irreducible)."""
    rng = np.random.default_rng(seed)
    C = rng.random((n, n)) * (rng.random((n, n)) >= sparsity)
    C[np.arange(n), (np.arange(n) + 1) % n] += 0.5
    C[np.arange(n), np.arange(n)] += 0.1
    if reversible:
        C = C + C.T
    return C / C.sum(axis=1, keepdims=True)


def stationary(T):
    """Stationary distribution via scipy.linalg.eig (a general-purpose reference library)."""
    import scipy.linalg as la
    w, v = la.eig(T.T)
    p = np.real(v[:, np.argmin(np.abs(w - 1))])
    return p / p.sum()


def kemeny_snell_mfpt(T):
    """m_ij = (z_jj - z_ij) / pi_j with Z = (I - P + 1 pi^T)^-1 (Kemeny & Snell 1960, Thm 4.4.7)."""
    n = T.shape[0]
    pi = stationary(T)
    Z = np.linalg.inv(np.eye(n) - T + np.outer(np.ones(n), pi))
    return (np.diag(Z)[None, :] - Z) / pi[None, :]


def birth_death(p, q):
    """Birth-death chain on 0..N: up with p[i], down with q[i], stay with the rest."""
    N = len(p) - 1
    T = np.zeros((N + 1, N + 1))
    for i in range(N + 1):
        if i < N:
            T[i, i + 1] = p[i]
        if i > 0:
            T[i, i - 1] = q[i]
        T[i, i] = 1.0 - T[i].sum()
    return T


def augmented_stationary(T, a, b):
    """Stationary distribution of the chain on (state, set visited last), flag 0 = A, 1 = B.

    pi_hat(i, A) = pi_i q-_i by definition of the committor backward in time (E & Vanden-Eijnden 2006);
    the chain is built and solved here without any committor equation.
    """
    n = T.shape[0]
    big = np.zeros((2 * n, 2 * n))
    for flag in (0, 1):
        for j in range(n):
            new = 0 if a[j] else (1 if b[j] else flag)
            big[flag * n:(flag + 1) * n, new * n + j] += T[:, j]
    # Some augmented states are transient (e.g. (i in A, flag B)); solve pi (I - P) = 0, sum 1.
    A = np.vstack([big.T - np.eye(2 * n), np.ones(2 * n)])
    rhs = np.zeros(2 * n + 1)
    rhs[-1] = 1.0
    ph = np.linalg.lstsq(A, rhs, rcond=None)[0]
    return ph[:n], ph[n:], big


def mask(n, idx):
    m = np.zeros(n, dtype=bool)
    m[list(idx)] = True
    return m


chains = st.tuples(st.integers(3, 8), st.integers(0, 10_000), st.booleans())


# --------------------------------------------------------------------------- first passage

@settings(max_examples=30, deadline=None)
@given(chains)
def test_mfpt_matches_kemeny_snell_fundamental_matrix(args):
    # Kemeny & Snell, Finite Markov Chains (1960), Thm 4.4.7: m_ij = (z_jj - z_ij) / pi_j.
    n, seed, rev = args
    T = random_chain(n, seed, reversible=rev, sparsity=0.3)
    M = kemeny_snell_mfpt(T)
    for j in range(n):
        np.testing.assert_allclose(hitting_steps(T, j), M[:, j], rtol=1e-8, atol=1e-9)


@settings(max_examples=20, deadline=None)
@given(chains, st.data())
def test_mfpt_to_set_equals_series_of_survival_probabilities(args, data):
    # E_i[tau] = sum_{k>=0} P_i(tau > k) = sum_k (Q^k 1)_i, Q = T restricted to the complement
    # of the target (Kemeny & Snell 1960, Sec. 3.3); summed here term by term, no linear solve.
    n, seed, rev = args
    T = random_chain(n, seed, reversible=rev)
    target = data.draw(st.sets(st.integers(0, n - 1), min_size=1, max_size=n - 1))
    rest = np.array(sorted(set(range(n)) - target))
    Q = T[np.ix_(rest, rest)]
    v, total = np.ones(rest.size), np.zeros(rest.size)
    for _ in range(100_000):
        total += v
        v = Q @ v
        if v.max() < 1e-13:
            break
    m = hitting_steps(T, sorted(target))
    np.testing.assert_allclose(m[rest], total, rtol=1e-8)
    assert np.all(m[sorted(target)] == 0)


def test_mfpt_two_state_chain_is_geometric():
    # Two-state chain: the time to leave state 0 is geometric with mean 1/a (common practice).
    a, b = 0.02, 0.3
    T = np.array([[1 - a, a], [b, 1 - b]])
    pi = np.array([b, a]) / (a + b)
    np.testing.assert_allclose(hitting_steps(T, [1]), [1 / a, 0.0])
    assert mean_passage_time(T, pi, [0], [1], time_per_step=0.25) == pytest.approx(0.25 / a)
    assert mean_passage_time(T, pi, [1], [0]) == pytest.approx(1 / b)


def test_birth_death_mfpt_closed_form():
    # Birth-death chain, up p_i, down q_i. Passage i -> i+1 takes e_i steps with
    # p_i e_i = 1 + q_i e_{i-1} (one-step analysis), whose solution is
    # e_i = sum_{k<=i} pi_k / (pi_i p_i) with pi from detailed balance pi_{k+1} q_{k+1} = pi_k p_k
    # (Kemeny & Snell 1960, Sec. 5.1, derived here); the MFPT 0 -> N is sum_i e_i.
    rng = np.random.default_rng(3)
    N = 12
    p = rng.uniform(0.1, 0.45, N + 1)
    q = rng.uniform(0.1, 0.45, N + 1)
    p[N], q[0] = 0.0, 0.0
    T = birth_death(p, q)
    w = np.ones(N + 1)
    for k in range(N):
        w[k + 1] = w[k] * p[k] / q[k + 1]
    pi = w / w.sum()
    e = np.array([pi[: i + 1].sum() / (pi[i] * p[i]) for i in range(N)])
    m = hitting_steps(T, [N])
    np.testing.assert_allclose(m[:N], np.cumsum(e[::-1])[::-1], rtol=1e-10)
    # the recursion form as a second, independent statement of the same closed form
    e2 = [1 / p[0]]
    for i in range(1, N):
        e2.append((1 + q[i] * e2[-1]) / p[i])
    np.testing.assert_allclose(e, e2, rtol=1e-12)
    assert mean_passage_time(T, pi, [0], [N]) == pytest.approx(e.sum(), rel=1e-10)


def test_mean_first_passage_time_weights_sources_by_stationary_distribution():
    # Definition (see DESIGN.md conventions): sum_{i in A} pi_i m_i / sum_{i in A} pi_i.
    T = random_chain(6, 11)
    pi = stationary(T)
    M = kemeny_snell_mfpt(T)
    expect = (pi[0] * M[0, 5] + pi[2] * M[2, 5]) / (pi[0] + pi[2])
    assert mean_passage_time(T, pi, [0, 2], [5]) == pytest.approx(expect, rel=1e-9)
    assert mean_passage_time(T, pi, [2, 0], 5, time_per_step=3.0) == pytest.approx(3 * expect, rel=1e-9)


def test_mfpt_matrix_between_singletons_is_kemeny_snell():
    # Kemeny & Snell 1960, Thm 4.4.7, with the diagonal set to 0 by our convention.
    T = random_chain(5, 4, reversible=True)
    pi = stationary(T)
    M = kemeny_snell_mfpt(T)
    np.fill_diagonal(M, 0.0)
    np.testing.assert_allclose(passage_time_matrix(T, pi, [[i] for i in range(5)], time_per_step=2.0),
                               2.0 * M, rtol=1e-9, atol=1e-9)


def test_mfpt_matrix_between_sets_matches_pairwise_calls():
    T = random_chain(7, 5)
    pi = stationary(T)
    sets = [[0, 1], [2, 3, 4], [6]]
    out = passage_time_matrix(T, pi, sets)
    for a, b in itertools.permutations(range(3), 2):
        assert out[a, b] == pytest.approx(mean_passage_time(T, pi, sets[a], sets[b]), rel=1e-12)
    assert np.all(np.diag(out) == 0)


def test_mfpt_unreachable_target_is_infinite():
    # State 2 is absorbing, so from 2 (and from 1 with some probability) state 0 is never
    # reached: the first-passage time is infinite (Kemeny & Snell 1960, absorbing chains).
    T = np.array([[0.5, 0.5, 0.0], [0.3, 0.3, 0.4], [0.0, 0.0, 1.0]])
    m = hitting_steps(T, [0])
    assert m[0] == 0 and np.isinf(m[1]) and np.isinf(m[2])
    m = hitting_steps(T, [2])
    np.testing.assert_allclose(m[:2], np.linalg.solve(np.eye(2) - T[:2, :2], np.ones(2)))


# --------------------------------------------------------------------------- committors

def test_birth_death_committor_closed_form():
    # Gambler's ruin: on a birth-death chain with A = {0}, B = {N},
    # q_i = sum_{k<i} rho_k / sum_{k<N} rho_k, rho_0 = 1, rho_k = prod_{j=1..k} q_j / p_j
    # (from q_{i+1} - q_i = (q_i/p_i)(q_i - q_{i-1}); Kemeny & Snell 1960, Sec. 5.1).
    rng = np.random.default_rng(7)
    N = 15
    p = rng.uniform(0.05, 0.5, N + 1)
    q = rng.uniform(0.05, 0.5, N + 1)
    T = birth_death(np.r_[p[:N], 0.0], np.r_[0.0, q[1:]])
    rho = np.r_[1.0, np.cumprod(q[1:N] / p[1:N])]
    expect = np.r_[0.0, np.cumsum(rho)] / rho.sum()
    np.testing.assert_allclose(splitting_probability(T, [0], [N]), expect, rtol=1e-10, atol=1e-14)


def test_constant_bias_gamblers_ruin():
    # Constant p, q: q_i = (1 - r^i) / (1 - r^N), r = q/p (classical gambler's ruin, from memory).
    N, up, down = 10, 0.3, 0.2
    T = birth_death(np.r_[np.full(N, up), 0.0], np.r_[0.0, np.full(N, down)])
    r = down / up
    i = np.arange(N + 1)
    np.testing.assert_allclose(splitting_probability(T, 0, N), (1 - r ** i) / (1 - r ** N), rtol=1e-10, atol=1e-14)


@settings(max_examples=25, deadline=None)
@given(chains)
def test_backward_committor_from_augmented_chain(args):
    # q-_i = P(last visit to A rather than B | X_t = i) = pi_hat(i, A) / pi_i on the augmented
    # chain (E & Vanden-Eijnden 2006; Metzner, Schütte & Vanden-Eijnden 2009, Sec. 3).
    n, seed, rev = args
    T = random_chain(n, seed, reversible=rev)
    pi = stationary(T)
    a, b = mask(n, [0]), mask(n, [n - 1])
    ph_a, _, _ = augmented_stationary(T, a, b)
    qb = splitting_probability(T, [0], [n - 1], reverse_time=True, pi=pi)
    np.testing.assert_allclose(qb, ph_a / pi, rtol=1e-7, atol=1e-10)
    if rev:
        # reversible chains: q- = 1 - q+ (Metzner, Schütte & Vanden-Eijnden 2009)
        np.testing.assert_allclose(qb, 1 - splitting_probability(T, [0], [n - 1]), atol=1e-10)


@settings(max_examples=25, deadline=None)
@given(chains)
def test_forward_committor_solves_its_defining_equation(args):
    # q+ = T q+ on the intermediate states, 0 on A, 1 on B (E & Vanden-Eijnden 2006, Eq. for the
    # discrete committor); checked as a residual, independent of how it was solved.
    n, seed, rev = args
    T = random_chain(n, seed, reversible=rev)
    q = splitting_probability(T, [0, 1], [n - 1])
    assert np.all(q[[0, 1]] == 0) and q[n - 1] == 1
    np.testing.assert_allclose((T @ q)[2:n - 1], q[2:n - 1], atol=1e-12)
    assert np.all((q >= 0) & (q <= 1))


def test_committor_of_states_that_reach_neither_set_is_nan():
    # States 2, 3 form a closed class away from A = {0} and B = {1}.
    T = np.array([[0.5, 0.5, 0, 0], [0.5, 0.5, 0, 0], [0, 0, 0.5, 0.5], [0, 0, 0.5, 0.5]])
    with pytest.warns(DiagnosticWarning, match="neither"):
        q = splitting_probability(T, [0], [1])
    assert q[0] == 0 and q[1] == 1 and np.isnan(q[2]) and np.isnan(q[3])


# --------------------------------------------------------------------------- reactive flux

@settings(max_examples=25, deadline=None)
@given(chains)
def test_flux_conservation_and_total_flux(args):
    # Metzner, Schütte & Vanden-Eijnden 2009, Thm 3.3 / Sec. 4: the gross flux is conserved at
    # every intermediate state; net flux out of A = net flux into B = total flux F.
    n, seed, rev = args
    T = random_chain(n, seed, reversible=rev, sparsity=0.3)
    pi = stationary(T)
    A, B = [0], [n - 2, n - 1]
    rf = transition_paths(T, pi, A, B)
    f, g = rf.reactive_current, rf.net_current
    mid = np.setdiff1d(np.arange(n), A + B)
    np.testing.assert_allclose(f[mid].sum(axis=1), f[:, mid].sum(axis=0), atol=1e-14)
    np.testing.assert_allclose(g[mid].sum(axis=1), g[:, mid].sum(axis=0), atol=1e-14)
    assert g[A].sum() == pytest.approx(rf.throughput, rel=1e-10)
    assert g[:, B].sum() == pytest.approx(rf.throughput, rel=1e-10)
    assert np.all(g >= 0) and np.all(g * g.T == 0)  # net flux is one-directional


@settings(max_examples=25, deadline=None)
@given(chains)
def test_total_flux_and_rate_from_augmented_chain(args):
    # F = stationary probability per step of jumping from (i, last=A) into B, and
    # k_AB = F / (tau sum_i pi_i q-_i) (Metzner, Schütte & Vanden-Eijnden 2009, Sec. 4, rate
    # formula), with pi_hat(i, A) = pi_i q-_i from the augmented chain (no committors solved).
    n, seed, rev = args
    T = random_chain(n, seed, reversible=rev)
    pi = stationary(T)
    a, b = mask(n, [0, 1]), mask(n, [n - 1])
    ph_a, _, _ = augmented_stationary(T, a, b)
    F = ph_a @ T[:, b].sum(axis=1)
    tau = 0.2
    rf = transition_paths(T, pi, [0, 1], [n - 1], time_per_step=tau, unit="ns")
    assert rf.throughput == pytest.approx(F, rel=1e-7)
    assert rf.rate_constant == pytest.approx(F / (tau * ph_a.sum()), rel=1e-7)
    assert rf.rate_constant == pytest.approx(rf.throughput / (tau * pi @ rf.came_from_source), rel=1e-12)
    assert rf.event_frequency == pytest.approx(F / tau, rel=1e-7)
    assert rf.mean_time_between_events == pytest.approx(tau / F, rel=1e-7)


def test_two_state_rate_is_the_jump_probability_per_time():
    # A = {0}, B = {1}: q+ = (0, 1), q- = (1, 0), F = pi_0 a, k_AB = a / tau (common practice).
    a, b, tau = 0.05, 0.2, 2.0
    T = np.array([[1 - a, a], [b, 1 - b]])
    pi = np.array([b, a]) / (a + b)
    rf = transition_paths(T, pi, [0], [1], time_per_step=tau, unit="ps")
    assert rf.throughput == pytest.approx(pi[0] * a)
    assert rf.rate_constant == pytest.approx(a / tau)
    assert rf.unit == "ps"


def test_results_use_original_labels():
    T = random_chain(5, 2, reversible=True)
    pi = stationary(T)
    labels = np.array([10, 20, 30, 40, 50])
    rf = transition_paths(T, pi, [0], [3, 4], states=labels)
    assert list(rf.source) == [10] and list(rf.target) == [40, 50]
    for path in rf.routes(1.0):
        assert path.states[0] == 10 and path.states[-1] in (40, 50)
        assert set(path.states) <= set(labels)
    table = rf.current_table()
    assert set(table["from_state"]) <= set(labels) and set(table["to_state"]) <= set(labels)


# --------------------------------------------------------------------------- routes

def hand_flux(C, source, target, states=None):
    """A TransitionPaths holding only a hand-made net flux (committors are not needed for paths)."""
    n = C.shape[0]
    states = np.arange(n) if states is None else np.asarray(states)
    total = C[source].sum()
    z = np.zeros(n)
    return TransitionPaths(source=states[source], target=states[target], states=states,
                           equilibrium=z, reach_target=z, came_from_source=z,
                           reactive_current=C, net_current=C, throughput=total, rate_constant=0.0)


def test_pathways_of_a_worked_network():
    # Worked by hand: 0 -> 1 (0.5), 0 -> 2 (0.1), 1 -> 3 (0.3), 1 -> 2 (0.2), 2 -> 3 (0.3).
    # Strongest path 0-1-3 (bottleneck 0.3); then 0-1-2-3 (0.2); then 0-2-3 (0.1); total 0.6
    # (the decomposition of Metzner, Schütte & Vanden-Eijnden 2009, Sec. 6).
    C = np.zeros((4, 4))
    C[0, 1], C[0, 2], C[1, 3], C[1, 2], C[2, 3] = 0.5, 0.1, 0.3, 0.2, 0.3
    rf = hand_flux(C, [0], [3], states=[7, 8, 9, 10])
    paths = rf.routes(1.0)
    assert [p.states for p in paths] == [(7, 8, 10), (7, 8, 9, 10), (7, 9, 10)]
    np.testing.assert_allclose([p.flux for p in paths], [0.3, 0.2, 0.1])
    np.testing.assert_allclose([p.share for p in paths], [0.5, 1 / 3, 1 / 6])
    assert [p.states for p in rf.routes(0.5)] == [(7, 8, 10)]
    assert len(rf.routes(1.0, max_paths=2)) == 2
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # an explicit max_paths stops quietly
        rf.routes(1.0, max_paths=1)
    table = rf.routes_table(1.0)
    np.testing.assert_allclose(table["cumulative_share"], [0.5, 5 / 6, 1.0])
    assert list(table["length"]) == [2, 3, 2]
    assert isinstance(paths[0], Route)


def best_bottleneck_brute_force(C, a, b):
    """Largest min-edge flux over all simple A -> B paths, by enumeration (slow, obvious)."""
    n = C.shape[0]
    best = 0.0
    stack = [(int(s), (int(s),), np.inf) for s in np.flatnonzero(a)]
    while stack:
        node, path, width = stack.pop()
        if b[node]:
            best = max(best, width)
            continue
        for nxt in np.flatnonzero(C[node] > 0):
            if nxt not in path:
                stack.append((int(nxt), path + (int(nxt),), min(width, C[node, nxt])))
    return best


@settings(max_examples=25, deadline=None)
@given(st.tuples(st.integers(4, 7), st.integers(0, 10_000), st.booleans()))
def test_pathway_decomposition_is_complete_and_strongest_first(args):
    # Route fluxes add up to the total flux when the decomposition is complete, and the first
    # path has the largest bottleneck of all simple paths (Metzner, Schütte & Vanden-Eijnden
    # 2009, Sec. 6; checked against enumeration of every path).
    n, seed, rev = args
    T = random_chain(n, seed, reversible=rev, sparsity=0.4)
    pi = stationary(T)
    rf = transition_paths(T, pi, [0], [n - 1])
    paths = rf.routes(1.0)
    assert sum(p.flux for p in paths) == pytest.approx(rf.throughput, rel=1e-9)
    assert sum(p.share for p in paths) == pytest.approx(1.0, rel=1e-9)
    a, b = mask(n, [0]), mask(n, [n - 1])
    assert paths[0].flux == pytest.approx(best_bottleneck_brute_force(rf.net_current, a, b), rel=1e-12)
    fluxes = [p.flux for p in paths]
    assert all(x >= y * (1 - 1e-12) for x, y in zip(fluxes, fluxes[1:]))  # capacities only shrink
    for p in paths:
        assert p.states[0] == 0 and p.states[-1] == n - 1 and len(set(p.states)) == len(p.states)
        assert all(rf.net_current[i, j] > 0 for i, j in zip(p.states, p.states[1:]))


def test_birth_death_chain_has_a_single_pathway():
    # On a line every reactive trajectory passes 0, 1, ..., N: one path with all the flux.
    N = 6
    T = birth_death(np.r_[np.full(N, 0.3), 0.0], np.r_[0.0, np.full(N, 0.4)])
    pi = stationary(T)
    rf = transition_paths(T, pi, [0], [N])
    paths = rf.routes()
    assert len(paths) == 1 and paths[0].states == tuple(range(N + 1))
    assert paths[0].share == pytest.approx(1.0)


# --------------------------------------------------------------------------- bad input

def test_overlapping_sets_name_the_shared_labels():
    T = random_chain(4, 0)
    pi = stationary(T)
    labels = [5, 6, 7, 8]
    with pytest.raises(InputError, match=r"source and target must not share.*state\(s\) 7"):
        transition_paths(T, pi, [0, 2], [2, 3], states=labels)
    with pytest.raises(InputError, match=r"share.*6"):
        splitting_probability(T, [1], [1], states=labels)
    with pytest.raises(InputError, match=r"share"):
        mean_passage_time(T, pi, [1, 2], [2], states=labels)
    with pytest.raises(InputError, match=r"sets\[0\] and sets\[1\] must not share.*8"):
        passage_time_matrix(T, pi, [[0, 3], [3]], states=labels)


@pytest.mark.parametrize("bad, match", [
    ([], "target is empty"),
    ([4], "outside the 4 states"),
    ([-1], "outside the 4 states"),
    ([0.5], "integer state positions"),
    (np.array([True, False]), "boolean mask must have length 4"),
])
def test_bad_target_sets(bad, match):
    with pytest.raises(InputError, match=match):
        hitting_steps(random_chain(4, 0), bad)


def test_boolean_masks_are_accepted():
    T = random_chain(4, 0)
    np.testing.assert_allclose(hitting_steps(T, np.array([False, False, True, True])), hitting_steps(T, [2, 3]))


@pytest.mark.parametrize("T, match", [
    (np.ones((2, 3)) / 3, "square"),
    ([[0.5, 0.6], [0.5, 0.5]], "row 0 sums to 1.1"),
    ([[1.5, -0.5], [0.5, 0.5]], r"non-negative.*T\[0, 1\]"),
    ([[np.nan, 1], [0.5, 0.5]], "NaN"),
    ("abc", "square row-stochastic"),
])
def test_bad_transition_matrix(T, match):
    with pytest.raises(InputError, match=match):
        hitting_steps(T, [0])


def test_bad_stationary_distribution_and_options():
    T = random_chain(3, 1)
    pi = stationary(T)
    with pytest.raises(InputError, match="not the stationary distribution"):
        transition_paths(T, np.ones(3) / 3, [0], [2])
    with pytest.raises(InputError, match=r"shape \(3,\)"):
        transition_paths(T, pi[:2], [0], [2])
    with pytest.raises(InputError, match="strictly positive"):
        transition_paths(T, np.array([0.0, 0.5, 0.5]), [0], [2])
    with pytest.raises(InputError, match="required for the committor backward in time"):
        splitting_probability(T, [0], [2], reverse_time=True)
    with pytest.raises(InputError, match="time_per_step"):
        transition_paths(T, pi, [0], [2], time_per_step=0)
    with pytest.raises(InputError, match="unit"):
        transition_paths(T, pi, [0], [2], unit="")
    with pytest.raises(InputError, match="states must be 3"):
        transition_paths(T, pi, [0], [2], states=[1, 2])
    rf = transition_paths(T, pi, [0], [2])
    with pytest.raises(InputError, match=r"fraction must be a number in \(0, 1\]"):
        rf.routes(1.5)
    with pytest.raises(InputError, match="max_paths must be a positive integer"):
        rf.routes(max_paths=0)
    with pytest.raises(InputError, match="list of sets"):
        passage_time_matrix(T, pi, np.array([0, 1]))


def test_no_warnings_on_irreducible_chains():
    T = random_chain(6, 9, reversible=True)
    pi = stationary(T)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        transition_paths(T, pi, [0], [5]).routes()
        splitting_probability(T, [0], [5], reverse_time=True, pi=pi)


def test_default_path_limit_warns_when_it_stops_the_search(monkeypatch):
    # A widely branched flux: 0 -> k -> 5 for k = 1..4 needs 4 paths for the whole flux.
    import msmkit.kinetics as kin
    C = np.zeros((6, 6))
    C[0, 1:5] = [0.4, 0.3, 0.2, 0.1]
    C[1:5, 5] = [0.4, 0.3, 0.2, 0.1]
    rf = hand_flux(C, [0], [5])
    monkeypatch.setattr(kin, "DEFAULT_MAX_PATHS", 2)
    with pytest.warns(DiagnosticWarning, match=r"stopped after 2 routes carrying 70.0% .*asked for 100.0%"):
        paths = rf.routes(1.0)
    assert [p.states for p in paths] == [(0, 1, 5), (0, 2, 5)]


def test_flux_coarse_grained_onto_blocks_keeps_the_total_flux():
    # Lumping the gross flux onto sets (Noé et al., PNAS 106, 19011 (2009)): the net flux out of
    # the source set equals the total flux F of the fine network, flux is conserved at the middle
    # set, and a complete pathway decomposition of the coarse flux adds up to F.
    T = np.array([[0.80, 0.15, 0.05, 0.00, 0.00, 0.00],
                  [0.10, 0.80, 0.05, 0.05, 0.00, 0.00],
                  [0.02, 0.03, 0.80, 0.10, 0.05, 0.00],
                  [0.00, 0.02, 0.08, 0.80, 0.05, 0.05],
                  [0.00, 0.00, 0.05, 0.05, 0.80, 0.10],
                  [0.00, 0.00, 0.00, 0.05, 0.15, 0.80]])
    pi = stationary(T)
    labels = np.array([10, 11, 20, 21, 30, 31])
    fine = transition_paths(T, pi, [0, 1], [4, 5], states=labels)
    coarse = fine.lump([[10, 11], [20, 21], [30, 31]])
    net = coarse.net_current
    assert net[0].sum() == pytest.approx(fine.throughput, rel=1e-10)
    assert net[:, 2].sum() == pytest.approx(fine.throughput, rel=1e-10)
    assert net[1].sum() == pytest.approx(net[:, 1].sum(), rel=1e-10)
    assert coarse.equilibrium == pytest.approx([pi[:2].sum(), pi[2:4].sum(), pi[4:].sum()])
    paths = coarse.routes(fraction=1.0)
    assert sum(p.flux for p in paths) == pytest.approx(fine.throughput, rel=1e-9)
    assert paths[0].states[0] == 0 and paths[0].states[-1] == 2
    with pytest.raises(InputError, match="union of whole sets"):
        fine.lump([[10], [11, 20, 21], [30, 31]])
    with pytest.raises(InputError, match="cover every state"):
        fine.lump([[10, 11], [30, 31]])
