"""Tests of msmkit.counts: transition counting and communicating classes.

References: a slow, obviously correct Python loop over frame pairs (sliding window: every pair
(t, t + lag); strided: t = 0, lag, 2 lag, ...; Prinz et al., J. Chem. Phys. 134, 174105 (2011),
Sec. IV), and brute-force reachability (transitive closure of the count graph) for the
communicating classes (common practice); collections.Counter over the (i, j) pairs for the dense
tally on several threads (common practice).
"""
import tracemalloc
from collections import Counter

import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from msmkit import counts as counts_module
from msmkit.counts import communicating_classes, count_transitions, kept_states, run_count_rows
from msmkit.errors import InputError


# --------------------------------------------------------------------------- references

def loop_counts(runs, lag, n, every_frame=True):
    """Counts by walking over every frame pair (t, t + lag) in plain Python."""
    C = np.zeros((n, n), dtype=np.int64)
    for run in runs:
        run = [int(x) for x in run]
        step = 1 if every_frame else lag
        for t in range(0, len(run) - lag, step):
            i, j = run[t], run[t + lag]
            if i >= 0 and j >= 0:
                C[i, j] += 1
    return C


def reachability_sets(C):
    """Communicating classes by brute force: i ~ j when each reaches the other (transitive
    closure by repeated boolean multiplication); states with no counts at all are left out."""
    C = np.asarray(C)
    n = C.shape[0]
    R = (C > 0) | np.eye(n, dtype=bool)
    while True:
        R2 = (R.astype(int) @ R.astype(int)) > 0
        if np.array_equal(R2, R):
            break
        R = R2
    mutual = R & R.T
    visited = (C.sum(axis=0) + C.sum(axis=1)) > 0
    sets, seen = [], set()
    for i in range(n):
        if visited[i] and i not in seen:
            members = [j for j in range(n) if mutual[i, j]]
            seen.update(members)
            sets.append(members)
    return sets


# --------------------------------------------------------------------------- strategies

@st.composite
def label_runs(draw, max_state=5, max_runs=4, max_len=40):
    n_runs = draw(st.integers(1, max_runs))
    runs = [np.array(draw(st.lists(st.integers(-1, max_state), min_size=0, max_size=max_len)), dtype=np.int32)
            for _ in range(n_runs)]
    return runs


# --------------------------------------------------------------------------- counting

def test_docstring_example():
    # Frames 0 0 1 1 0 at lag 1: pairs (0,0), (0,1), (1,1), (1,0) -- counted by hand.
    assert count_transitions([0, 0, 1, 1, 0], lag=1).toarray().tolist() == [[1, 1], [1, 1]]


def test_returns_integer_csr():
    C = count_transitions([np.array([0, 2, 1, 2])], 1)
    assert sp.isspmatrix_csr(C) and C.dtype == np.int64 and C.shape == (3, 3)


@settings(max_examples=50, deadline=None)
@given(runs=label_runs(), lag=st.integers(1, 6), every_frame=st.booleans())
def test_counts_match_python_loop(runs, lag, every_frame):
    longest = max(r.size for r in runs)
    assigned = any(np.any(r >= 0) for r in runs)
    if lag >= longest or not assigned:
        with pytest.raises(InputError):
            count_transitions(runs, lag, every_frame=every_frame)
        return
    n = max(int(r.max()) for r in runs if r.size) + 1
    C = count_transitions(runs, lag, every_frame=every_frame)
    np.testing.assert_array_equal(C.toarray(), loop_counts(runs, lag, n, every_frame))


@st.composite
def sticky_label_runs(draw, max_state=4, max_runs=3):
    """Runs that dwell in a state for many frames, as molecular-dynamics labels do."""
    runs = []
    for _ in range(draw(st.integers(1, max_runs))):
        pieces = draw(st.lists(st.tuples(st.integers(-1, max_state), st.integers(1, 15)), min_size=1, max_size=12))
        runs.append(np.concatenate([np.full(k, s, dtype=np.int32) for s, k in pieces]))
    return runs


@settings(max_examples=50, deadline=None)
@given(runs=st.one_of(label_runs(max_len=60), sticky_label_runs()), lag=st.integers(1, 6), every_frame=st.booleans(),
       block=st.integers(1, 9), parallel=st.booleans())
def test_counts_match_python_loop_in_small_blocks(runs, lag, every_frame, block, parallel):
    # a tiny buffer makes the counting flush many partial blocks (and split runs across them);
    # parallel=True counts on three threads sharing the pieces, even for tiny inputs
    longest = max(r.size for r in runs)
    if lag >= longest or not any(np.any(r >= 0) for r in runs):
        return
    n = max(int(r.max()) for r in runs if r.size) + 1
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(counts_module, "COUNT_BLOCK", block)
        mp.setattr(counts_module, "RLE_PROBE", 8)  # decide on sticky encoding from a short probe
        mp.setattr(counts_module, "_count_threads", lambda n_pairs, cells: 3 if parallel else 1)
        C = count_transitions(runs, lag, every_frame=every_frame)
    np.testing.assert_array_equal(C.toarray(), loop_counts(runs, lag, n, every_frame))


def counter_counts(runs, lag, every_frame):
    """Counts by collections.Counter over the (i, j) pairs, -1 ends left out (common practice)."""
    step = 1 if every_frame else lag
    return Counter((int(r[t]), int(r[t + lag])) for r in runs for t in range(0, len(r) - lag, step)
                   if r[t] >= 0 and r[t + lag] >= 0)


@st.composite
def mixed_label_runs(draw):
    """Runs joined from sticky and jumpy stretches, with holes (-1): both tally paths in one run."""
    seed = draw(st.integers(0, 2 ** 32 - 1))
    rng = np.random.default_rng(seed)
    n = draw(st.sampled_from([1, 3, 17, 60]))
    runs = []
    for _ in range(draw(st.integers(1, 4))):
        parts = []
        for _ in range(draw(st.integers(1, 4))):
            size = int(rng.integers(1, 400))
            if rng.random() < 0.5:  # sticky: dwell times of ~30 frames
                parts.append(np.repeat(rng.integers(0, n, size // 30 + 1), 30)[:size])
            else:
                parts.append(rng.integers(0, n, size))
        run = np.concatenate(parts).astype(np.int32)
        run[rng.random(run.size) < draw(st.sampled_from([0.0, 0.02]))] = -1
        runs.append(run)
    return runs, n


@settings(max_examples=60, deadline=None)
@given(data=mixed_label_runs(), lag=st.integers(1, 9), every_frame=st.booleans(),
       block=st.integers(1, 700), threads=st.integers(1, 4), probe=st.sampled_from([8, 1 << 13]))
def test_dense_tally_on_threads_matches_a_counter(data, lag, every_frame, block, threads, probe):
    # the dense tally alone (count_flat), on 1-4 threads sharing pieces of `block` pairs, against
    # a Counter over the pairs: exact, whatever the split and whichever path each piece takes
    runs, n = data
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(counts_module, "COUNT_BLOCK", block)
        mp.setattr(counts_module, "RLE_PROBE", probe)
        mp.setattr(counts_module, "_count_threads", lambda n_pairs, cells: threads)
        flat = counts_module.count_flat(runs, lag, n, every_frame)
    assert flat.dtype == np.int64 and flat.shape == (n * n,)
    expected = np.zeros(n * n, dtype=np.int64)
    for (i, j), k in counter_counts(runs, lag, every_frame).items():
        expected[i * n + j] = k
    np.testing.assert_array_equal(flat, expected)


def test_the_group_kernel_on_a_worker_counts_sparsely_when_pairs_are_fewer_than_cells():
    # a dask task over 2000 states with few pairs: the kernel must not build the 2000**2 int64
    # tally (32 MB); its result is the Counter of the pairs
    rng = np.random.default_rng(5)
    runs = [rng.integers(0, 2000, 5000).astype(np.int32) for _ in range(3)]
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(counts_module, "worker_threads", lambda: 2)  # as inside a dask worker
        tracemalloc.start()
        try:
            (codes, counts), sizes = counts_module.count_codes(runs, 3, 2000)
            peak = tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()
    assert sizes == [5000] * 3 and peak < 4 << 20
    assert {(int(c) // 2000, int(c) % 2000): int(k) for c, k in zip(codes, counts)} == counter_counts(runs, 3, True)


def test_sticky_labels_match_python_loop():
    rng = np.random.default_rng(4)
    # dwell times of ~50 frames: consecutive pair codes mostly repeat
    runs = [np.repeat(rng.integers(0, 6, size=40), rng.integers(1, 100, size=40)).astype(np.int32) for _ in range(3)]
    runs[1][100:130] = -1
    for lag in (1, 7):
        for every_frame in (True, False):
            np.testing.assert_array_equal(count_transitions(runs, lag, every_frame=every_frame).toarray(),
                                          loop_counts(runs, lag, 6, every_frame))


def test_strided_by_hand():
    run = np.array([0, 1, 2, 0, 1, 2, 0])
    # lag 2 strided: pairs (t, t+2) for t = 0, 2, 4 -> (0,2), (2,1), (1,0)
    C = count_transitions(run, 2, every_frame=False).toarray()
    expected = np.zeros((3, 3), int)
    expected[0, 2] = expected[2, 1] = expected[1, 0] = 1
    np.testing.assert_array_equal(C, expected)
    # every_frame: t = 0..4 -> (0,2), (1,0), (2,1), (0,2), (1,0)
    expected_sliding = np.zeros((3, 3), int)
    expected_sliding[0, 2] = 2
    expected_sliding[1, 0] = 2
    expected_sliding[2, 1] = 1
    np.testing.assert_array_equal(count_transitions(run, 2).toarray(), expected_sliding)


def test_unassigned_frames_are_skipped():
    run = np.array([0, -1, 1, 1, -1, -1, 0, 1])
    # lag 1 pairs: (0,-1) (-1,1) (1,1) (1,-1) (-1,-1) (-1,0) (0,1): only (1,1) and (0,1) count
    C = count_transitions(run, 1).toarray()
    np.testing.assert_array_equal(C, [[0, 1], [0, 1]])
    # lag 2 pairs: (0,1) (-1,1) (1,-1) (1,-1) (-1,0) (-1,1): only (0,1)
    np.testing.assert_array_equal(count_transitions(run, 2).toarray(), [[0, 1], [0, 0]])


def test_runs_shorter_than_lag_contribute_nothing():
    long = np.array([0, 1, 1, 0, 2, 2, 1, 0])
    short = [np.array([2, 0]), np.array([1]), np.array([0, 1, 2])]  # 3 frames: no pair at lag 3
    alone = count_transitions([long], 3).toarray()
    together = count_transitions([short[0], long, short[1], short[2]], 3).toarray()
    np.testing.assert_array_equal(alone, together)
    assert together.sum() == long.size - 3


def test_n_states_pads_the_matrix():
    C = count_transitions([0, 1, 1, 0], 1, n_states=5)
    assert C.shape == (5, 5)
    np.testing.assert_array_equal(C.toarray()[:2, :2], [[0, 1], [1, 1]])
    assert C.toarray()[2:].sum() == 0 and C.toarray()[:, 2:].sum() == 0


def test_total_sliding_counts():
    rng = np.random.default_rng(0)
    runs = [rng.integers(0, 4, size=m) for m in (50, 7, 120)]
    for lag in (1, 5, 10):
        # every frame pair (t, t + lag) of each run is counted once (no -1 here)
        assert count_transitions(runs, lag).sum() == sum(max(m - lag, 0) for m in (50, 7, 120))


# --------------------------------------------------------------------------- per-run rows

@settings(max_examples=40, deadline=None)
@given(runs=label_runs(max_len=60), lag=st.integers(1, 5), every_frame=st.booleans(), blocks=st.integers(1, 7))
def test_run_count_rows_blocks_sum_to_counts(runs, lag, every_frame, blocks):
    longest = max(r.size for r in runs)
    if lag >= longest or not any(np.any(r >= 0) for r in runs):
        return
    rows, n = run_count_rows(runs, lag, every_frame=every_frame, blocks_per_run=blocks)
    assert rows.shape == (len(runs) * blocks, n * n) and rows.dtype == np.int64
    total = np.asarray(rows.sum(axis=0)).ravel().reshape(n, n)
    np.testing.assert_array_equal(total, count_transitions(runs, lag, every_frame=every_frame).toarray())
    # the blocks of each run add up to that run's own counts (Python loop reference)
    for r, run in enumerate(runs):
        per_run = np.asarray(rows[r * blocks:(r + 1) * blocks].sum(axis=0)).ravel().reshape(n, n)
        np.testing.assert_array_equal(per_run, loop_counts([run], lag, n, every_frame))
    assert rows.data.min(initial=1) > 0


def test_run_count_rows_blocks_are_contiguous():
    run = np.array([0] * 10 + [1] * 10)  # first half all 0 -> 0, second half all 1 -> 1
    rows, n = run_count_rows([run], 1, blocks_per_run=2)
    first, second = rows.toarray().reshape(2, n, n)
    assert first[0, 0] > 0 and first[1, 1] == 0
    assert second[1, 1] > 0 and second[0, 0] == 0


def test_run_count_rows_bad_blocks():
    with pytest.raises(InputError, match=r"blocks_per_run must be an integer not less than 1, but got 0"):
        run_count_rows([0, 1, 0], 1, blocks_per_run=0)


# --------------------------------------------------------------------------- connected sets

@st.composite
def sparse_counts(draw, max_n=9):
    n = draw(st.integers(1, max_n))
    density = draw(st.floats(0.05, 0.5))
    seed = draw(st.integers(0, 2 ** 32 - 1))
    rng = np.random.default_rng(seed)
    C = rng.integers(1, 20, size=(n, n)) * (rng.random((n, n)) < density)
    return C


@settings(max_examples=50, deadline=None)
@given(C=sparse_counts())
def test_connected_sets_match_reachability(C):
    sets = communicating_classes(sp.csr_matrix(C))
    expected = reachability_sets(C)
    assert sorted(s.tolist() for s in sets) == sorted(expected)
    for s in sets:
        assert np.all(np.diff(s) > 0)  # each set sorted ascending
    # order: most counts inside the set first, ties to the lowest label
    keys = [(-int(C[np.ix_(s, s)].sum()), int(s.min())) for s in sets]
    assert keys == sorted(keys)
    if sets:
        np.testing.assert_array_equal(kept_states(C), sets[0])
        # dense and sparse input agree
        np.testing.assert_array_equal(kept_states(sp.csr_matrix(C)), sets[0])


def test_kept_set_is_the_one_with_most_counts_not_most_states():
    C = np.zeros((6, 6), int)
    C[np.ix_([0, 1, 2], [0, 1, 2])] = 1          # three states, 9 counts
    C[4, 5] = C[5, 4] = 50                      # two states, 100 counts
    C[2, 4] = 3                                  # one-way link: not strongly connected
    assert kept_states(C).tolist() == [4, 5]
    sets = communicating_classes(C)
    assert [s.tolist() for s in sets] == [[4, 5], [0, 1, 2]]  # state 3 never visited: left out


def test_kept_set_ties_go_to_lowest_label():
    C = np.zeros((6, 6), int)
    C[4, 5] = C[5, 4] = 7
    C[1, 2] = C[2, 1] = 7
    assert kept_states(C).tolist() == [1, 2]
    C[5, 5] = 1  # one more count breaks the tie
    assert kept_states(C).tolist() == [4, 5]


def test_one_way_transition_gives_singletons():
    C = np.array([[0, 5], [0, 0]])
    assert [s.tolist() for s in communicating_classes(C)] == [[0], [1]]


def test_largest_connected_set_of_nothing():
    with pytest.raises(InputError, match=r"counts hold no transitions"):
        kept_states(np.zeros((3, 3)))
