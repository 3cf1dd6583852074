"""Counting 2e7 frames (100 runs), 1000 states, lag 10, against the numpy floor: pair indices
built with numpy and one np.bincount pass over them (one thread). Target: ratio <= 0.5.

Two kinds of label trajectories: "sticky" (each frame keeps the state of the previous one with
probability --stay, as label trajectories of molecular dynamics do) for the target, and uniformly
random labels (no memory at all: the worst case for msmkit, reported alongside)."""
import argparse
import sys
from pathlib import Path

import numpy as np

# measure the msmkit of this checkout, not whichever one is installed
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from _timing import best_time, report  # noqa: E402
import msmkit as mk  # noqa: E402


def numpy_floor(runs, lag, n):
    start = np.concatenate([r[:-lag] for r in runs]).astype(np.intp)
    end = np.concatenate([r[lag:] for r in runs])
    return np.bincount(start * n + end, minlength=n * n)


def sticky_labels(rng, n, k, stay):
    """Labels that keep the previous frame's state with probability ``stay``, else jump uniformly."""
    jumps = rng.random(n) >= stay
    jumps[0] = True
    values = rng.integers(0, k, n).astype(np.int32)
    last_jump = np.maximum.accumulate(np.where(jumps, np.arange(n), 0))
    return values[last_jump]


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--frames", type=float, default=2e7)
    ap.add_argument("--runs", type=int, default=100)
    ap.add_argument("--states", type=int, default=1000)
    ap.add_argument("--lag", type=int, default=10)
    ap.add_argument("--stay", type=float, default=0.95, help="probability that a frame keeps the state")
    a = ap.parse_args()
    rng = np.random.default_rng(0)
    per = int(a.frames) // a.runs
    for kind in ("sticky", "uniform"):
        if kind == "sticky":
            runs = [sticky_labels(rng, per, a.states, a.stay) for _ in range(a.runs)]
        else:
            runs = [rng.integers(0, a.states, per).astype(np.int32) for _ in range(a.runs)]
        ours = mk.count_transitions(runs, a.lag, n_states=a.states)
        assert np.array_equal(ours.toarray().ravel(), numpy_floor(runs, a.lag, a.states)), "counts differ"
        t_ours = best_time(lambda: mk.count_transitions(runs, a.lag, n_states=a.states))
        t_base = best_time(lambda: numpy_floor(runs, a.lag, a.states))
        target = f"target <= 0.5, stay={a.stay}" if kind == "sticky" else "worst case, no target"
        report(f"count_transitions [{kind}] {a.frames:.0e} frames, {a.runs} runs, {a.states} states, lag {a.lag}",
               t_ours, t_base, target)


if __name__ == "__main__":
    main()
