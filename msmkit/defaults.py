"""Default settings shared by the library, the command line and the workbench.

One place for each default, so that the same analysis gives the same numbers from Python, from
``msmkit`` on the shell and from the JupyterLab workbench.
"""

#: Slow processes (implied timescales) followed by lag scans, tables and plots.
PROCESSES = 4
#: Chapman–Kolmogorov test: predictions compared up to this multiple of the lag.
CK_MULTIPLES = 4
#: Reactive routes are listed until they carry this share of the total reactive flux.
ROUTE_SHARE = 0.9
#: Bootstrap samples behind an interval (lag scans, populations): fewer give 95 % intervals that
#: cover the truth clearly less often (measured in bench/bench_coverage.py with 10 runs: 0.83 at 20
#: samples; 0.93-0.96 at 200; 0.95-0.97 at 1000, five times the cost).
BOOTSTRAP_SAMPLES = 200
#: Bootstrap samples of the Chapman–Kolmogorov test: its family-wise limit uses Student's t with
#: (samples - 1) degrees of freedom, so fewer samples widen the limit instead of raising false alarms.
CK_SAMPLES = 20
#: Ways of sampling models for intervals on one model's kinetics (msmkit.sample_models): whole runs
#: resampled, or the Bayesian posterior of reversible transition matrices.
UNCERTAINTIES = ("bootstrap", "bayes")
