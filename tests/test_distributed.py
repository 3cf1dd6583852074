"""The dask back end: every walk over runs gives the same answer with ``client=`` as in memory.

One suite, two back ends (the ``backend`` fixture: "memory" passes no client, "dask" a client of
a real ``dask.distributed.LocalCluster`` with two single-threaded worker processes, started once
per session). Each test checks the result against a reference computed here with numpy/scipy
only, so both back ends are held to the same outside answer, and the dask result is also
compared with the in-memory one (exact for counts and labels, to rounding for TICA).
"""
from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest
import scipy.linalg as la

import msmkit as mk
from msmkit.errors import InputError
from msmkit.io import LazyRun

distributed = pytest.importorskip("distributed")
dask = pytest.importorskip("dask")


@pytest.fixture(scope="session")
def dask_client():
    """A LocalCluster of 2 worker processes x 1 thread on 127.0.0.1, no dashboard.

    A task may kill the worker running it once and be rerun; a second death fails the task (so the tests of
    dying workers stay short)."""
    with dask.config.set({"distributed.scheduler.allowed-failures": 1}):
        cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                           host="127.0.0.1", dashboard_address=None)
    client = distributed.Client(cluster)
    yield client
    client.close()
    cluster.close()


@pytest.fixture(params=["memory", "dask"])
def backend(request):
    """Keyword arguments selecting the back end: {} or {"client": <dask client>}."""
    if request.param == "memory":
        return {}
    return {"client": request.getfixturevalue("dask_client")}


def _ou_runs(n_runs=4, seed=0):
    """Runs of a 3-D Ornstein-Uhlenbeck-like process (slow + fast coordinates) plus noise."""
    rng = np.random.default_rng(seed)
    runs = []
    for i in range(n_runs):
        n = 3000 + 700 * i
        x = np.zeros((n, 3))
        for t in range(1, n):
            x[t] = x[t - 1] * np.array([0.995, 0.9, 0.5]) + rng.normal(size=3) * [0.1, 0.3, 1.0]
        runs.append(x @ np.array([[1.0, 0.3, 0.1], [0.2, 1.0, 0.0], [0.0, 0.5, 1.0]]) + 5.0)
    return runs


@pytest.fixture(scope="module")
def ou_runs():
    return _ou_runs()


@pytest.fixture
def npy_runs(tmp_path, ou_runs):
    for i, r in enumerate(ou_runs):
        np.save(tmp_path / f"run{i}.npy", r)
    return mk.load_trajectories(str(tmp_path / "run*.npy")), tmp_path


def _tica_reference(runs, lag):
    """TICA from the definition (Perez-Hernandez et al., J. Chem. Phys. 139, 015102 (2013)):
    mean and C(0) over all frames, C(tau) over all pairs within runs, symmetrized, and the
    generalised symmetric eigenproblem solved by scipy.linalg.eigh."""
    x = np.concatenate(runs)
    mean = x.mean(axis=0)
    c0 = (x - mean).T @ (x - mean) / len(x)
    a = np.concatenate([r[:-lag] for r in runs]) - mean
    b = np.concatenate([r[lag:] for r in runs]) - mean
    ct = a.T @ b / len(a)
    ct = 0.5 * (ct + ct.T)
    w, v = la.eigh(ct, c0)
    order = np.argsort(-w)
    return mean, w[order], v[:, order]


# ------------------------------------------------------------------------------- loading

def test_load_trajectories_reads_every_file(backend, npy_runs, ou_runs, tmp_path):
    trajs, folder = npy_runs
    np.savetxt(folder / "extra.csv", ou_runs[0][:50], delimiter=",", header="a,b,c", comments="")
    got = mk.load_trajectories([str(folder / "run*.npy"), str(folder / "extra.csv")], **backend)
    assert len(got) == len(ou_runs) + 1
    assert got.sources[:len(ou_runs)] == trajs.sources
    for run, ref in zip(got, ou_runs + [ou_runs[0][:50]]):
        np.testing.assert_allclose(np.asarray(run), ref, rtol=1e-15)  # csv: text round trip
    assert got.feature_names == ("a", "b", "c")
    got.check_values(**backend)


def test_bad_values_are_found_on_either_back_end(backend, tmp_path):
    x = np.ones((100, 2))
    x[63, 1] = np.nan
    np.save(tmp_path / "bad.npy", x)
    trajs = mk.load_trajectories(tmp_path / "bad.npy", **backend)
    with pytest.raises(InputError, match=r"bad\.npy: frame 63 has nan"):
        trajs.check_values(chunk_size=10, **backend)


def test_file_vanishing_after_listing_names_the_file(backend, npy_runs):
    trajs, folder = npy_runs
    os.remove(folder / "run2.npy")
    with pytest.raises(InputError, match=r"run2\.npy: cannot read the file any more"):
        mk.TICA(5, dim=2).fit(trajs, **backend)


# ------------------------------------------------------------------------------- TICA

def test_tica_matches_the_definition(backend, npy_runs, ou_runs):
    trajs, _ = npy_runs
    tica = mk.TICA(10, dim=2, chunk_size=500).fit(trajs, **backend)
    mean, w, v = _tica_reference(ou_runs, 10)
    np.testing.assert_allclose(tica.mean_, mean, rtol=1e-12)
    np.testing.assert_allclose(tica.eigenvalues_, w[:2], rtol=1e-10)
    for comp, ref in zip(tica.components_, v[:, :2].T):
        np.testing.assert_allclose(np.abs(comp @ ref) / np.sqrt(ref @ ref) / np.sqrt(comp @ comp),
                                   1.0, rtol=1e-8)
    memory = mk.TICA(10, dim=2, chunk_size=500).fit(trajs)
    np.testing.assert_allclose(tica.eigenvalues_, memory.eigenvalues_, rtol=1e-13)
    np.testing.assert_allclose(tica.components_, memory.components_, rtol=1e-11, atol=1e-13)


@pytest.mark.parametrize("how", ["memory", "lazy", "out"])
def test_tica_transform_every_way(backend, npy_runs, ou_runs, tmp_path, how):
    trajs, _ = npy_runs
    tica = mk.TICA(10, dim=2, chunk_size=333, scaling="kinetic").fit(ou_runs)
    ref = [(r - tica.mean_) @ tica.components_.T * tica.eigenvalues_ for r in ou_runs]  # kinetic map
    kwargs = {"lazy": True} if how == "lazy" else {"out": tmp_path / "proj"} if how == "out" else {}
    got = tica.transform(trajs, **kwargs, **backend)
    assert got.feature_names == ("ic1", "ic2")
    for a, b in zip(got, ref):
        assert isinstance(a, LazyRun) == (how != "memory")
        np.testing.assert_allclose(np.asarray(a), b, rtol=1e-12, atol=1e-12)
    if how == "out":
        files = sorted(os.listdir(tmp_path / "proj"))
        assert files == [f"tica_{i:05d}.npy" for i in range(len(ou_runs))]  # no temporary left
        np.testing.assert_allclose(np.load(tmp_path / "proj" / files[1]), ref[1], rtol=1e-12, atol=1e-12)


def test_transform_to_files_leaves_nothing_half_written(backend, tmp_path, ou_runs):
    for i, r in enumerate(ou_runs):
        r = r.copy()
        if i == 2:
            r[1234, 0] = np.inf
        np.save(tmp_path / f"r{i}.npy", r)
    trajs = mk.load_trajectories(str(tmp_path / "r*.npy"))
    tica = mk.TICA(10, dim=2).fit(ou_runs)
    with pytest.raises(InputError, match=r"r2\.npy: frame 1234 has inf"):
        tica.transform(trajs, out=tmp_path / "proj", **backend)
    assert os.listdir(tmp_path / "proj") == []


# ------------------------------------------------------------------------------- microstates

def test_assignment_equals_brute_force(backend, npy_runs, ou_runs):
    trajs, _ = npy_runs
    rng = np.random.default_rng(3)
    centers = np.concatenate(ou_runs)[rng.choice(sum(len(r) for r in ou_runs), 40, replace=False)]
    micro = mk.Microstates(40, chunk_size=700)
    micro.centers_, micro.n_features_in_ = centers, 3
    got = micro.assign(trajs, **backend)
    for lab, run in zip(got, ou_runs):
        d2 = ((run[:, None, :] - centers[None]) ** 2).sum(axis=2)  # brute force, numpy
        assert lab.dtype == np.int32
        assert np.array_equal(lab, d2.argmin(axis=1))


@pytest.mark.parametrize("method", ["kmeans", "minibatch"])
def test_clustering_finds_separated_blobs(backend, tmp_path, method):
    """Four far-apart blobs: any sound k-means finds them; Lloyd's fixed point is the blob means
    over the frames clustered (the strided ones)."""
    rng = np.random.default_rng(5)
    truth = [rng.integers(0, 4, 2000 + 500 * i) for i in range(3)]
    means = np.array([[0.0, 0.0], [20.0, 0.0], [0.0, 20.0], [20.0, 20.0]])
    runs = [means[t] + rng.normal(size=(t.size, 2)) for t in truth]
    for i, r in enumerate(runs):
        np.save(tmp_path / f"b{i}.npy", r)
    trajs = mk.load_trajectories(str(tmp_path / "b*.npy"))
    micro = mk.Microstates(4, method=method, stride=3, seed=0, chunk_size=256).fit(trajs, **backend)
    labels = np.concatenate(micro.labels_)
    t = np.concatenate(truth)
    mapping = {int(a): int(b) for a, b in zip(t, labels)}
    assert len(set(mapping.values())) == 4 and np.array_equal(np.vectorize(mapping.get)(t), labels)
    assert micro.n_frames_fitted_ == sum(len(range(0, len(r), 3)) for r in runs)
    strided = np.concatenate([r[::3] for r in runs])
    st = np.concatenate([tr[::3] for tr in truth])
    blob_means = np.array([strided[st == j].mean(axis=0) for j in range(4)])
    got = micro.centers_[[mapping[j] for j in range(4)]]
    if method == "kmeans":
        np.testing.assert_allclose(got, blob_means, atol=1e-9)
        inertia = sum(((strided[st == j] - blob_means[j]) ** 2).sum() for j in range(4))
        np.testing.assert_allclose(micro.inertia_, inertia, rtol=1e-9)
    else:  # mini-batch centers are running means over batches: close, not exact (Sculley 2010)
        np.testing.assert_allclose(got, blob_means, atol=0.2)


def test_cluster_kmeans_does_not_depend_on_the_number_of_partitions(dask_client, monkeypatch):
    from msmkit import states

    rng = np.random.default_rng(8)
    runs = [rng.normal(size=(3000, 2)) + rng.integers(0, 3, (3000, 1)) * 6.0 for _ in range(3)]
    a = mk.Microstates(6, stride=2, seed=4).fit(runs, client=dask_client)
    monkeypatch.setattr(states, "PARTITIONS_PER_THREAD", 3)
    b = mk.Microstates(6, stride=2, seed=4).fit(runs, client=dask_client)
    np.testing.assert_allclose(a.centers_, b.centers_, rtol=1e-10)
    assert a.n_iter_ == b.n_iter_
    # a local optimum of similar quality to scikit-learn's in-memory Lloyd on the same frames
    memory = mk.Microstates(6, stride=2, seed=4).fit(runs)
    assert a.inertia_ < 1.05 * memory.inertia_


# ------------------------------------------------------------------------------- counts, scan

def _count_reference(runs, lag, n, every_frame=True):
    """Transition counting by an explicit loop over frame pairs (common practice)."""
    C = np.zeros((n, n), dtype=np.int64)
    for r in runs:
        for t in range(0, len(r) - lag, 1 if every_frame else lag):
            if r[t] >= 0 and r[t + lag] >= 0:
                C[r[t], r[t + lag]] += 1
    return C


@pytest.mark.parametrize("every_frame", [True, False])
def test_counts_equal_the_pair_loop(backend, sample_chain, reversible_chain, every_frame):
    runs = sample_chain(reversible_chain, 900, n_runs=7, seed=2)
    runs[3][100:140] = -1  # unassigned frames
    runs.append(np.array([1, 2], dtype=np.int32))  # shorter than the lag
    got = mk.count_transitions(runs, 4, every_frame=every_frame, **backend)
    assert np.array_equal(got.toarray(), _count_reference(runs, 4, 3, every_frame))


def test_counts_over_many_states_equal_a_counter(backend):
    # 1500 states, a few thousand pairs per task: the workers tally sparsely (sorted pair codes)
    # rather than in a 1500**2 array; the result is the Counter of the pairs (common practice)
    from collections import Counter
    rng = np.random.default_rng(8)
    runs = [np.repeat(rng.integers(0, 1500, 400), rng.integers(1, 12, 400)).astype(np.int32) for _ in range(6)]
    runs[2][50:80] = -1
    got = mk.count_transitions(runs, 5, n_states=1500, **backend).tocoo()
    expected = Counter((int(r[t]), int(r[t + 5])) for r in runs for t in range(len(r) - 5)
                       if r[t] >= 0 and r[t + 5] >= 0)
    assert {(int(i), int(j)): int(v) for i, j, v in zip(got.row, got.col, got.data)} == expected


def test_lag_scan_bootstrap_is_the_same(backend, sample_chain, reversible_chain):
    runs = sample_chain(reversible_chain, 2000, n_runs=6, seed=1)
    scan = mk.lag_scan(runs, [1, 2, 5], n_samples=12, seed=7, reversible=False, n_processes=2,
                       **backend)
    for lag, ts in zip(scan.lags, scan.timescales):
        C = _count_reference(runs, lag, 3).astype(float)
        w = np.sort(np.abs(la.eigvals(C / C.sum(axis=1, keepdims=True))))[::-1]  # MLE: row-normalized
        np.testing.assert_allclose(ts, -lag / np.log(w[1:3]), rtol=1e-9)
    memory = mk.lag_scan(runs, [1, 2, 5], n_samples=12, seed=7, reversible=False, n_processes=2)
    np.testing.assert_array_equal(scan.samples, memory.samples)
    np.testing.assert_array_equal(scan.lower, memory.lower)


def test_reversible_lag_scan_bootstrap_is_the_same(backend, sample_chain, reversible_chain):
    # the per-sample kernel (pattern fit + shift-invert eigenvalues) sent to the workers gives the
    # samples of the in-memory scan, bit for bit (same arithmetic on the same values)
    runs = sample_chain(reversible_chain, 2000, n_runs=6, seed=1)
    scan = mk.lag_scan(runs, [1, 2, 5], n_samples=12, seed=7, n_processes=2, **backend)
    memory = mk.lag_scan(runs, [1, 2, 5], n_samples=12, seed=7, n_processes=2)
    assert np.all(np.isfinite(scan.samples))
    np.testing.assert_array_equal(scan.samples, memory.samples)
    np.testing.assert_array_equal(scan.lower, memory.lower)


def test_chapman_kolmogorov_is_the_same(backend, sample_chain, reversible_chain):
    runs = sample_chain(reversible_chain, 1500, n_runs=6, seed=9)
    model = mk.build_model(runs, 2, reversible=True)
    ck = mk.chapman_kolmogorov(model, runs, sets=[[0], [1, 2]], multiples=3, n_samples=8, seed=3,
                               **backend)
    # at k = 1 the estimate is the model itself (Prinz et al., J. Chem. Phys. 134, 174105 (2011))
    np.testing.assert_allclose(ck.estimated[0], ck.predicted[0], atol=1e-10)
    memory = mk.chapman_kolmogorov(model, runs, sets=[[0], [1, 2]], multiples=3, n_samples=8, seed=3)
    np.testing.assert_array_equal(ck.samples, memory.samples)
    np.testing.assert_array_equal(ck.estimated, memory.estimated)
    assert ck.passed == memory.passed


def test_bayes_intervals_are_the_same(backend, sample_chain, reversible_chain):
    # uncertainty="bayes": runs counted on the back end, the posterior sampled in process; the
    # same seed gives the same samples as in memory
    runs = sample_chain(reversible_chain, 1500, n_runs=6, seed=9)
    kw = dict(n_samples=10, seed=3, uncertainty="bayes")
    scan = mk.lag_scan(runs, [1, 3], **kw, **backend)
    np.testing.assert_array_equal(scan.samples, mk.lag_scan(runs, [1, 3], **kw).samples)
    model = mk.build_model(runs, 2)
    ck = mk.chapman_kolmogorov(model, runs, sets=[[0], [1, 2]], multiples=3, **kw, **backend)
    memory = mk.chapman_kolmogorov(model, runs, sets=[[0], [1, 2]], multiples=3, **kw)
    np.testing.assert_array_equal(ck.samples, memory.samples)
    np.testing.assert_array_equal(ck.predicted_upper, memory.predicted_upper)


def test_streamed_pipeline_on_the_cluster_equals_memory(dask_client, npy_runs, ou_runs, tmp_path):
    trajs, _ = npy_runs
    tica = mk.TICA(10, dim=2, chunk_size=400).fit(trajs, client=dask_client)
    low = tica.transform(trajs, lazy=True)  # projected on the workers when they read it
    micro = mk.Microstates(15, stride=5, seed=0, chunk_size=300).fit(tica.transform(ou_runs))
    labels = micro.assign(low, client=dask_client)
    assert all(np.array_equal(a, b) for a, b in zip(labels, micro.labels_))
    C = mk.count_transitions(labels, 3, client=dask_client)
    assert np.array_equal(C.toarray(), _count_reference(micro.labels_, 3, 15))


# ------------------------------------------------------------------------------- bad input

def test_unreachable_scheduler_is_an_input_error():
    from msmkit.distributed import connect

    with pytest.raises(InputError, match=r"no dask scheduler answered at 'tcp://127\.0\.0\.1:9'"):
        connect("tcp://127.0.0.1:9", timeout=1)
    with pytest.raises(InputError, match="address must be a scheduler address"):
        connect("", timeout=1)


@pytest.mark.parametrize("client, message", [
    ("tcp://127.0.0.1:8786", "got the address"),
    (object(), "must be a dask.distributed.Client"),
])
def test_a_client_that_is_not_one(client, message, ou_runs):
    with pytest.raises(InputError, match=message):
        mk.TICA(5).fit(ou_runs, client=client)
    with pytest.raises(InputError, match=message):
        mk.count_transitions([0, 1, 0, 1], 1, client=client)


def test_no_dask_import_without_a_client():
    code = ("import sys, numpy as np, msmkit as mk; x = np.random.default_rng(0).normal(size=(500, 2));"
            "t = mk.TICA(2, dim=1).fit(x); m = mk.Microstates(3, seed=0).fit(t.transform(x));"
            "mk.count_transitions(m.labels_, 1); import msmkit.distributed;"
            "bad = [k for k in sys.modules if k.split('.')[0] in ('dask', 'distributed')];"
            "assert not bad, bad")
    subprocess.run([sys.executable, "-c", code], check=True)


def test_missing_dask_names_the_extra(monkeypatch):
    from msmkit import distributed as dist

    monkeypatch.setitem(sys.modules, "distributed", None)
    with pytest.raises(ImportError, match=r"pip install 'msmkit\[dask\]'"):
        dist.connect("tcp://127.0.0.1:8786")


class _DyingRun(LazyRun):
    """A run from an .npy file whose reader kills the worker process: on the first read of all
    (``always=False``; a marker file created atomically makes it exactly one death), or on every
    read. Never kills anything outside a dask worker."""

    def __init__(self, path, marker, always=False):
        arr = np.load(path, mmap_mode="r")
        super().__init__(str(path), arr.shape, arr.dtype)
        self.path, self.marker, self.always = str(path), str(marker), always

    def _read(self, start, stop):
        from distributed import get_worker

        get_worker()  # raises ValueError outside a worker: never exit the test process
        if self.always:
            os._exit(1)
        try:
            os.close(os.open(self.marker, os.O_CREAT | os.O_EXCL))
        except FileExistsError:
            pass
        else:
            os._exit(1)
        return np.array(np.load(self.path, mmap_mode="r")[start:stop])


@pytest.fixture
def dying_runs(dask_client, tmp_path, ou_runs):
    import cloudpickle

    cloudpickle.register_pickle_by_value(sys.modules[__name__])  # workers cannot import tests
    for i, r in enumerate(ou_runs):
        np.save(tmp_path / f"d{i}.npy", r)
    def make(always=False, in_memory=False):
        """Run 1 kills a worker once (on every read if ``always``); the others are lazy .npy
        runs, or in-memory arrays (sent once to the workers) if ``in_memory``."""
        return [_DyingRun(tmp_path / f"d{i}.npy", tmp_path / "died", always) if i == 1
                else np.load(tmp_path / f"d{i}.npy") if in_memory
                else mk.load_trajectories(tmp_path / f"d{i}.npy")[0] for i in range(len(ou_runs))]

    yield make
    cloudpickle.unregister_pickle_by_value(sys.modules[__name__])
    dask_client.wait_for_workers(2, timeout=60)


def test_a_worker_dying_mid_run_is_retried_exactly(dask_client, dying_runs, ou_runs):
    centers = np.concatenate(ou_runs)[::997]
    micro = mk.Microstates(len(centers), chunk_size=1000)  # several tasks, run 1 split among them
    micro.centers_, micro.n_features_in_ = centers, 3
    expected = micro.assign(ou_runs)
    got = micro.assign(dying_runs(), client=dask_client)  # run 1 kills a worker once
    assert all(np.array_equal(a, b) for a, b in zip(got, expected))


def test_in_memory_data_lost_with_a_worker_fails_loudly(dask_client, dying_runs, ou_runs):
    from msmkit.distributed import ClusterError

    micro = mk.Microstates(5)
    micro.centers_, micro.n_features_in_ = np.concatenate(ou_runs)[::3001], 3
    with pytest.raises(ClusterError, match=r"cancelled \(.*\); data held only by a worker that died"):
        micro.assign(dying_runs(in_memory=True), client=dask_client)  # both workers hold arrays


def test_a_run_that_keeps_killing_workers_fails_loudly(dask_client, dying_runs):
    from msmkit.distributed import ClusterError

    with pytest.raises(ClusterError, match=r"run 0 \(.*d1\.npy\) kept killing dask workers"):
        mk.TICA(5, dim=1).fit(dying_runs(always=True)[1:2], client=dask_client)
