"""Benchmark: time and peak memory of the streamed pipeline as the data grow.

Runs bench_streaming.py's pipeline (write .npy -> TICA fit -> transform to files -> Microstates
on a stride of 100 -> counts) in a fresh process for 1e6, 1e7 and 1e8 frames x 4 float32
features (16 bytes a frame: 1.6 GB on disk at 1e8, plus 1.6 GB for the projection), up to
--max-frames, after checking the free disk space. Prints seconds and peak RSS growth per frame
relative to the smallest size: linear scaling keeps the time ratio near 1 and memory per frame
at most the 4-byte labels plus the 1/stride sample.

Usage: python bench/bench_scaling.py [--max-frames N] [--dir PATH]
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--max-frames", type=float, default=1e8)
    parser.add_argument("--features", type=int, default=4)
    parser.add_argument("--dir", default=None, help="folder for the data (default: the temp folder)")
    args = parser.parse_args(argv)

    folder = args.dir or tempfile.gettempdir()
    sizes = [int(s) for s in (1e6, 1e7, 1e8) if s <= args.max_frames]
    free = shutil.disk_usage(folder).free
    print(f"disk free in {folder}: {free / 1e9:.1f} GB; sizes to run: {sizes}")
    here = os.path.dirname(os.path.abspath(__file__))
    rows = []
    for n in sizes:
        need = n * (args.features * 4 + 2 * 8)
        if need > 0.9 * free:
            print(f"skipping {n:.0e} frames: needs {need / 1e9:.1f} GB of disk")
            continue
        out = subprocess.run([sys.executable, os.path.join(here, "bench_streaming.py"), "--frames",
                              str(n), "--features", str(args.features), "--json"]
                             + (["--dir", args.dir] if args.dir else []),
                             capture_output=True, text=True, cwd=here)
        if out.returncode != 0:
            print(out.stdout, out.stderr)
            return 1
        r = json.loads(out.stdout.strip().splitlines()[-1])
        rows.append(r)
        base = rows[0]
        print(f"{r['frames']:>11d} frames ({r['data_bytes'] / 1e9:.2f} GB): {r['seconds']:7.1f} s "
              f"({1e9 * r['seconds'] / r['frames']:.0f} ns/frame, x{(r['seconds'] / r['frames']) / (base['seconds'] / base['frames']):.2f} "
              f"of the smallest per frame); peak RSS growth {r['growth'] / 1e6:.0f} MB = "
              f"{r['growth'] / r['frames']:.1f} bytes/frame ({r['growth'] / r['data_bytes']:.2f} of the data); "
              f"steps {', '.join(f'{k} {v:.1f}s' for k, v in r['steps'].items())}", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
