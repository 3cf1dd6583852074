"""Tests for msmkit.states: k-means microstates and exact nearest-center assignment."""
import numpy as np
import pytest
from sklearn.cluster import KMeans
from sklearn.metrics import pairwise_distances_argmin

from msmkit.errors import DiagnosticWarning, InputError
from msmkit.io import load_trajectories
from msmkit.states import Microstates, _brute_force, _strided_frames, nearest_center


def brute_force(x, centers):
    """Obviously correct reference: argmin of squared differences, lowest index on ties."""
    d = ((x[:, None, :] - centers[None, :, :]) ** 2).sum(axis=-1)
    return d.argmin(axis=1)


@pytest.mark.parametrize("dim", [1, 2, 3, 4, 10, 40])
def test_assignment_equals_sklearn_pairwise_distances_argmin(dim):
    # scikit-learn's pairwise_distances_argmin is the reference library result.
    rng = np.random.default_rng(dim)
    means = rng.normal(scale=3, size=(8, dim))
    x = means[rng.integers(0, 8, 6000)] + rng.normal(size=(6000, dim))
    centers = x[rng.choice(6000, 150, replace=False)]
    expected = pairwise_distances_argmin(x, centers)
    for chunk in (None, 777):
        got = nearest_center(x, centers, chunk_size=chunk)
        assert got.dtype == np.int32
        assert np.array_equal(got, expected)
    assert np.array_equal(nearest_center(x, centers, n_threads=1), expected)


@pytest.mark.parametrize("dim", [2, 6])
def test_ties_duplicates_and_offsets_match_brute_force(dim):
    rng = np.random.default_rng(11)
    # integer data: many exact ties between centers half a unit apart
    x = rng.integers(0, 4, size=(5000, dim)).astype(float)
    centers = rng.integers(0, 4, size=(12, dim)) + 0.5
    assert np.array_equal(nearest_center(x, centers), brute_force(x, centers))
    # duplicated centers: the lower index wins
    centers = np.vstack([x[:30], x[:30]])
    got = nearest_center(x, centers)
    assert np.array_equal(got, brute_force(x, centers)) and got.max() < 30
    # far from the origin and in float32
    far = x + 1e6
    assert np.array_equal(nearest_center(far.astype(np.float32), centers + 1e6),
                          brute_force(far.astype(np.float32).astype(float), centers + 1e6))
    assert np.array_equal(_brute_force(x, centers), brute_force(x, centers))


def test_single_center_and_lazy_frames(tmp_path):
    x = np.random.default_rng(0).normal(size=(300, 5))
    assert np.array_equal(nearest_center(x, x[:1]), np.zeros(300, dtype=np.int32))
    np.save(tmp_path / "x.npy", x)
    lazy = load_trajectories(tmp_path / "x.npy")[0]
    assert np.array_equal(nearest_center(lazy, x[:40], chunk_size=64),
                          pairwise_distances_argmin(x, x[:40]))


def test_fit_equals_sklearn_kmeans_on_strided_frames():
    rng = np.random.default_rng(3)
    runs = [rng.normal(size=(1003, 3)), rng.normal(size=(500, 3)) + 2]
    micro = Microstates(25, stride=4, seed=5).fit(runs)
    sample = np.concatenate([r[::4] for r in runs])
    ref = KMeans(25, init="k-means++", n_init=1, random_state=5).fit(sample)
    assert np.allclose(micro.centers_, ref.cluster_centers_)
    assert micro.n_frames_fitted_ == len(sample) == 251 + 125
    assert [len(lab) for lab in micro.labels_] == [1003, 500]
    assert all(lab.dtype == np.int32 for lab in micro.labels_)
    assert np.array_equal(np.concatenate(micro.labels_),
                          pairwise_distances_argmin(np.concatenate(runs), micro.centers_))
    assert micro.counts_.sum() == 1503
    again = micro.assign(runs)
    assert all(np.array_equal(a, b) for a, b in zip(again, micro.labels_))


def test_seed_makes_it_deterministic_and_minibatch_runs():
    rng = np.random.default_rng(4)
    x = np.concatenate([rng.normal(loc=c, size=(200, 2)) for c in (-4, 0, 4)])
    a = Microstates(6, seed=2).fit(x)
    b = Microstates(6, seed=2).fit(x)
    assert np.array_equal(a.centers_, b.centers_)
    m1 = Microstates(6, method="minibatch", seed=2, max_iter=30).fit(x)
    m2 = Microstates(6, method="minibatch", seed=2, max_iter=30).fit(x)
    assert np.array_equal(m1.centers_, m2.centers_) and m1.centers_.shape == (6, 2)
    assert isinstance(m1.assign(x), list)


def test_lazy_runs_stride_across_chunks(tmp_path):
    rng = np.random.default_rng(5)
    runs = [rng.normal(size=(1001, 2)), rng.normal(size=(77, 2))]
    for i, r in enumerate(runs):
        np.save(tmp_path / f"r{i}.npy", r)
    lazy = load_trajectories(str(tmp_path / "r*.npy"))
    for stride in (1, 3, 10, 2000):
        assert np.array_equal(_strided_frames(lazy[0], stride), runs[0][::stride])
    a = Microstates(8, stride=3, seed=0, chunk_size=100).fit(lazy)
    b = Microstates(8, stride=3, seed=0).fit(runs)
    assert np.allclose(a.centers_, b.centers_)
    assert all(np.array_equal(p, q) for p, q in zip(a.labels_, b.labels_))


def test_too_few_distinct_frames_warns():
    x = np.repeat(np.arange(3.0)[:, None], 10, axis=0)
    with pytest.warns(DiagnosticWarning, match="only 3 distinct frames for n_states=5"), \
            pytest.warns(DiagnosticWarning, match="2 of 5 states received no frame"):
        Microstates(5, seed=0).fit(x)


def test_bad_input_raises_input_error():
    x = np.random.default_rng(0).normal(size=(40, 2))
    with pytest.raises(InputError, match=r"n_states=50 is more than the 40 frames"):
        Microstates(50).fit(x)
    with pytest.raises(InputError, match=r"n_states=30 is more than the 20 frames .* or stride"):
        Microstates(30, stride=2).fit(x)
    with pytest.raises(InputError, match="n_states must be an integer not less than 1"):
        Microstates(0).fit(x)
    with pytest.raises(InputError, match="method must be 'kmeans' or 'minibatch'"):
        Microstates(3, method="dbscan").fit(x)
    with pytest.raises(InputError, match="stride must be an integer not less than 1"):
        Microstates(3, stride=0).fit(x)
    with pytest.raises(InputError, match="not fitted yet"):
        Microstates(3).assign(x)
    fitted = Microstates(3, seed=0).fit(x)
    with pytest.raises(InputError, match="trajs has 3 features, but the microstates were fitted on 2"):
        fitted.assign(np.zeros((4, 3)))
    bad = x.copy()
    bad[5, 1] = np.inf
    with pytest.raises(InputError, match="frame 5 has inf"):
        fitted.assign(bad)
    with pytest.raises(InputError, match="frames have 2 features but centers have 3"):
        nearest_center(x, np.zeros((2, 3)))
