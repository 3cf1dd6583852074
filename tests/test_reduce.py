"""Tests for msmkit.reduce (TICA)."""
import numpy as np
import pytest
import scipy.linalg
from scipy.signal import lfilter

from msmkit.errors import DiagnosticWarning, InputError
from msmkit.io import TrajectorySet, load_trajectories
from msmkit.reduce import TICA, lagged_moments, run_moments, tica_covariances


def ou_runs(rates, n_frames, n_runs, seed, mixing=None):
    """Exactly sampled Ornstein-Uhlenbeck processes dx = -k x dt + sqrt(2D) dW, one per rate,
    at unit frame time: x_{t+1} = a x_t + sqrt(1 - a^2) z with a = exp(-k) and the
    stationary start x_0 ~ N(0, 1) (common practice), optionally mixed linearly."""
    rng = np.random.default_rng(seed)
    a = np.exp(-np.asarray(rates))
    runs = []
    for _ in range(n_runs):
        cols = []
        for ai in a:
            z = rng.normal(size=n_frames) * np.sqrt(1 - ai ** 2)
            z[0] = rng.normal()
            cols.append(lfilter([1.0], [1.0, -ai], z))
        x = np.column_stack(cols)
        runs.append(x if mixing is None else x @ mixing)
    return runs


def reference_covariances(runs, lag):
    """C(0) and symmetrized C(lag) written out from the definitions on the full data."""
    allx = np.concatenate(runs)
    mu = allx.mean(axis=0)
    c0 = (allx - mu).T @ (allx - mu) / len(allx)
    starts = np.concatenate([r[:-lag] for r in runs if len(r) > lag]) - mu
    ends = np.concatenate([r[lag:] for r in runs if len(r) > lag]) - mu
    ct = (starts.T @ ends + ends.T @ starts) / (2 * len(starts))
    return mu, c0, ct


def test_ou_eigenvalues_are_exp_minus_k_tau():
    # Ornstein-Uhlenbeck autocorrelation exp(-k t) (common practice): TICA on independent OU
    # processes mixed by a fixed matrix recovers eigenvalues exp(-k tau).
    rates = np.array([0.01, 0.05, 0.3])
    mixing = np.array([[1.0, 0.5, 0.2], [0.3, 1.0, -0.4], [0.6, -0.2, 1.0]])
    runs = ou_runs(rates, 20_000, 10, seed=3, mixing=mixing)
    for lag in (5, 10):
        tica = TICA(lag, dim=3).fit(runs)
        expected = np.exp(-rates * lag)
        assert np.allclose(tica.eigenvalues_, expected, atol=0.02), (tica.eigenvalues_, expected)
        assert np.allclose(tica.relaxation_times_[:2], 1 / rates[:2], rtol=0.25)


def test_equals_generalised_eigenproblem_on_full_covariances():
    # scipy.linalg.eigh(a, b) solves a v = w b v with v^T b v = 1 (reference library).
    rng = np.random.default_rng(0)
    runs = ou_runs([0.02, 0.1, 0.5, 1.0], 3000, 4, seed=1, mixing=rng.normal(size=(4, 4)))
    runs = [r + np.array([3.0, -2.0, 100.0, 0.5]) for r in runs]
    runs.append(runs[0][:6])  # shorter than the lag: contributes nothing
    lag = 7
    with pytest.warns(DiagnosticWarning, match="1 of 5 runs are not longer than lag=7"):
        tica = TICA(lag, dim=4, scaling="unit").fit(runs)
    mu, c0, ct = reference_covariances(runs[:4], lag)
    w, v = scipy.linalg.eigh(ct, c0)
    w, v = w[::-1], v[:, ::-1]
    assert np.allclose(tica.mean_, mu, rtol=1e-12, atol=1e-10)
    assert np.allclose(tica.covariance_, c0, rtol=1e-9, atol=1e-12)
    assert np.allclose(tica.lagged_covariance_, ct, rtol=1e-9, atol=1e-12)
    assert np.allclose(tica.eigenvalues_, w, rtol=1e-9, atol=1e-12)
    signs = np.sign((tica.components_ * v.T).sum(axis=1))
    assert np.allclose(tica.components_, signs[:, None] * v.T, rtol=1e-7, atol=1e-9)
    assert tica.n_runs_used_ == 4 and tica.n_pairs_used_ == 4 * (3000 - lag)
    # the output has unit variance and lagged covariance diag(eigenvalues) (TICA's definition)
    proj = tica.components_
    assert np.allclose(proj @ c0 @ proj.T, np.eye(4), atol=1e-9)
    assert np.allclose(proj @ ct @ proj.T, np.diag(w), atol=1e-9)


@pytest.mark.parametrize("chunk_size", [1, 3, 6, 7, 64, 10_000])
def test_chunked_equals_one_shot(chunk_size):
    runs = ou_runs([0.05, 0.2, 0.7], 500, 3, seed=5, mixing=np.eye(3) + 0.3)
    whole = TICA(7, dim=3).fit(runs)
    chunked = TICA(7, dim=3, chunk_size=chunk_size).fit(runs)
    assert np.allclose(chunked.eigenvalues_, whole.eigenvalues_, rtol=1e-12, atol=1e-13)
    assert np.allclose(chunked.components_, whole.components_, rtol=1e-10, atol=1e-12)
    assert np.allclose(chunked.transform(runs)[1], whole.transform(runs)[1], atol=1e-10)


def test_moments_of_pieces_add_up_to_the_whole_run():
    rng = np.random.default_rng(2)
    x = rng.normal(size=(103, 2))
    shift = x[0]
    whole = lagged_moments(x, 5, shift)
    for size in (1, 2, 4, 5, 6, 50, 200):
        pieces = run_moments(x, 5, shift, size)
        for field in ("frame_sum", "frame_outer", "pair_start_sum", "pair_end_sum", "pair_cross"):
            assert np.allclose(getattr(pieces, field), getattr(whole, field), atol=1e-12)
        assert pieces.n_frames == 103 and pieces.n_pairs == 98
    split = lagged_moments(x[:40], 5, shift) + lagged_moments(x[40:], 5, shift, context=x[:40])
    assert np.allclose(tica_covariances(split)[2], tica_covariances(whole)[2], atol=1e-14)


def test_fit_from_moments_summed_elsewhere():
    # the map-reduce shape: moments per run (any shift common to all), summed, then solved
    runs = ou_runs([0.05, 0.3], 2000, 3, seed=12, mixing=np.array([[1.0, 0.4], [0.2, 1.0]]))
    shift = np.array([0.5, -0.5])
    total = sum((run_moments(r, 4, shift, 300) for r in runs[1:]), run_moments(runs[0], 4, shift))
    a = TICA(4, dim=2).fit_from_moments(total, feature_names=["p", "q"], n_runs=3)
    b = TICA(4, dim=2).fit(runs)
    assert np.allclose(a.eigenvalues_, b.eigenvalues_, atol=1e-12)
    assert np.allclose(a.transform(runs[0]), b.transform(runs[0]), atol=1e-10)
    assert a.feature_names_in_ == ("p", "q") and a.n_runs_used_ == 3
    with pytest.raises(InputError, match="moments were taken at lag 4"):
        TICA(5).fit_from_moments(total)


def test_lazy_npy_runs_give_the_same_answer(tmp_path):
    runs = ou_runs([0.05, 0.3], 4000, 3, seed=9, mixing=np.array([[1.0, 0.4], [0.2, 1.0]]))
    for i, r in enumerate(runs):
        np.save(tmp_path / f"r{i}.npy", r)
    lazy = load_trajectories(str(tmp_path / "r*.npy"))
    a = TICA(3, dim=2, chunk_size=333).fit(lazy)
    b = TICA(3, dim=2).fit(runs)
    assert np.allclose(a.components_, b.components_, atol=1e-10)
    out = a.transform(lazy)
    assert isinstance(out, TrajectorySet) and out.feature_names == ("ic1", "ic2")
    assert np.allclose(out[2], b.transform(runs[2]), atol=1e-10)


def test_kinetic_map_scales_by_eigenvalues():
    # Kinetic map (Noe & Clementi 2015): component i is multiplied by lambda_i, so its
    # variance over the fitted data is lambda_i^2.
    runs = ou_runs([0.02, 0.2, 1.0], 5000, 2, seed=4, mixing=np.eye(3) + 0.2)
    km = TICA(5, dim=3, scaling="kinetic").fit(runs)
    plain = TICA(5, dim=3).fit(runs)  # default: unit variance per component
    y_km, y_plain = km.transform(runs[0]), plain.transform(runs[0])
    assert np.allclose(y_km, y_plain * km.eigenvalues_, atol=1e-12)
    allx = np.concatenate(km.transform(runs))
    assert np.allclose(allx.var(axis=0), km.eigenvalues_ ** 2, rtol=1e-8)


def test_default_dimension_keeps_the_components_resolved_at_the_lag():
    # OU rates k at lag 4 frames have autocorrelation exp(-4k) (exact for the OU process, common
    # practice): 0.96, 0.82, 0.45 >= 1/e (relaxation time 1/k >= lag) are kept, exp(-8) = 0.0003 is not.
    runs = ou_runs([0.01, 0.05, 0.2, 2.0], 20000, 2, seed=6, mixing=np.eye(4) + 0.1)
    tica = TICA(4).fit(runs)
    assert tica.dim_ == 3
    assert np.all(tica.relaxation_times_ >= 4)


def test_dimension_choice_by_kinetic_variance():
    runs = ou_runs([0.01, 0.05, 0.5, 2.0], 3000, 2, seed=6, mixing=np.eye(4) + 0.1)
    tica = TICA(4, kinetic_variance=0.95).fit(runs)
    lam = TICA(4, dim=4).fit(runs).eigenvalues_
    cum = np.cumsum(lam ** 2) / np.sum(lam ** 2)
    assert tica.dim_ == int(np.argmax(cum >= 0.95)) + 1
    assert np.allclose(tica.cumulative_kinetic_variance_, cum)
    assert TICA(4, kinetic_variance=0.5).fit(runs).dim_ == int(np.argmax(cum >= 0.5)) + 1
    assert TICA(4, kinetic_variance=1.0).fit(runs).dim_ == 4
    assert TICA(4, dim=2).fit(runs).components_.shape == (2, 4)


def test_constant_and_duplicate_features_are_dropped_with_a_warning():
    runs = ou_runs([0.05, 0.4], 3000, 2, seed=8, mixing=np.array([[1.0, 0.3], [0.1, 1.0]]))
    base = TICA(5, dim=2).fit(runs)
    with_const = [np.column_stack([r[:, 0], np.full(len(r), 7.5), r[:, 1]]) for r in runs]
    names = ("a", "flat", "b")
    with pytest.warns(DiagnosticWarning, match=r"feature 1 \('flat'\) is constant"):
        tica = TICA(5, dim=2).fit(TrajectorySet(with_const, names))
    assert np.allclose(tica.eigenvalues_, base.eigenvalues_, atol=1e-10)
    assert np.all(tica.components_[:, 1] == 0) and np.all(np.isfinite(tica.components_))
    dup = [np.column_stack([r, r[:, 0] + r[:, 1]]) for r in runs]
    with pytest.warns(DiagnosticWarning, match="linearly dependent"):
        tica = TICA(5, dim=2).fit(dup)
    assert np.allclose(tica.eigenvalues_, base.eigenvalues_, atol=1e-8)
    with pytest.warns(DiagnosticWarning, match="span only 2 independent directions"), \
            pytest.warns(DiagnosticWarning, match="linearly dependent"):
        assert TICA(5, dim=3).fit(dup).dim_ == 2
    assert np.all(np.isfinite(tica.transform(dup[0])))


def test_large_offsets_do_not_lose_precision():
    runs = ou_runs([0.05, 0.4], 3000, 2, seed=10)
    base = TICA(5, dim=2).fit(runs)
    far = TICA(5, dim=2).fit([r + 1e6 for r in runs])
    assert np.allclose(far.eigenvalues_, base.eigenvalues_, atol=1e-6)


def test_bad_input_raises_input_error():
    x = np.random.default_rng(0).normal(size=(50, 2))
    with pytest.raises(InputError, match=r"lag=60 frames is not shorter than any run"):
        TICA(60).fit([x, x[:10]])
    with pytest.raises(InputError, match="lag must be an integer not less than 1"):
        TICA(0).fit(x)
    with pytest.raises(InputError, match="either dim or kinetic_variance"):
        TICA(2, dim=1, kinetic_variance=0.9).fit(x)
    with pytest.raises(InputError, match="dim must not exceed the number of features"):
        TICA(2, dim=3).fit(x)
    with pytest.raises(InputError, match="kinetic_variance must be between 0 and 1"):
        TICA(2, kinetic_variance=1.5).fit(x)
    with pytest.raises(InputError, match="scaling must be one of 'unit', 'kinetic'"):
        TICA(2, scaling="commute").fit(x)
    with pytest.raises(InputError, match="not fitted yet"):
        TICA(2).transform(x)
    with pytest.raises(InputError, match="every feature is constant"):
        TICA(2).fit(np.ones((20, 2)))
    bad = x.copy()
    bad[17, 0] = np.nan
    with pytest.raises(InputError, match=r"trajs\[1\]: frame 17 has nan"):
        TICA(2).fit([x, bad])
    fitted = TICA(2, dim=1).fit(x)
    with pytest.raises(InputError, match="trajs has 3 features, but this TICA was fitted on 2"):
        fitted.transform(np.zeros((5, 3)))


def test_projection_rows_reproduce_transform():
    # projection_ is what a model file stores as tica_components: (x - mean_) @ projection_.T must
    # be exactly the transform (linear algebra, common practice), with and without scaling.
    rng = np.random.default_rng(7)
    x = np.cumsum(rng.normal(size=(3000, 4)), axis=0) * 0.01 + rng.normal(size=(3000, 4))
    for scaling in ("kinetic", "unit"):
        tica = TICA(5, dim=2, scaling=scaling).fit(x)
        np.testing.assert_allclose((x - tica.mean_) @ tica.projection_.T, tica.transform(x), rtol=1e-10, atol=1e-12)
        assert tica.projection_.shape == (2, 4)
