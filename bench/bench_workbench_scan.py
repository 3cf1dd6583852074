"""The workbench's lag sweep at 3000 microstates: the demo scenario clustered into 3000 states,
6 lags x (1 + 20 bootstrap samples), run through the same LagPanel.scan the workbench button calls.
Prints the wall time (target: under a minute on 2 cores) and the ratio to 6 single-lag
build_model calls measured in the same run."""
import argparse
import time
import warnings

import msmkit as mk
from _timing import best_time


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--states", type=int, default=3000)
    ap.add_argument("--samples", type=int, default=20)
    a = ap.parse_args()
    trajs = mk.demo.trajectories(seed=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", mk.DiagnosticWarning)
        labels = mk.Microstates(n_states=a.states, method="minibatch", seed=0, stride=2).fit(trajs).assign(trajs)
        lags = [1, 2, 5, 10, 20, 40]
        single = best_time(lambda: mk.build_model(labels, 10, dt=mk.demo.DT, unit=mk.demo.UNIT), 2)
        from msmkit.widgets import LagPanel
        panel = LagPanel(labels, dt=mk.demo.DT, unit=mk.demo.UNIT, lags=lags, n_samples=a.samples, progress=False)
        start = time.perf_counter()
        panel.scan()
        t_scan = time.perf_counter() - start
    print(f"workbench lag sweep: {len(lags)} lags x (1 + {a.samples} samples), {trajs.total_frames} frames, "
          f"{a.states} microstates: {t_scan:.3g} s (target < 60 s)")
    print(f"single build_model at lag 10: {single:.3g} s; sweep / (6 x single) = {t_scan / (6 * single):.3g}")


if __name__ == "__main__":
    main()
