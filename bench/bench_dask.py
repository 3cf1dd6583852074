"""Benchmark: assignment + counting on a dask cluster, 2 workers against 1.

Writes --runs .npy files holding --frames frames in all (default 2e7 x 4 float32 features),
then times Microstates.assign(client=...) + count_transitions(client=...) on a LocalCluster of
one single-threaded worker process and on one of two, both measured in this run (best of
--repeats, after a warm-up call). Prints the speed-up (target >= 1.6 on two free cores) and the
in-process time without dask for reference, and checks that all three give identical labels
and counts. The files are read by the workers; only centers and labels travel.

Usage: python bench/bench_dask.py [--frames N] [--runs R] [--features D] [--centers K] [--repeats R]
"""
from __future__ import annotations

import argparse
import os
import shutil
import tempfile
import time

import numpy as np


def _warm_up():
    import msmkit.counts  # noqa: F401
    import msmkit.distributed  # noqa: F401
    import msmkit.states  # noqa: F401
    import scipy.spatial  # noqa: F401
    import threadpoolctl  # noqa: F401


def timed(fn, repeat):
    best, out = float("inf"), None
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t)
    return best, out


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--frames", type=float, default=2e7)
    parser.add_argument("--runs", type=int, default=8)
    parser.add_argument("--features", type=int, default=4)
    parser.add_argument("--centers", type=int, default=256)
    parser.add_argument("--lag", type=int, default=10)
    parser.add_argument("--repeats", type=int, default=2)
    args = parser.parse_args(argv)

    from distributed import Client, LocalCluster

    from bench_streaming import write_frames
    import msmkit as mk

    n = int(args.frames)
    per_run = -(-n // args.runs)
    folder = tempfile.mkdtemp(prefix="msmkit-dask-bench-")
    try:
        for i in range(args.runs):
            m = min(per_run, n - i * per_run)
            write_frames(os.path.join(folder, f"run{i:03d}.npy"), m, args.features, seed=i)
        trajs = mk.load_trajectories(os.path.join(folder, "run*.npy"))
        rng = np.random.default_rng(0)
        centers = np.asarray(trajs[0][:: max(1, len(trajs[0]) // args.centers)][: args.centers],
                             dtype=np.float64) + rng.normal(scale=1e-3, size=(args.centers, args.features))
        micro = mk.Microstates(args.centers)
        micro.centers_, micro.n_features_in_ = centers, args.features
        print(f"data: {trajs.total_frames} frames x {args.features} float32 features in {len(trajs)} "
              f".npy files ({trajs.total_frames * args.features * 4 / 1e6:.0f} MB), "
              f"{args.centers} centers, lag {args.lag}; {os.cpu_count()} cores on this machine "
              f"(shared with other jobs)")

        def job(client):
            labels = micro.assign(trajs, client=client)
            return labels, mk.count_transitions(labels, args.lag, n_states=args.centers, client=client)

        t_local, (ref_labels, ref_C) = timed(lambda: job(None), args.repeats)
        print(f"in process, no dask (threads over both cores): {t_local:.2f} s")
        times = {}
        for n_workers in (1, 2):
            with LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True,
                              host="127.0.0.1", dashboard_address=None) as cluster, \
                    Client(cluster) as client:
                client.run(_warm_up)  # every worker imports what the tasks use
                times[n_workers], (labels, C) = timed(lambda: job(client), args.repeats)
            same = (all(np.array_equal(a, b) for a, b in zip(labels, ref_labels))
                    and (C != ref_C).nnz == 0)
            print(f"dask, {n_workers} worker(s) x 1 thread: {times[n_workers]:.2f} s; labels and "
                  f"counts identical to in-process: {same}")
            if not same:
                return 1
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    print(f"assign + count {n:.0e} frames: 1 worker {times[1]:.2f} s, 2 workers {times[2]:.2f} s, "
          f"speed-up {times[1] / times[2]:.2f}x (target >= 1.6)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
