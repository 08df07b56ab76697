"""Where a run's dask graphs execute: an existing dask.distributed scheduler, or a local cluster started for the run.

``dask.distributed`` is imported only when a scheduler is asked for, so ``import domains``
and ``domains --help`` stay free of it.
"""

from __future__ import annotations

import contextlib
import os
import re

from ._errors import InputError

#: ``--scheduler local:N`` starts N worker processes on 127.0.0.1 for the run.
LOCAL_PREFIX = "local:"
#: Seconds to wait for an existing scheduler to answer before giving up.
CONNECT_TIMEOUT_S = 10.0
#: Most workers ``local:N`` will start (a typo such as local:800 must not fork 800 processes).
MAX_LOCAL_WORKERS = 256

_SCHEMES = ("tcp", "tls", "ws", "wss", "ucx", "inproc")
# host (name, IPv4 or [IPv6]) and an optional port, after an optional scheme
_ADDRESS = re.compile(r"^(?:(?P<scheme>[A-Za-z][A-Za-z0-9+.-]*)://)?(?P<host>\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9_.-]+)"
                      r"(?::(?P<port>\d{1,5}))?/?$")


def parse_scheduler(text, option="--scheduler"):
    """Read a scheduler option: ``local:N`` or the address of a running dask.distributed scheduler.

    Parameters
    ----------
    text : str
        ``local:N`` (N worker processes on this machine, started for the run and
        closed at its end) or an address such as ``tcp://10.0.0.5:8786``,
        ``10.0.0.5:8786`` or ``scheduler-host`` (port 8786 by default).
    option : str
        Name of the option, for the message.

    Returns
    -------
    ("local", int) or ("address", str)

    Raises
    ------
    InputError
        One line naming the option and the value, for anything else (an empty
        value, ``local:0``, a URL of the scheduler's web page, a port out of range).

    Examples
    --------
    >>> parse_scheduler("local:2")
    ('local', 2)
    >>> parse_scheduler("tcp://127.0.0.1:8786")
    ('address', 'tcp://127.0.0.1:8786')
    >>> parse_scheduler("local:zero")
    Traceback (most recent call last):
    ...
    domains._errors.InputError: --scheduler: expected local:N with N a whole number of workers from 1 to 256, got 'local:zero'
    """
    if not isinstance(text, str) or not text.strip():
        raise InputError(f"{option}: expected an address (tcp://HOST:PORT) or local:N, got {text!r}")
    value = text.strip()
    if value.lower().startswith(LOCAL_PREFIX):
        count = value[len(LOCAL_PREFIX):]
        if not count.isdigit() or not 1 <= int(count) <= MAX_LOCAL_WORKERS:
            raise InputError(f"{option}: expected local:N with N a whole number of workers from 1 to "
                             f"{MAX_LOCAL_WORKERS}, got {text!r}")
        return "local", int(count)
    match = _ADDRESS.match(value)
    scheme = re.match(r"^([A-Za-z][A-Za-z0-9+.-]*)://", value)
    scheme = scheme.group(1).lower() if scheme else None
    if scheme in ("http", "https"):
        raise InputError(f"{option}: {text!r} is a web address (the scheduler's status page?); give the "
                         "scheduler's own address, e.g. tcp://HOST:8786")
    if match is None or (scheme is not None and scheme not in _SCHEMES):
        raise InputError(f"{option}: expected an address such as tcp://HOST:PORT, HOST:PORT or local:N, got {text!r}")
    port = match.group("port")
    if port is not None and not 1 <= int(port) <= 65535:
        raise InputError(f"{option}: port {port} is out of range (1 to 65535) in {text!r}")
    return "address", value.rstrip("/")


def _local_cluster(n_workers):
    from dask.distributed import LocalCluster

    threads = max(1, (os.cpu_count() or 1) // n_workers)
    # Processes (not threads): the numpy steps hold the GIL; 127.0.0.1 keeps the workers off the network;
    # the status server on a free port of 127.0.0.1 (never a fixed one another cluster may hold).
    return LocalCluster(n_workers=n_workers, threads_per_worker=threads, processes=True, host="127.0.0.1",
                        dashboard_address="127.0.0.1:0")


@contextlib.contextmanager
def scheduler_client(text, option="--scheduler"):
    """A dask.distributed client for the run, the default scheduler of every dask computation inside.

    Parameters
    ----------
    text : str
        As :func:`parse_scheduler`.
    option : str
        Name of the option, for the message.

    Yields
    ------
    distributed.Client
        Connected to the scheduler (or to the local cluster started for the run).
        On exit the client is closed, and a local cluster shut down.

    Raises
    ------
    InputError
        For a bad value, a scheduler that does not answer within
        :data:`CONNECT_TIMEOUT_S` seconds, or dask.distributed missing.

    Examples
    --------
    A bad value fails before anything starts:

    >>> with scheduler_client("http://localhost:8787/status"):
    ...     pass
    Traceback (most recent call last):
    ...
    domains._errors.InputError: --scheduler: 'http://localhost:8787/status' is a web address (the scheduler's status page?); give the scheduler's own address, e.g. tcp://HOST:8786
    """
    kind, value = parse_scheduler(text, option)
    try:
        from dask.distributed import Client
    except ImportError:
        raise InputError(f"{option} needs dask.distributed (pip install 'dask[distributed]')") from None
    cluster = None
    try:
        if kind == "local":
            try:
                cluster = _local_cluster(value)
            except (OSError, RuntimeError) as err:
                raise InputError(f"{option} {text}: could not start {value} local worker(s) "
                                 f"({' '.join(str(err).split())})") from None
            client = Client(cluster)
        else:
            try:
                client = Client(value, timeout=f"{CONNECT_TIMEOUT_S}s")
            except (OSError, ValueError, TypeError) as err:
                raise InputError(f"{option} {text}: no scheduler answered within {CONNECT_TIMEOUT_S:g} s "
                                 f"({' '.join(str(err).split())})") from None
        try:
            yield client
        finally:
            client.close()
    finally:
        if cluster is not None:
            cluster.close()
