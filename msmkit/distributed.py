"""The dask specifics: connecting to a scheduler, checking a client, the cluster's error.

Every public function that walks over runs takes ``client=`` (a ``dask.distributed.Client``):
:func:`~msmkit.io.load_trajectories`, :meth:`TrajectorySet.check_values`, :class:`~msmkit.TICA`
``fit`` / ``transform``, :class:`~msmkit.Microstates` ``fit`` / ``assign``,
:func:`~msmkit.count_transitions`, :func:`~msmkit.lag_scan` and
:func:`~msmkit.chapman_kolmogorov`. With ``client=None`` (the default) dask is never imported.

The numerical work is not here: each numeric module owns the per-run kernel of the work it does, and
:mod:`msmkit._execution` maps a kernel over runs, in this process or on the cluster, and
holds the failure checks (which runs failed, results checked complete). This module only
imports :mod:`msmkit.errors` and :mod:`msmkit._checks`.

Failures
--------
A worker that dies is replaced and the tasks it was running run again (dask reruns them up to
``distributed.scheduler.allowed-failures`` times; file-backed runs are simply read again).
A task that keeps killing workers, or in-memory data lost with a dead worker, raises
:class:`ClusterError` naming the runs concerned. Errors in the data (a vanished file, NaN
frames) come back as the usual :class:`~msmkit.errors.InputError`. :func:`connect` turns an
unreachable scheduler into an InputError.
"""
from __future__ import annotations

import os
import sys

from ._checks import brief, require_optional
from .errors import InputError

__all__ = ["ClusterError", "check_client", "connect", "n_threads", "worker_threads"]


class ClusterError(RuntimeError):
    """The cluster could not deliver a result (a task kept killing workers, data was lost with a
    worker, or a run's result did not come back complete)."""


def dask_distributed():
    """The ``distributed`` package (ImportError naming the extra when it is missing)."""
    return require_optional("distributed", "dask", "Running msmkit on a dask cluster")


# ---------------------------------------------------------------------------------------------
# Connecting and checking the client
# ---------------------------------------------------------------------------------------------

def connect(address, *, timeout: float = 10.0, **client_options):
    """A ``dask.distributed.Client`` connected to the scheduler at ``address``.

    Parameters
    ----------
    address : str
        Scheduler address, e.g. ``"tcp://10.0.0.5:8786"``.
    timeout : float
        Seconds to wait for the scheduler to answer.
    **client_options
        Passed to ``dask.distributed.Client``.

    Returns
    -------
    dask.distributed.Client

    Raises
    ------
    InputError
        No scheduler answered at ``address`` within ``timeout`` (nothing is created).
    ImportError
        dask is not installed (``pip install 'msmkit[dask]'``).

    Examples
    --------
    >>> client = connect("tcp://127.0.0.1:8786")  # doctest: +SKIP
    """
    dist = dask_distributed()
    if not isinstance(address, str) or not address.strip():
        raise InputError(f"address must be a scheduler address such as 'tcp://host:8786', "
                         f"but got {brief(address)}")
    if isinstance(timeout, bool) or not isinstance(timeout, (int, float)) or not timeout > 0:
        raise InputError(f"timeout must be a positive number of seconds, but got {brief(timeout)}")
    _probe_scheduler(address.strip(), timeout)
    try:
        return dist.Client(address.strip(), timeout=timeout, **client_options)
    except (OSError, TimeoutError, ValueError) as err:
        raise InputError(f"address: no dask scheduler answered at {address.strip()!r} within "
                         f"{timeout:g} s ({type(err).__name__}: {err}); start one (`dask "
                         f"scheduler`), check host and port, or raise timeout") from None


#: a dask scheduler's first message (its handshake) is far smaller than this
HANDSHAKE_MAX_BYTES = 1 << 26


def _probe_scheduler(address: str, timeout: float) -> None:
    """For a plain TCP address, check within ``timeout`` that the server speaks first with a
    message of plausible size, as a dask scheduler does (it sends a handshake on accept).

    A server that accepts and stays silent would otherwise hang the client far past ``timeout``;
    one that sends other bytes makes it read a giant length prefix (a MemoryError of exbibytes).
    """
    import socket
    import struct
    import time

    rest = address[len("tcp://"):] if address.startswith("tcp://") else address
    if "://" in rest:
        return  # tls, inproc, ucx, ...: left to dask
    host, _, port = rest.rpartition(":")
    host = host.strip("[]")
    if not host or not port.isdigit():
        return
    deadline = time.monotonic() + timeout
    try:
        with socket.create_connection((host, int(port)), timeout=timeout) as sock:
            first = b""
            while len(first) < 8:
                sock.settimeout(max(deadline - time.monotonic(), 1e-3))
                got = sock.recv(8 - len(first))
                if not got:
                    raise ConnectionError("the server closed the connection without a word")
                first += got
    except socket.timeout:
        raise InputError(f"address: the server at {address!r} accepts connections but sent nothing within "
                         f"{timeout:g} s, so it is not a dask scheduler; check the port, or raise timeout") from None
    except OSError as err:
        raise InputError(f"address: no dask scheduler answered at {address!r} within {timeout:g} s "
                         f"({type(err).__name__}: {err}); start one (`dask scheduler`), check host and port, "
                         f"or raise timeout") from None
    (size,) = struct.unpack("<Q", first)
    if size > HANDSHAKE_MAX_BYTES:
        raise InputError(f"address: the server at {address!r} does not speak the dask protocol (the first "
                         f"message claims {size} bytes); check that the port is the scheduler's")


def check_client(client) -> None:
    """Raise InputError unless ``client`` is a running ``dask.distributed.Client``."""
    if isinstance(client, (str, bytes, os.PathLike)):
        raise InputError(f"client must be a dask.distributed.Client, but got the address "
                         f"{brief(client)}; connect first: "
                         f"client = msmkit.distributed.connect({brief(client)})")
    dist = dask_distributed()
    if not isinstance(client, dist.Client):
        raise InputError(f"client must be a dask.distributed.Client (or None to compute here), "
                         f"but got {type(client).__name__}")
    if client.status != "running":
        raise InputError(f"client is {client.status}, not running; connect a new one "
                         f"(msmkit.distributed.connect(address)) or pass client=None")


def n_threads(client) -> int:
    """Worker threads of the cluster behind ``client`` (at least 1)."""
    try:
        return max(1, sum(client.nthreads().values()))
    except Exception:  # pragma: no cover - an unusual client; one partition per run is fine
        return 1


def worker_threads() -> int | None:
    """Threads of the dask worker running the current task; None outside a worker (or without
    dask), where a kernel may use every core."""
    dist = sys.modules.get("distributed")  # a worker has imported it; never import it here
    if dist is None:
        return None
    try:
        return max(1, int(dist.get_worker().state.nthreads))
    except Exception:  # outside a worker
        return None
