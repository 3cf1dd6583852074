"""msmkit: Markov state models from molecular-dynamics trajectories.

The public API is re-exported here; nothing is computed at import time, and optional
dependencies (ipywidgets, dask, mdtraj, h5py) are imported only where they are used.
"""
from ._version import __version__

from . import demo
from .counts import communicating_classes, count_transitions, kept_states
from .errors import DiagnosticWarning, InputError, ModelFileError
from .estimate import estimate_transition_matrix, log_likelihood
from .io import LazyRun, TrajectorySet, iter_chunks, load_trajectories
from .kinetics import (Route, TransitionPaths, splitting_probability, mean_passage_time, passage_time_matrix, hitting_steps,
                       transition_paths)
from .lagscan import LagScan, lag_scan, suggest_lag
from .macro import (Macrostates, check_macrostate_gap, lumped_propagator, find_macrostates,
                    pcca_affinity, suggest_n_macrostates)
from .model import MarkovModel, build_model, load_model
from .modelfile import save_model
from .posterior import iter_reversible_posterior, sample_reversible_posterior
from .reduce import TICA
from .report import write_report
from .session import Session, load_session, save_session
from .spectral import eigen_decomposition, implied_timescales, equilibrium_distribution
from .states import Microstates, nearest_center
from .uncertainty import ModelSamples, sample_models
from .validate import (CKResult, CrossValidation, LagFlow, chapman_kolmogorov, cross_validate, lag_flow,
                       vamp2_score, vamp2_score_on)

__all__ = sorted([
    "vamp2_score_on",
    "vamp2_score",
    "lag_flow",
    "cross_validate",
    "chapman_kolmogorov",
    "LagFlow",
    "CrossValidation",
    "CKResult",
    "DiagnosticWarning",
    "InputError",
    "LagScan",
    "LazyRun",
    "Macrostates",
    "MarkovModel",
    "Microstates",
    "ModelSamples",
    "ModelFileError",
    "Route",
    "TransitionPaths",
    "TICA",
    "TrajectorySet",
    "build_model",
    "check_macrostate_gap",
    "lumped_propagator",
    "splitting_probability",
    "communicating_classes",
    "count_transitions",
    "demo",
    "eigen_decomposition",
    "estimate_transition_matrix",
    "find_macrostates",
    "implied_timescales",
    "iter_chunks",
    "lag_scan",
    "kept_states",
    "load_model",
    "load_trajectories",
    "log_likelihood",
    "mean_passage_time",
    "passage_time_matrix",
    "hitting_steps",
    "nearest_center",
    "pcca_affinity",
    "transition_paths",
    "save_model",
    "equilibrium_distribution",
    "sample_reversible_posterior",
    "sample_models",
    "iter_reversible_posterior",
    "suggest_lag",
    "suggest_n_macrostates",
    "write_report",
    "Session",
    "save_session",
    "load_session",
])
