"""Benchmark: streaming a larger-than-chunk data set from disk through the whole pipeline.

Writes one .npy file of --frames x --features float32 frames (default 2e7 x 4 = 320 MB, written
chunk by chunk), then runs, reading lazily: TICA fit -> TICA transform to .npy files ->
Microstates fit on a stride (which labels every frame) -> transition counting. Prints the
peak growth of the resident memory (RSS, sampled every 2 ms, and the kernel's peak from
getrusage as a cross-check) divided by the data size: target <= 0.3.

What may grow with the frames: the int32 labels (4 bytes per frame, 80 MB for 2e7 frames, 0.25 of
the data) and the strided sample (1/stride of the frames, float64); the rest is a few chunks
(about 16 MiB of float64 frames each by default, read while fitting; assignment reads 2**16
frames at a time) and the counting temporaries (near 4 MiB).

Usage: python bench/bench_streaming.py [--frames N] [--features D] [--dir PATH] [--json]
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import threading
import time

import numpy as np


def write_frames(path, n_frames: int, n_features: int, seed: int = 0, block: int = 1 << 20):
    """An .npy file of float32 frames (a slow random walk seen through noise), written block by
    block so that writing never holds the data set in memory."""
    rng = np.random.default_rng(seed)
    header = {"descr": np.lib.format.dtype_to_descr(np.dtype(np.float32)), "fortran_order": False,
              "shape": (n_frames, n_features)}
    level = np.zeros(n_features)
    with open(path, "wb") as fh:
        np.lib.format.write_array_header_2_0(fh, header)
        for start in range(0, n_frames, block):
            m = min(block, n_frames - start)
            walk = level + np.cumsum(rng.normal(scale=0.002, size=(m, n_features)), axis=0)
            level = walk[-1]
            (np.sin(3 * walk) + rng.normal(scale=0.3, size=(m, n_features))).astype(np.float32).tofile(fh)


class PeakRSS:
    """Samples this process's resident memory in a background thread."""

    def __init__(self, interval: float = 0.002):
        import psutil

        self.proc = psutil.Process()
        self.interval = interval
        self.peak = 0
        self._stop = threading.Event()

    def rss(self) -> int:
        return self.proc.memory_info().rss

    def __enter__(self):
        self.start = self.rss()
        self.peak = self.start
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()
        return self

    def _run(self):
        while not self._stop.is_set():
            self.peak = max(self.peak, self.rss())
            time.sleep(self.interval)

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()
        self.peak = max(self.peak, self.rss())


def run_pipeline(path, folder, *, lag=10, dim=2, n_states=100, stride=100, chunk_size=None) -> dict:
    """Stream the file through TICA -> transform to files -> Microstates -> counts."""
    sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))  # this checkout's msmkit
    import msmkit as mk
    # Import everything the pipeline uses first: imports are not data and must not count.
    import scipy.spatial  # noqa: F401
    import sklearn.cluster  # noqa: F401
    import threadpoolctl  # noqa: F401

    steps = {}
    with PeakRSS() as rss:
        maxrss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
        t0 = time.perf_counter()
        trajs = mk.load_trajectories(path)
        tica = mk.TICA(lag, dim=dim, chunk_size=chunk_size).fit(trajs)
        steps["tica_fit"] = time.perf_counter() - t0
        t = time.perf_counter()
        low = tica.transform(trajs, out=os.path.join(folder, "tica"))
        steps["tica_transform_to_npy"] = time.perf_counter() - t
        t = time.perf_counter()
        micro = mk.Microstates(n_states, stride=stride, seed=0, chunk_size=chunk_size).fit(low)
        labels = micro.labels_
        steps["microstates_fit_and_label"] = time.perf_counter() - t
        t = time.perf_counter()
        C = mk.count_transitions(labels, lag, n_states=n_states)
        steps["count"] = time.perf_counter() - t
        total = time.perf_counter() - t0
    maxrss_after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    return {"frames": int(trajs.total_frames), "features": int(trajs.n_features),
            "data_bytes": int(trajs.total_frames * trajs.n_features * trajs[0].dtype.itemsize),
            "seconds": total, "steps": steps, "rss_start": rss.start, "rss_peak": rss.peak,
            "growth": rss.peak - rss.start,
            "growth_getrusage": max(0, maxrss_after - max(maxrss_before, rss.start)),
            "counts": int(C.sum()), "labels_bytes": int(sum(l.nbytes for l in labels))}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--frames", type=float, default=2e7)
    parser.add_argument("--features", type=int, default=4)
    parser.add_argument("--dir", default=None, help="folder for the data (default: a temporary one)")
    parser.add_argument("--chunk-size", type=int, default=None)
    parser.add_argument("--json", action="store_true", help="print one JSON line (for bench_scaling)")
    parser.add_argument("--write-only", default=None, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    n = int(args.frames)
    if args.write_only:
        write_frames(args.write_only, n, args.features)
        return 0

    folder = tempfile.mkdtemp(prefix="msmkit-stream-", dir=args.dir)
    try:
        need = n * args.features * 4 + n * 2 * 8  # data + the 2-D float64 projection
        free = shutil.disk_usage(folder).free
        if need > 0.9 * free:
            print(f"not enough disk: need {need / 1e9:.2f} GB, {free / 1e9:.2f} GB free")
            return 2
        path = os.path.join(folder, "frames.npy")
        t = time.perf_counter()
        # Written by another process: memory freed after writing could otherwise be reused by
        # the pipeline without showing as growth.
        subprocess.run([sys.executable, os.path.abspath(__file__), "--frames", str(n),
                        "--features", str(args.features), "--write-only", path], check=True)
        written = time.perf_counter() - t
        result = run_pipeline(path, folder, chunk_size=args.chunk_size)
        result["write_seconds"] = written
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    if args.json:
        print(json.dumps(result))
        return 0
    data = result["data_bytes"]
    print(f"data: {result['frames']} frames x {result['features']} float32 features = "
          f"{data / 1e6:.0f} MB on disk (written in {result['write_seconds']:.1f} s)")
    for step, sec in result["steps"].items():
        print(f"  {step}: {sec:.2f} s")
    print(f"pipeline: {result['seconds']:.1f} s; RSS at start {result['rss_start'] / 1e6:.0f} MB, "
          f"peak {result['rss_peak'] / 1e6:.0f} MB; labels alone {result['labels_bytes'] / 1e6:.0f} MB")
    ratio = result["growth"] / data
    print(f"streaming peak RSS growth / data size: {result['growth'] / 1e6:.0f} MB / {data / 1e6:.0f} MB "
          f"= {ratio:.3f} (target <= 0.3); getrusage cross-check "
          f"{result['growth_getrusage'] / data:.3f}")
    return 0 if ratio <= 0.3 else 1


if __name__ == "__main__":
    raise SystemExit(main())
