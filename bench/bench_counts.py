"""Counting 2e7 frames (100 runs), 1000 states, lag 10, against the numpy floor: pair indices
built with numpy and one np.bincount pass over them. Target: ratio <= 0.8."""
import argparse

import numpy as np

from _timing import best_time, report
import msmkit as mk


def numpy_floor(runs, lag, n):
    start = np.concatenate([r[:-lag] for r in runs]).astype(np.intp)
    end = np.concatenate([r[lag:] for r in runs])
    return np.bincount(start * n + end, minlength=n * n)


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--frames", type=float, default=2e7)
    ap.add_argument("--runs", type=int, default=100)
    ap.add_argument("--states", type=int, default=1000)
    ap.add_argument("--lag", type=int, default=10)
    a = ap.parse_args()
    rng = np.random.default_rng(0)
    per = int(a.frames) // a.runs
    runs = [rng.integers(0, a.states, per).astype(np.int32) for _ in range(a.runs)]
    ours = mk.count_transitions(runs, a.lag, n_states=a.states)
    assert np.array_equal(ours.toarray().ravel(), numpy_floor(runs, a.lag, a.states)), "counts differ"
    t_ours = best_time(lambda: mk.count_transitions(runs, a.lag, n_states=a.states))
    t_base = best_time(lambda: numpy_floor(runs, a.lag, a.states))
    report(f"count_transitions {a.frames:.0e} frames, {a.runs} runs, {a.states} states, lag {a.lag}",
           t_ours, t_base, "target <= 0.8")


if __name__ == "__main__":
    main()
