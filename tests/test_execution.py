"""The execution layer in this process: planning of tasks, mapping kernels, completeness checks.

The dask path of the same functions is exercised by tests/test_distributed.py (every test there
runs on both back ends). References: common practice (a partition of the frames must cover each
frame exactly once, in order).
"""
import numpy as np
import pytest

import msmkit as mk
from msmkit import _execution as execution
from msmkit.counts import count_codes, count_flat, prepare_counting
from msmkit.distributed import ClusterError


@pytest.mark.parametrize("n_groups", [1, 2, 3, 7, 50])
def test_groups_keep_every_run_once_in_order(n_groups):
    sizes = [5, 100, 1, 1, 40, 0, 33]
    groups = execution.groups_of(sizes, n_groups)
    assert [i for g in groups for i in g] == list(range(len(sizes)))
    assert len(groups) <= max(n_groups, 1) + 1


@pytest.mark.parametrize("n_groups,minimum", [(1, 1), (3, 1), (8, 1), (8, 30), (100, 7)])
def test_pieces_cover_every_frame_once_in_order(n_groups, minimum):
    sizes = [5, 100, 1, 0, 40, 33]
    groups = execution.pieces_of(sizes, n_groups, minimum)
    covered = [[] for _ in sizes]
    for g in groups:
        for run, start, stop in g:
            assert stop > start
            covered[run].extend(range(start, stop))
    assert covered == [list(range(n)) for n in sizes]
    # every group but the last holds at least ``minimum`` frames
    assert all(sum(b - a for _, a, b in g) >= minimum for g in groups[:-1])


def _frames_and_offset(run, offset):
    return len(run), float(np.asarray(run).sum()) + offset


def test_map_runs_here_calls_the_kernel_once_per_run_in_order():
    rng = np.random.default_rng(0)
    runs = [rng.normal(size=(n, 2)) for n in (3, 10, 1)]
    got = execution.map_runs(_frames_and_offset, runs, 0.5)
    assert got == [(len(r), float(r.sum()) + 0.5) for r in runs]
    per_run = execution.map_runs(_frames_and_offset, runs, per_run=[1.0, 2.0, 3.0])
    assert [x[1] for x in per_run] == [float(r.sum()) + k for r, k in zip(runs, (1.0, 2.0, 3.0))]


def _halves(pieces):
    return [np.asarray(run[start:stop]) * 2 for run, start, stop in pieces]


def test_map_pieces_here_gives_whole_runs():
    runs = [np.arange(6.0).reshape(3, 2), np.arange(4.0).reshape(2, 2)]
    got = execution.map_pieces(_halves, runs)
    assert len(got) == 2 and all(len(p) == 1 for p in got)
    for r, p in zip(runs, got):
        np.testing.assert_array_equal(p[0], r * 2)


def test_the_counting_kernel_of_a_group_adds_up_to_the_whole():
    # the dask path sums count_codes over groups of whole runs; summing by hand over any split
    # must give count_flat of all runs (integers: exactly)
    rng = np.random.default_rng(3)
    runs, lag, n = prepare_counting([rng.integers(-1, 6, size=m) for m in (50, 7, 300, 2, 90)], 3, None)
    whole = count_flat(runs, lag, n)
    for groups in execution.groups_of([r.size for r in runs], 2), [[0], [1, 2], [3, 4]]:
        total = np.zeros(n * n, dtype=np.int64)
        for g in groups:
            (codes, counts), sizes = count_codes([runs[i] for i in g], lag, n)
            assert sizes == [runs[i].size for i in g]
            total[codes] += counts
        np.testing.assert_array_equal(total, whole)
    np.testing.assert_array_equal(mk.count_transitions(runs, lag).toarray().ravel(), whole)


def test_an_incomplete_result_is_a_cluster_error_naming_the_runs():
    runs = [np.zeros((5, 2)), np.zeros((7, 2)), np.zeros((2, 2))]
    execution.check_complete(runs, [5, 7, 2], "TICA.fit")  # complete: nothing raised
    with pytest.raises(ClusterError, match=r"TICA.fit: results for run 1 did not come back complete"):
        execution.check_complete(runs, [5, 6, 2], "TICA.fit")
    with pytest.raises(ClusterError, match=r"run 0, run 1, run 2"):
        execution.check_complete(runs, [5, 7], "assignment")


def test_a_vanished_file_is_an_input_error_on_the_local_path_too(tmp_path):
    path = tmp_path / "a.npy"
    np.save(path, np.ones((20, 2)))
    trajs = mk.load_trajectories(path)
    path.unlink()
    with pytest.raises(mk.InputError, match=r"a\.npy: cannot read the file any more"):
        trajs.check_values()
