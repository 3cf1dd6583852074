"""Benchmark: memory while computing features from a 500-frame, 47,681-atom XTC.

MDAnalysisTests ships adk_oplsaa.xtc (solvated adenylate kinase, 10 frames of 47,681 atoms).
XTC frames are self-contained, so 50 copies back to back make a valid 500-frame file (the time
stamps repeat, which the reader reports). Each case runs in a fresh process and prints the peak
growth of the resident memory (RSS sampled every 2 ms) while reading:

* ours: ``load_trajectories(..., features=...)``, which decodes at most ``chunk`` bytes of
  coordinates at a time and keeps only the atoms the features need;
* baseline: ``mdtraj.load`` of the whole file (every atom of every frame in memory at once).

Target: our growth is bounded by the chunk (32 MiB of coordinates by default) plus the
features, whatever the number of frames; the ratio ours / baseline is printed.

Usage: python bench/bench_md_read.py [--copies 50] [--json]
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile

HERE = os.path.dirname(os.path.abspath(__file__))

CASE = r"""
import json, sys, warnings
sys.path.insert(0, {bench!r})
sys.path.insert(0, {root!r})
warnings.simplefilter("ignore")
import mdtraj, numpy, msmkit.io, msmkit.mdfeatures  # imports are not data
from bench_streaming import PeakRSS
case, xtc, gro = {case!r}, {xtc!r}, {gro!r}
with PeakRSS() as rss:
    if case == "baseline":
        t = mdtraj.load(xtc, top=gro)
        shape = [int(t.n_frames), int(t.n_atoms)]
    else:
        trajs = msmkit.io.load_trajectories(xtc, topology=gro, features=case)
        shape = [int(trajs.total_frames), int(trajs.n_features)]
print(json.dumps(dict(case=case, growth=rss.peak - rss.start, shape=shape)))
"""


def run_case(case, xtc, gro) -> dict:
    code = CASE.format(bench=HERE, root=os.path.dirname(HERE), case=case, xtc=xtc, gro=gro)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--copies", type=int, default=50, help="copies of the 10-frame file (50 -> 500 frames)")
    p.add_argument("--json", action="store_true")
    args = p.parse_args(argv)
    import MDAnalysisTests.datafiles as data

    with tempfile.TemporaryDirectory() as tmp:
        xtc = os.path.join(tmp, "adk_oplsaa_x50.xtc")
        raw = open(data.XTC, "rb").read()
        with open(xtc, "wb") as fh:
            for _ in range(args.copies):
                fh.write(raw)
        results = [run_case(c, xtc, data.GRO) for c in ("backbone-torsions", "ca-distances", "baseline")]
    base = results[-1]["growth"]
    if args.json:
        print(json.dumps(results))
        return
    mib = 2 ** 20
    print(f"baseline (mdtraj.load, all atoms): {base / mib:.1f} MiB for {results[-1]['shape'][0]} "
          f"frames x {results[-1]['shape'][1]} atoms")
    for r in results[:-1]:
        print(f"ours {r['case']}: {r['growth'] / mib:.1f} MiB peak RSS growth for "
              f"{r['shape'][0]} frames x {r['shape'][1]} features; ratio to baseline "
              f"{r['growth'] / base:.3f} (target: bounded by the 32 MiB chunk + features)")


if __name__ == "__main__":
    main()
