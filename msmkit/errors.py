"""Exceptions and warnings raised by msmkit."""


class InputError(ValueError):
    """Bad input from the user: the message names the argument, the rule, the value and the fix."""


class ModelFileError(ValueError):
    """A model file that cannot be trusted: wrong format, missing keys, broken invariants."""


class DiagnosticWarning(UserWarning):
    """A finding about the data or the model that is not an error but may mislead
    (a periodic chain, discarded counts, a timescale shorter than the lag, ...)."""


class Cancelled(Exception):
    """A computation stopped on request: the ``cancel`` flag given to it was set between two units of work.
    Nothing it would have returned or changed exists."""
