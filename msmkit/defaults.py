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
