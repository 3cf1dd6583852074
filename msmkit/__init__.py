"""msmkit: Markov state models from molecular-dynamics trajectories.

The public API is re-exported here; nothing is computed at import time.
"""
__version__ = "0.1.0"

from .counts import connected_sets, count_transitions, largest_connected_set
from .errors import DiagnosticWarning, InputError, ModelFileError
from .estimate import estimate_transition_matrix, log_likelihood
from .model import MarkovModel, build_model
from .modelfile import load_model, save_model
from .spectral import eigen_decomposition, implied_timescales, stationary_distribution

__all__ = sorted([
    "DiagnosticWarning",
    "InputError",
    "MarkovModel",
    "ModelFileError",
    "build_model",
    "connected_sets",
    "count_transitions",
    "eigen_decomposition",
    "estimate_transition_matrix",
    "implied_timescales",
    "largest_connected_set",
    "load_model",
    "log_likelihood",
    "save_model",
    "stationary_distribution",
])
