"""The demo scenario: synthetic folding runs of an invented mini-protein.

Everything here is INVENTED for demonstration and testing: the landscape, the molecule and
the numbers belong to no real system and to no published benchmark. A small protein-like chain
is reduced to two collective coordinates, ``progress`` (unfolded -> folded) and ``twist``, on a
free-energy landscape with three basins:

==============  =========================  ============================================
basin           where (progress, twist)    character
==============  =========================  ============================================
unfolded (0)    (-1.5, 0.6)                broad and shallow: many conformations
intermediate    (0.1, -0.5)                a twisted, partly formed state
folded (2)      (1.4, 0.5)                 narrow and deep
==============  =========================  ============================================

The coordinates move by overdamped Brownian dynamics at temperature ``kT = 1`` (energies are
in kT), integrated with Metropolis-adjusted Langevin steps, so that the long-run distribution
is exactly ``exp(-V/kT)`` apart from sampling noise [1]_. Each run starts from a frame drawn
from that distribution. Frames are written every ``DT`` = 0.1 ns as six named features: the two
coordinates, three noisy observables derived from them and one feature of pure noise.

The slowest relaxation (unfolded <-> folded) takes about 50 ns (~500 frames) and the next
about 16 ns, so every run of 200-800 ns crosses the barriers several times; a lag scan of a
Markov model on ~100 microstates levels off after a few to tens of frames.
:func:`reference_timescales` gives the relaxation times of the continuous dynamics from a
fine-grid discretisation, and :func:`basin_of` with :func:`potential` lets one check basin
populations against the Boltzmann distribution.

References
----------
.. [1] P. J. Rossky, J. D. Doll and H. L. Friedman, J. Chem. Phys. 69, 4628 (1978)
       (Brownian dynamics with a Metropolis acceptance step).

Examples
--------
>>> from msmkit import demo
>>> trajs = demo.trajectories(seed=0)
>>> len(trajs), trajs.feature_names[:2], demo.DT, demo.UNIT
(20, ('progress', 'twist'), 0.1, 'ns')
"""
from __future__ import annotations

import numpy as np

from ._checks import check_int
from .errors import InputError
from .io import TrajectorySet

__all__ = [
    "BASIN_NAMES",
    "DIFFUSION",
    "DT",
    "FEATURE_NAMES",
    "UNIT",
    "basin_of",
    "reference_populations",
    "reference_timescales",
    "simulate",
    "potential",
    "trajectories",
]

#: Time between frames, in UNIT.
DT = 0.1
#: Time unit of DT and of every time this module reports.
UNIT = "ns"
#: Names of the features written per frame.
FEATURE_NAMES = ("progress", "twist", "end_to_end_nm", "contacts", "gyration_nm", "jitter")
#: Names of the three basins, in label order (see :func:`basin_of`).
BASIN_NAMES = ("unfolded", "intermediate", "folded")

# The invented landscape (energies in kT): three Gaussian wells on a gentle quartic bowl.
# Columns: center progress, center twist, width along progress, width along twist, depth.
_WELLS = np.array([
    [-1.5, 0.6, 0.55, 0.50, 5.0],   # unfolded
    [0.1, -0.5, 0.38, 0.32, 5.0],   # intermediate
    [1.4, 0.5, 0.30, 0.30, 6.3],    # folded
])
_BOWL = 0.06                        # V += _BOWL * (progress^4 + 2 twist^4)
_TIME_UNIT_NS = 5.0                 # one unit of the integrator's time, in ns
#: Diffusion constant of both coordinates, in coordinate^2 per ns.
DIFFUSION = 1.0 / _TIME_UNIT_NS
_SUBSTEPS = 4                       # integrator steps per frame (~97 % accepted)
_GRID = dict(progress=(-3.5, 3.5), twist=(-2.8, 3.0))   # box holding all but ~1e-9 of the weight

_X0, _Y0 = _WELLS[:, 0:1], _WELLS[:, 1:2]
_AX, _AY = 1 / (2 * _WELLS[:, 2:3] ** 2), 1 / (2 * _WELLS[:, 3:4] ** 2)
_DEPTH = _WELLS[:, 4:5]


def potential(progress, twist) -> np.ndarray:
    """The invented free-energy landscape V(progress, twist), in kT.

    Parameters
    ----------
    progress, twist : array-like
        Coordinates (broadcast against each other).

    Returns
    -------
    ndarray
        V in units of kT, same shape as the broadcast inputs.
    """
    x, y = np.broadcast_arrays(np.asarray(progress, dtype=float), np.asarray(twist, dtype=float))
    q = (x[..., None] - _X0[:, 0]) ** 2 * _AX[:, 0] + (y[..., None] - _Y0[:, 0]) ** 2 * _AY[:, 0]
    return -(_DEPTH[:, 0] * np.exp(-q)).sum(axis=-1) + _BOWL * (x ** 4 + 2 * y ** 4)


def basin_of(progress, twist) -> np.ndarray:
    """Basin label (0 unfolded, 1 intermediate, 2 folded) of each point.

    A point belongs to the basin whose well term ``depth * exp(-q)`` is largest there; the
    three regions tile the plane.
    """
    x, y = np.broadcast_arrays(np.asarray(progress, dtype=float), np.asarray(twist, dtype=float))
    q = (x[..., None] - _X0[:, 0]) ** 2 * _AX[:, 0] + (y[..., None] - _Y0[:, 0]) ** 2 * _AY[:, 0]
    return np.argmax(np.log(_DEPTH[:, 0]) - q, axis=-1)


def _grid(spacing: float):
    xs = np.arange(*_GRID["progress"], spacing) + spacing / 2
    ys = np.arange(*_GRID["twist"], spacing) + spacing / 2
    return xs, ys


def reference_populations(spacing: float = 0.01) -> dict[str, float]:
    """Boltzmann populations of the three basins by grid integration of exp(-V/kT)."""
    xs, ys = _grid(spacing)
    x, y = np.meshgrid(xs, ys, indexing="ij")
    weight = np.exp(-potential(x, y))
    label = basin_of(x, y)
    total = weight.sum()
    return {name: float(weight[label == i].sum() / total) for i, name in enumerate(BASIN_NAMES)}


def reference_timescales(k: int = 3, spacing: float = 0.05) -> np.ndarray:
    """The k slowest relaxation times of the continuous dynamics, in ns.

    From a grid discretisation of the Smoluchowski (Fokker-Planck) operator: neighbouring
    cells exchange at rate ``D/h^2 exp(-(V_j - V_i) / 2kT)``, which obeys detailed balance with
    exp(-V/kT); the times are -1/eigenvalue. The default grid is converged to about 0.1 %.
    The simulated runs relax 5-10 % slower than these (finite integrator step, ~3 % of moves
    rejected), so compare estimates from the data within about 10-15 % plus sampling error.
    """
    import scipy.sparse as sp
    from scipy.sparse.linalg import eigsh

    k = check_int(k, "k", minimum=1, maximum=20)
    xs, ys = _grid(spacing)
    x, y = np.meshgrid(xs, ys, indexing="ij")
    v = potential(x, y).ravel()
    index = np.arange(v.size).reshape(x.shape)
    pairs = [(index[:-1, :], index[1:, :]), (index[:, :-1], index[:, 1:])]
    a = np.concatenate([p.ravel() for p, q in pairs] + [q.ravel() for p, q in pairs])
    b = np.concatenate([q.ravel() for p, q in pairs] + [p.ravel() for p, q in pairs])
    rate = 1.0 / spacing ** 2  # D = 1 in integrator units
    out = np.bincount(a, weights=rate * np.exp(-(v[b] - v[a]) / 2), minlength=v.size)
    # Symmetrized generator pi^(1/2) K pi^(-1/2): off-diagonal entries are all D/h^2.
    sym = sp.csc_matrix((np.full(a.size, rate), (a, b)), shape=(v.size, v.size)) - sp.diags(out)
    w = eigsh(sym, k=k + 1, sigma=1e-9, which="LM", return_eigenvectors=False)
    w = np.sort(w)[::-1][1:]
    return -_TIME_UNIT_NS / w


# Stacked constants for the integrator: axis 0 is (progress, twist), axis 1 the wells.
_CENTERS = np.stack([_X0, _Y0])          # (2, 3, 1)
_INV2W2 = np.stack([_AX, _AY])           # (2, 3, 1)
_BOWL_W = _BOWL * np.array([[1.0], [2.0]])


def _energy_and_force(p):
    """V (kT) and force -grad V at positions p of shape (2, n_runs)."""
    d = p[:, None, :] - _CENTERS
    e = _DEPTH * np.exp(-(d * d * _INV2W2).sum(axis=0))
    p2 = p * p
    v = (_BOWL_W * p2 * p2).sum(axis=0) - e.sum(axis=0)
    f = -(2 * _INV2W2 * d * e).sum(axis=1) - 4 * _BOWL_W * p2 * p
    return v, f


def _equilibrium_starts(rng, n: int, spacing: float = 0.02):
    xs, ys = _grid(spacing)
    x, y = np.meshgrid(xs, ys, indexing="ij")
    p = np.exp(-potential(x, y)).ravel()
    cell = rng.choice(p.size, size=n, p=p / p.sum())
    jitter = rng.uniform(-spacing / 2, spacing / 2, size=(2, n))
    return x.ravel()[cell] + jitter[0], y.ravel()[cell] + jitter[1]


def simulate(n_frames, *, seed=0) -> list[np.ndarray]:
    """Coordinates (progress, twist) of runs of the demo dynamics.

    Parameters
    ----------
    n_frames : sequence of int
        Frames of each run (one run per entry); frames are ``DT`` apart.
    seed : int
        Random seed; the same seed gives the same runs.

    Returns
    -------
    list of ndarray (n_frames[i], 2)
    """
    lengths = [check_int(n, "n_frames", minimum=1) for n in np.atleast_1d(n_frames)]
    if not lengths:
        raise InputError("n_frames is empty; give the length of at least one run")
    seed = check_int(seed, "seed", minimum=0)
    rng = np.random.default_rng(seed)
    n_runs, n_max = len(lengths), max(lengths)
    p = np.stack(_equilibrium_starts(rng, n_runs))
    v, f = _energy_and_force(p)
    h = DT / _TIME_UNIT_NS / _SUBSTEPS
    out = np.empty((n_max, 2, n_runs))
    block = 256
    for f0 in range(0, n_max, block):
        nf = min(block, n_max - f0)
        noise = rng.standard_normal((nf, _SUBSTEPS, 2, n_runs)) * np.sqrt(2 * h)
        log_u4h = np.log(rng.random((nf, _SUBSTEPS, n_runs))) * (4 * h)
        for i in range(nf):
            for s in range(_SUBSTEPS):
                # Metropolis-adjusted Langevin step (D = 1, kT = 1 in integrator units):
                # propose q = p + h f(p) + sqrt(2h) z, accept with the Metropolis-Hastings
                # ratio of exp(-V) and the Gaussian proposal densities (all terms times 4h).
                z = noise[i, s]
                q = p + h * f + z
                qv, qf = _energy_and_force(q)
                back = p - q - h * qf
                accept = log_u4h[i, s] < 4 * h * (v - qv) + (z * z).sum(axis=0) - (back * back).sum(axis=0)
                np.copyto(p, q, where=accept)
                np.copyto(v, qv, where=accept)
                np.copyto(f, qf, where=accept)
            out[f0 + i] = p
    return [np.ascontiguousarray(out[:n, :, i]) for i, n in enumerate(lengths)]


def _sigmoid(z):
    return 1.0 / (1.0 + np.exp(-z))


def _features(coords: np.ndarray, rng) -> np.ndarray:
    """The six written features of one run: two coordinates, three noisy observables derived
    from them (all invented) and one of pure noise."""
    x, y = coords[:, 0], coords[:, 1]
    n = len(x)
    end_to_end = 3.0 - 1.1 * np.tanh(0.9 * x) + 0.12 * rng.standard_normal(n)
    contacts = 40 * _sigmoid(3 * (x - 0.8)) + 12 * _sigmoid(-4 * y) + rng.standard_normal(n)
    gyration = 1.45 - 0.3 * _sigmoid(2.5 * x) + 0.06 * y ** 2 + 0.02 * rng.standard_normal(n)
    jitter = rng.standard_normal(n)
    return np.column_stack([x, y, end_to_end, contacts, gyration, jitter])


def trajectories(seed=0, *, n_runs=20, min_frames=2000, max_frames=8000) -> TrajectorySet:
    """The demo data set: ``n_runs`` runs of varying length, six named features per frame.

    Parameters
    ----------
    seed : int
        Random seed; the same seed gives identical data.
    n_runs : int
        Number of runs.
    min_frames, max_frames : int
        Run lengths are drawn uniformly between these (frames, ``DT`` apart).

    Returns
    -------
    TrajectorySet
        With ``feature_names == FEATURE_NAMES``, ``dt == DT`` and ``unit == UNIT``. Feature 0
        and 1 are the coordinates themselves (see :func:`basin_of`).
    """
    seed = check_int(seed, "seed", minimum=0)
    n_runs = check_int(n_runs, "n_runs", minimum=1)
    lo = check_int(min_frames, "min_frames", minimum=2)
    hi = check_int(max_frames, "max_frames", minimum=lo)
    rng = np.random.default_rng([seed, 1])
    lengths = rng.integers(lo, hi + 1, size=n_runs)
    coords = simulate(lengths, seed=seed)
    runs = [_features(c, rng) for c in coords]
    return TrajectorySet(runs, FEATURE_NAMES, dt=DT, unit=UNIT)
