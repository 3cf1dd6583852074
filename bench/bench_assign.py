"""Benchmark: assigning frames to the nearest center.

msmkit.states.nearest_center against scikit-learn's pairwise_distances_argmin, both timed in
this run on the same data (default 1e6 frames x 10 features, 1000 centers). Prints the time
ratio (target: <= 0.6) and checks that the labels are identical.

Usage: python bench/bench_assign.py [--frames N] [--features D] [--centers K] [--repeats R]
"""
from __future__ import annotations

import argparse

import numpy as np


def make_data(n_frames: int, n_features: int, n_centers: int, seed: int = 0):
    """Clustered synthetic frames (a mixture of 30 Gaussian blobs) and centers drawn from them."""
    rng = np.random.default_rng(seed)
    means = rng.normal(scale=3.0, size=(30, n_features))
    x = means[rng.integers(0, 30, n_frames)] + rng.normal(size=(n_frames, n_features))
    centers = x[rng.choice(n_frames, n_centers, replace=False)].copy()
    return x, centers


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--frames", type=int, default=1_000_000)
    parser.add_argument("--features", type=int, default=10)
    parser.add_argument("--centers", type=int, default=1000)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args(argv)

    from sklearn.metrics import pairwise_distances_argmin

    from _timing import best_time, report
    from msmkit.states import nearest_center

    x, centers = make_data(args.frames, args.features, args.centers)
    print(f"data: {args.frames} frames x {args.features} features, {args.centers} centers")
    ref = pairwise_distances_argmin(x, centers)
    ours = nearest_center(x, centers)
    same = bool(np.array_equal(ref, ours))
    print(f"labels identical: {same}  ({int(np.sum(ref != ours))} of {len(ref)} differ)")
    # alternate the two so that machine load affects both alike; keep the best of each
    t_ref, t_ours = np.inf, np.inf
    for _ in range(args.repeats):
        t_ref = min(t_ref, best_time(lambda: pairwise_distances_argmin(x, centers), 1))
        t_ours = min(t_ours, best_time(lambda: nearest_center(x, centers), 1))
    report(f"assign {args.frames} x {args.features} to {args.centers} centers "
           f"(baseline: sklearn pairwise_distances_argmin)", t_ours, t_ref, "target <= 0.6")
    return 0 if same else 1


if __name__ == "__main__":
    raise SystemExit(main())
