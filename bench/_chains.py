"""Shared by the coverage benchmarks: runs of a known Markov chain."""
from __future__ import annotations

import numpy as np


def sample_chain(T, pi, n_runs: int, n_frames: int, rng) -> list[np.ndarray]:
    """``n_runs`` runs of ``n_frames`` states of the chain ``T`` started from ``pi``, advanced
    together by inverse-CDF steps (int32 labels)."""
    cum = np.cumsum(T, axis=1)
    cum[:, -1] = np.inf  # rounding in the last cumulative value must never leave the state space
    s = rng.choice(len(pi), size=n_runs, p=pi)
    out = np.empty((n_runs, n_frames), dtype=np.int32)
    u = rng.random((n_frames, n_runs))
    for t in range(n_frames):
        out[:, t] = s
        s = (u[t][:, None] >= cum[s]).sum(axis=1)
    return list(out)
