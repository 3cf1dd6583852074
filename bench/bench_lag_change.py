"""How long does choosing another lag take in the workbench, at ~500 microstates?

After a lag scan of synthetic label trajectories (500 states, a metastable chain), the lag
slider is moved 20 times and each move is timed through the slider's own path: model lookup,
timescale plot to PNG, diagnostics, populations table. Reported: the median against the
100 ms target, the first visits of each lag (nothing cached) on their own, and the ratio to
the plain path measured in the same run (full figure redraw and a full table render).

Run: .venv/bin/python bench/bench_lag_change.py
"""
from __future__ import annotations

import statistics
import time

import numpy as np

TARGET_MS = 100.0
N_STATES = 500
LAGS = [1, 2, 5, 10, 20, 50, 100]
N_CHANGES = 20


def synthetic_labels(n_states=N_STATES, n_runs=20, n_frames=5000, seed=0):
    """Metropolis walk on states 0..n-1 along a line with three wells (energies in kT)."""
    rng = np.random.default_rng(seed)
    x = np.linspace(-1.6, 1.6, n_states)
    energy = 6 * (x ** 2 - 1) ** 2 * (0.6 + 0.4 * np.cos(3 * x) ** 2)
    state = rng.integers(0, n_states, n_runs)
    out = np.empty((n_runs, n_frames), dtype=np.int32)
    for t in range(n_frames):
        step = rng.integers(-6, 7, n_runs)
        new = np.clip(state + step, 0, n_states - 1)
        accept = rng.random(n_runs) < np.exp(-(energy[new] - energy[state]))
        state = np.where(accept, new, state)
        out[:, t] = state
    return list(out)


def main():
    from msmkit.plots import figure_png, plot_timescales
    from msmkit.widgets import Workbench

    labels = synthetic_labels()
    print(f"labels: {len(labels)} runs x {labels[0].size} frames, "
          f"{np.unique(np.concatenate(labels)).size} microstates visited")
    # The states step is skipped: the labels are set directly, which runs the workbench's own wiring.
    wb = Workbench([np.zeros((200, 1))], dt=0.1, unit="ns", lags=LAGS, n_samples=0, progress=False)
    wb.states_panel.labels = labels
    t0 = time.perf_counter()
    scan = wb.scan()
    print(f"scan of {len(LAGS)} lags without bootstrap (bands would only add to the one full draw): "
          f"{time.perf_counter() - t0:.2f} s (start lag {wb.model.lag}, {wb.model.n_states} states kept)")

    order = [LAGS[(3 * i + 1) % len(LAGS)] for i in range(N_CHANGES)]
    times, first = [], []
    seen = {wb.model.lag}
    for lag in order:
        if lag == wb.lag_panel.slider.value:
            continue
        t = time.perf_counter()
        wb.lag_panel.slider.value = lag
        dt_ms = 1e3 * (time.perf_counter() - t)
        assert wb.model.lag == lag and wb.populations_panel.model is wb.model
        times.append(dt_ms)
        if lag not in seen:
            first.append(dt_ms)
            seen.add(lag)

    plain = []
    for lag in LAGS[:5]:
        t = time.perf_counter()
        model = scan.model(lag)
        figure_png(plot_timescales(scan, selected_lag=lag), dpi=96)
        model.populations(temperature=300.0).sort_values("population", ascending=False).to_html()
        plain.append(1e3 * (time.perf_counter() - t))

    med, med_first, med_plain = statistics.median(times), statistics.median(first), statistics.median(plain)
    print(f"lag change via the slider: median {med:.1f} ms over {len(times)} changes "
          f"(max {max(times):.1f} ms); ratio to the {TARGET_MS:.0f} ms target: {med / TARGET_MS:.2f}")
    print(f"  first visit of a lag (nothing cached): median {med_first:.1f} ms over {len(first)}; "
          f"ratio to target: {med_first / TARGET_MS:.2f}")
    print(f"  plain path (full redraw + full table), same run: median {med_plain:.1f} ms over {len(plain)}; "
          f"slider path / plain path: {med / med_plain:.3f}")


if __name__ == "__main__":
    main()
