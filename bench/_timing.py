"""Shared helpers for the benchmarks: best-of-n wall time and a uniform report line."""
from __future__ import annotations

import time


def best_time(fn, repeat: int = 3) -> float:
    """Smallest wall time of ``repeat`` calls, in seconds (the least disturbed by other load)."""
    best = float("inf")
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - start)
    return best


def report(name: str, ours: float, baseline: float, target: str) -> None:
    """Print one result line: times in seconds and the ratio ours / baseline."""
    print(f"{name}: ours {ours:.4g} s, baseline {baseline:.4g} s, ratio {ours / baseline:.3g} ({target})")
