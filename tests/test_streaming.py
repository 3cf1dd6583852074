"""Streaming: data on disk flow through TICA, clustering on a stride, assignment and counting in
bounded chunks, with the same answers as the in-memory path.

The reference for every step is the same computation on the whole arrays in memory; bounded
reads are checked by a lazy run that records the largest block it was asked for, and bounded
memory by tracemalloc (numpy reports array buffers to it).
"""
from __future__ import annotations

import tracemalloc

import numpy as np
import pytest

import msmkit as mk
from msmkit import counts as counts_module
from msmkit.io import LazyRun

CHUNK = 97  # small and prime: chunk edges fall everywhere relative to lags and strides


def _runs(seed=0):
    """Four runs, four features: a slow two-state switch seen through noisy, mixed features."""
    rng = np.random.default_rng(seed)
    runs = []
    for i in range(4):
        n = 2500 + 611 * i
        state = np.cumsum(rng.random(n) < 0.01) % 2
        slow = state[:, None] * np.array([2.0, -1.0, 0.5, 0.0])
        runs.append((slow + rng.normal(size=(n, 4)) * 0.4).astype(np.float32 if i % 2 else np.float64))
    return runs


@pytest.fixture
def on_disk(tmp_path):
    runs = _runs()
    for i, r in enumerate(runs):
        np.save(tmp_path / f"r{i}.npy", r)
    return runs, tmp_path


def _pipeline(trajs, tmp_path, how):
    tica = mk.TICA(7, dim=2, chunk_size=CHUNK).fit(trajs)
    if how == "lazy":
        low = tica.transform(trajs, lazy=True)
    elif how == "out":
        low = tica.transform(trajs, out=tmp_path / "tica_out")
    else:
        low = tica.transform(trajs)
    micro = mk.Microstates(9, stride=4, seed=2, chunk_size=CHUNK).fit(low)
    labels = micro.assign(low)
    C = mk.count_transitions(labels, 5)
    return tica, micro, labels, C


@pytest.mark.parametrize("how", ["lazy", "out"])
@pytest.mark.parametrize("source", ["lazy_files", "memory_mapped"])
def test_streamed_pipeline_equals_in_memory(on_disk, how, source):
    runs, folder = on_disk
    if source == "lazy_files":
        trajs = mk.load_trajectories(str(folder / "r*.npy"))
    else:  # numpy memory maps are in-memory arrays to msmkit: same answers, chunked reads
        trajs = [np.load(folder / f"r{i}.npy", mmap_mode="r") for i in range(len(runs))]
    ref_tica, ref_micro, ref_labels, ref_C = _pipeline([np.array(r) for r in runs], folder, "memory")
    tica, micro, labels, C = _pipeline(trajs, folder, how)
    np.testing.assert_allclose(tica.eigenvalues_, ref_tica.eigenvalues_, rtol=1e-12)
    np.testing.assert_allclose(tica.components_, ref_tica.components_, rtol=1e-10, atol=1e-12)
    # the strided frames and the seed are the same, so scikit-learn gives the same centers
    np.testing.assert_allclose(micro.centers_, ref_micro.centers_, rtol=1e-9, atol=1e-12)
    assert all(a.dtype == np.int32 and np.array_equal(a, b) for a, b in zip(labels, ref_labels))
    assert all(np.array_equal(a, b) for a, b in zip(micro.labels_, ref_labels))
    assert np.array_equal(C.toarray(), ref_C.toarray())


class _CountingRun(LazyRun):
    """An in-memory run posing as a lazy one, recording the largest block it was asked to read."""

    def __init__(self, arr):
        super().__init__("counting-run", arr.shape, arr.dtype)
        self.arr = arr
        self.largest = 0

    def _read(self, start, stop):
        self.largest = max(self.largest, stop - start)
        return self.arr[start:stop].copy()


def test_every_step_reads_in_bounded_chunks(tmp_path):
    runs = [_CountingRun(r) for r in _runs()]
    tica = mk.TICA(7, dim=2, chunk_size=CHUNK).fit(runs)
    lazy = tica.transform(runs, lazy=True)
    micro = mk.Microstates(9, stride=4, seed=2, chunk_size=60).fit(lazy)  # strided reads
    micro.assign(lazy)
    tica.transform(runs, out=tmp_path)
    assert max(r.largest for r in runs) == CHUNK  # TICA reads whole chunks, nothing reads more


def test_strided_frames_honour_the_chunk_size():
    from msmkit.states import _strided_frames

    arr = np.arange(3000.0).reshape(1000, 3)
    for stride in (1, 3, 7, 250):
        run = _CountingRun(arr)
        for start, stop in ((0, 1000), (5, 998), (333, 334)):
            got = _strided_frames(run, stride, 40, start, stop)
            first = -(-start // stride) * stride
            assert np.array_equal(got, arr[first:stop:stride])
        assert run.largest <= max(40 - 40 % stride, stride)


@pytest.mark.parametrize("every_frame", [True, False])
def test_counting_in_small_blocks_is_exact(monkeypatch, sample_chain, reversible_chain, every_frame):
    runs = sample_chain(reversible_chain, 1000, n_runs=5, seed=4)
    runs[2][::17] = -1
    expected = np.zeros((3, 3), dtype=np.int64)
    for r in runs:  # explicit loop over frame pairs (common practice)
        for t in range(0, len(r) - 3, 1 if every_frame else 3):
            if r[t] >= 0 and r[t + 3] >= 0:
                expected[r[t], r[t + 3]] += 1
    for block in (1, 7, 250, 1 << 22):
        monkeypatch.setattr(counts_module, "COUNT_BLOCK", block)
        assert np.array_equal(mk.count_transitions(runs, 3, every_frame=every_frame).toarray(), expected)


def test_peak_memory_does_not_grow_with_the_data(tmp_path):
    """tracemalloc peak of TICA fit + transform to files + clustering on a stride + assignment +
    counting, for 200 000 frames x 4 float64 features (6.4 MB) read in chunks of 2000 frames.

    What may grow with the frames: the int32 labels (4 bytes a frame, held twice here: fitted
    and assigned) and the counting buffer (8 bytes a pair, at most COUNT_BLOCK pairs); the rest
    -- chunks, the strided sample (4000 frames), centers -- must fit in 1 MB. Holding the data
    (6.4 MB) or the projection (3.2 MB) at once would break the budget."""
    n, d = 200_000, 4
    rng = np.random.default_rng(1)
    path = tmp_path / "big.npy"
    np.save(path, np.cumsum(rng.normal(size=(n, d)), axis=0) * 0.01 + rng.normal(size=(n, d)))
    trajs = mk.load_trajectories(path)
    tracemalloc.start()
    try:
        tica = mk.TICA(10, dim=2, chunk_size=2000).fit(trajs)
        low = tica.transform(trajs, out=tmp_path / "low")
        micro = mk.Microstates(20, stride=50, seed=0, chunk_size=2000).fit(low)
        labels = micro.assign(low)
        mk.count_transitions(labels, 10)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    budget = 2 * 4 * n + 8 * min(n, counts_module.COUNT_BLOCK) + 1_000_000
    assert peak < budget, f"peak {peak / 1e6:.2f} MB, budget {budget / 1e6:.2f} MB"
