"""Benchmark: memory of a streamed TICA fit on a memory-mapped-size .npy file.

Writes a float32 .npy of N frames x 4 features (default 2e7 frames = 320 MB) of correlated
synthetic data, then fits msmkit.TICA on it in a fresh subprocess while a thread samples the
resident set size (psutil). Prints the peak RSS growth during the fit divided by the data size
(the baseline is the same process right before the fit), and, for scale, the throughput.

Usage: python bench/bench_tica.py [--frames N] [--dir FOLDER] [--lag L]
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

import numpy as np

CHILD = r"""
import json, resource, sys, threading, time
import numpy as np
import psutil
import msmkit.io, msmkit.reduce
path, lag = sys.argv[1], int(sys.argv[2])
proc = psutil.Process()
trajs = msmkit.io.load_trajectories(path)
# warm up code paths on a small slice so that one-time allocations are not counted
msmkit.reduce.TICA(lag, dim=2).fit(np.asarray(trajs[0][:5000]))
base = proc.memory_info().rss
maxrss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
peak = base
stop = False
def sample():
    global peak
    while not stop:
        peak = max(peak, proc.memory_info().rss)
        time.sleep(0.002)
thread = threading.Thread(target=sample)
thread.start()
t0 = time.perf_counter()
tica = msmkit.reduce.TICA(lag, dim=2).fit(trajs)
seconds = time.perf_counter() - t0
stop = True
thread.join()
peak = max(peak, proc.memory_info().rss)
maxrss_after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
print(json.dumps(dict(base=base, peak=peak, seconds=seconds,
                      maxrss_growth=max(0, maxrss_after - maxrss_before),
                      eigenvalues=tica.eigenvalues_.tolist())))
"""


def write_data(path: str, n_frames: int, seed: int = 0, block: int = 1_000_000) -> None:
    """Four features: two slow AR(1) processes mixed with noise, written block by block."""
    from scipy.signal import lfilter

    rng = np.random.default_rng(seed)
    out = np.lib.format.open_memmap(path, mode="w+", dtype=np.float32, shape=(n_frames, 4))
    a = np.array([0.999, 0.99])
    state = np.zeros(2)
    mix = np.array([[1.0, 0.3, 0.5, 0.0], [0.2, 1.0, 0.0, 0.5]])
    for start in range(0, n_frames, block):
        m = min(block, n_frames - start)
        slow = np.empty((m, 2))
        for j in range(2):
            z = rng.normal(size=m) * np.sqrt(1 - a[j] ** 2)
            slow[:, j], zf = lfilter([1.0], [1.0, -a[j]], z, zi=[a[j] * state[j]])
            state[j] = slow[-1, j]
        out[start:start + m] = slow @ mix + 0.5 * rng.normal(size=(m, 4))
    out.flush()
    del out


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--frames", type=int, default=20_000_000)
    parser.add_argument("--dir", default=None, help="folder for the temporary .npy file")
    parser.add_argument("--lag", type=int, default=10)
    args = parser.parse_args(argv)

    with tempfile.TemporaryDirectory(dir=args.dir) as folder:
        path = os.path.join(folder, "frames.npy")
        t0 = time.perf_counter()
        write_data(path, args.frames)
        size = os.path.getsize(path)
        print(f"data: {args.frames} frames x 4 features float32, {size / 2**20:.0f} MiB "
              f"(written in {time.perf_counter() - t0:.1f} s)")
        result = subprocess.run([sys.executable, "-c", CHILD, path, str(args.lag)],
                                capture_output=True, text=True, check=True)
    r = json.loads(result.stdout.strip().splitlines()[-1])
    growth = r["peak"] - r["base"]
    print(f"TICA fit: {r['seconds']:.2f} s ({args.frames / r['seconds'] / 1e6:.1f} M frames/s), "
          f"eigenvalues {np.round(r['eigenvalues'], 4).tolist()}")
    print(f"peak RSS growth during fit: {growth / 2**20:.1f} MiB (RSS sampled every 2 ms); "
          f"rise of the process high-water mark (ru_maxrss): {r['maxrss_growth'] / 2**20:.1f} MiB")
    print(f"ratio peak RSS growth / data size: {growth / size:.3f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
