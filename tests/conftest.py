"""Shared fixtures for the core-engine tests: a seeded, vectorised sampler of discrete Markov
chains and reference quantities computed with scipy only (never with msmkit itself).
"""
from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg as la


def _sample_chain(T, n_steps, *, n_runs=1, seed=0, start=None):
    """Discrete trajectories of the Markov chain ``T``, all runs advanced together.

    Each step draws one uniform number per run and finds the next state by comparing it with the
    cumulative row of the current state (inverse-CDF sampling, vectorised over runs). Runs start
    from the stationary distribution (scipy.linalg.eig) unless ``start`` (a state or an array of
    one state per run) is given.

    Returns a list of ``n_runs`` int32 arrays of ``n_steps`` frames each.
    """
    T = np.asarray(T, dtype=float)
    n = T.shape[0]
    rng = np.random.default_rng(seed)
    cum = np.cumsum(T, axis=1)
    cum[:, -1] = np.inf  # rounding in the last cumulative value must never leave the state space
    if start is None:
        s = rng.choice(n, size=n_runs, p=_stationary(T))
    else:
        s = np.broadcast_to(np.asarray(start, dtype=np.intp), (n_runs,)).copy()
    out = np.empty((n_runs, n_steps), dtype=np.int32)
    u = rng.random((n_steps, n_runs))
    for t in range(n_steps):
        out[:, t] = s
        s = (u[t][:, None] >= cum[s]).sum(axis=1)
    return list(out)


def _stationary(T):
    """Left eigenvector of T for the eigenvalue closest to 1, normalized to sum 1 (scipy.linalg.eig,
    a general-purpose reference library)."""
    w, vl = la.eig(np.asarray(T, dtype=float), left=True, right=False)
    p = np.real(vl[:, np.argmin(np.abs(w - 1))])
    return p / p.sum()


def _timescale_sigma(T, n_out, lag, dt=1.0, which=1):
    """Standard error of the implied timescale of eigenvalue ``which`` (sorted by magnitude) of a
    transition matrix estimated from ``n_out[i]`` independent transitions out of each state.

    First-order error propagation (common practice): each row of the estimate is multinomial,
    Cov(T_ij, T_ik) = (T_ij delta_jk - T_ij T_ik) / n_i, and a simple eigenvalue moves by
    d lambda = l^T dT r / (l^T r) (left/right eigenvectors l, r from scipy.linalg.eig), so

        var(lambda) = sum_i l_i^2 / n_i [sum_j T_ij r_j^2 - (sum_j T_ij r_j)^2] / (l^T r)^2,

    and t = -lag dt / ln(lambda) gives sigma_t = lag dt sigma_lambda / (lambda ln(lambda)^2).
    Returns (lambda, t, sigma_t).
    """
    T = np.asarray(T, dtype=float)
    w, vl, vr = la.eig(T, left=True, right=True)
    k = np.argsort(-np.abs(w), kind="stable")[which]
    lam = float(np.real(w[k]))
    l, r = np.real(vl[:, k]), np.real(vr[:, k])
    var = np.sum(l ** 2 / np.asarray(n_out, float) * (T @ r ** 2 - (T @ r) ** 2)) / (l @ r) ** 2
    t = -lag * dt / np.log(lam)
    sigma_t = lag * dt * np.sqrt(var) / (lam * np.log(lam) ** 2)
    return lam, t, sigma_t


@pytest.fixture(scope="session")
def sample_chain():
    """The seeded chain sampler: ``sample_chain(T, n_steps, n_runs=..., seed=..., start=...)``."""
    return _sample_chain


@pytest.fixture(scope="session")
def stationary_ref():
    """Stationary distribution from scipy.linalg.eig: ``stationary_ref(T)``."""
    return _stationary


@pytest.fixture(scope="session")
def timescale_sigma():
    """First-order standard error of an implied timescale: ``timescale_sigma(T, n_out, lag, dt)``."""
    return _timescale_sigma


@pytest.fixture
def reversible_chain():
    """A 3-state reversible chain with well separated timescales (detailed balance by construction:
    T_ij = X_ij / sum_k X_ik with X symmetric, common practice)."""
    X = np.array([[900.0, 30.0, 2.0],
                  [30.0, 500.0, 25.0],
                  [2.0, 25.0, 400.0]])
    return X / X.sum(axis=1, keepdims=True)
