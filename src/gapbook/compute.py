"""Where the parallel work runs: this machine's processes, or an existing Dask cluster.

The imputation chains (and so every imputation of the sensitivity grid) and the simulation
replicates are independent tasks, each drawing from its own child of one
``numpy.random.SeedSequence``. :func:`iterate_tasks` runs such tasks and yields the
results in task order: in this process (one job), in local worker processes (joblib's
process backend), or, inside :func:`on_cluster`, on the workers of a Dask cluster through
joblib's Dask backend. Because no task's randomness depends on which worker runs it or
when, the results are the same bytes wherever they run.

What travels to a Dask cluster is what a task's function is called with: the prepared
arrays of the study (the imputation design, codes and values; the simulation's pool of
complete rows), pickled. The data file's path never does. The results come back pickled
too, so only point a run at a cluster you control.
"""
from __future__ import annotations

import contextlib
import contextvars
import ipaddress
import re
from typing import Any, Callable, Iterable, Iterator, List, Optional, Sequence

from .errors import InputError

__all__ = ["LOCAL", "check_cluster_address", "where_work_runs", "on_cluster", "iterate_tasks", "run_tasks",
           "cluster_workers", "workers_phrase"]

LOCAL = "local"
CONNECT_TIMEOUT = 10  # seconds to reach the scheduler (or to see a worker) before the stage stops
_HOST = re.compile(r"^(?=.{1,253}$)[A-Za-z0-9](?:[A-Za-z0-9-]{0,61}[A-Za-z0-9])?"
                   r"(?:\.[A-Za-z0-9](?:[A-Za-z0-9-]{0,61}[A-Za-z0-9])?)*$")
_ADDRESS = re.compile(r"^(?:tcp://)?(?:\[(?P<ipv6>[0-9A-Fa-f:.]+)\]|(?P<host>[^:/\[\]]+)):(?P<port>[0-9]{1,5})$")

_CLIENT: contextvars.ContextVar[Any] = contextvars.ContextVar("gapbook_dask_client", default=None)


def check_cluster_address(value: str) -> str:
    """Validate ``compute.cluster``: ``local`` or a Dask scheduler address; returns it as ``tcp://host:port``.

    Accepted forms are ``tcp://host:port`` and ``host:port`` (host a name, an IPv4 address or
    an IPv6 address in brackets; port 1 to 65535). Anything else raises ``InputError``.

    Parameters
    ----------
    value : str
        The ``compute.cluster`` setting.

    Returns
    -------
    str
        ``local``, or the address as ``tcp://host:port``.
    """
    text = str(value).strip()
    if text == LOCAL:
        return LOCAL
    match = _ADDRESS.match(text)
    valid = False
    if match and 1 <= int(match.group("port")) <= 65535:
        if match.group("ipv6"):
            with contextlib.suppress(ValueError):
                valid = ipaddress.ip_address(match.group("ipv6")).version == 6
        else:
            valid = bool(_HOST.match(match.group("host")))
    if not valid:
        shown = text if len(text) <= 80 else text[:77] + "..."
        raise InputError(f"'{shown}' is not a Dask scheduler address; give 'local' or tcp://host:port "
                         "(e.g. tcp://10.0.0.5:8786)", option="cluster")
    port = int(match.group("port"))
    if match.group("ipv6"):
        return f"tcp://[{match.group('ipv6')}]:{port}"
    return f"tcp://{match.group('host')}:{port}"


def where_work_runs(address: str) -> str:
    """One line saying where the parallel tasks run and what leaves this machine (for ``check`` and ``run``).

    Parameters
    ----------
    address : str
        ``local`` or a checked scheduler address.

    Returns
    -------
    str
    """
    if address == LOCAL:
        return ("this machine: imputation chains (the follow-up stage's too), sensitivity grid and simulation replicates "
                "run in local processes")
    return (f"the Dask cluster at {address}: the imputation chains (the follow-up stage's too), the sensitivity grid "
            "and the simulation replicates run on its workers, and the prepared study arrays (participant values; never the file "
            "path) are sent to them")


@contextlib.contextmanager
def on_cluster(address: str, *, timeout: float = CONNECT_TIMEOUT) -> Iterator[Optional[Any]]:
    """Within this block, :func:`iterate_tasks` runs on the Dask cluster at ``address`` (``local``: no change).

    Connects a ``distributed.Client`` to an existing scheduler (it never starts one) and
    closes it on leaving. Raises ``InputError`` when the address is not valid or the
    scheduler cannot be reached within ``timeout`` seconds.

    Parameters
    ----------
    address : str
        ``local`` or a Dask scheduler address.
    timeout : float
        Seconds to wait for the scheduler.

    Returns
    -------
    iterator
        Yields the ``distributed.Client`` (None for ``local``) once, as a context manager.
    """
    address = check_cluster_address(address)
    if address == LOCAL:
        yield None
        return
    from distributed import Client

    try:
        client = Client(address, timeout=timeout, set_as_default=False)
    except OSError as exc:  # TimeoutError included
        raise InputError(f"cannot reach the Dask scheduler at {address} within {timeout:g} s "
                         f"({type(exc).__name__}); start the cluster, check the address, or run locally",
                         option="cluster") from None
    token = _CLIENT.set(client)
    try:
        yield client
    finally:
        _CLIENT.reset(token)
        client.close()


def cluster_workers() -> int:
    """Threads across the workers of the cluster in use (0 outside :func:`on_cluster` or with no worker).

    Returns
    -------
    int
    """
    client = _CLIENT.get()
    return 0 if client is None else int(sum(client.nthreads().values()))


def workers_phrase(n_jobs: int) -> str:
    """Where the tasks of this context run, in words for a page: local workers, or the cluster's worker threads.

    Parameters
    ----------
    n_jobs : int
        The stage's setting for local worker processes (not used on a cluster).

    Returns
    -------
    str
        For example ``2 local worker process(es)`` or ``the Dask cluster's 8 worker thread(s)``.
    """
    client = _CLIENT.get()
    if client is None:
        return f"{n_jobs} local worker process(es)" if n_jobs > 1 else "one process (n_jobs = 1)"
    return f"the Dask cluster's {cluster_workers()} worker thread(s)"


def iterate_tasks(function: Callable[..., Any], tasks: Iterable[Sequence[Any]], *, n_jobs: int = 1,
                  batch_size: Any = 1) -> Iterator[Any]:
    """``function(*task)`` for each task, yielded in task order as the results arrive, run where this context says.

    Parameters
    ----------
    function : a module-level function (workers import it by name).
    tasks : argument tuples, one per task.
    n_jobs : local worker processes (1 runs in this process); inside :func:`on_cluster` every
        worker thread of the cluster is used and ``n_jobs`` is not.
    batch_size : tasks sent to a worker at a time (joblib's ``batch_size``).

    Yields
    ------
    The results, in the order of ``tasks``; a caller that keeps only what it needs of each
    holds one result at a time, not all of them.
    """
    client = _CLIENT.get()
    if client is None and n_jobs == 1:
        for task in tasks:
            yield function(*task)
        return
    from joblib import Parallel, delayed, parallel_config

    if client is None:
        backend: Any = contextlib.nullcontext()
    else:
        backend = parallel_config(backend="dask", client=client, wait_for_workers_timeout=CONNECT_TIMEOUT)
    with backend:
        runner = Parallel(n_jobs=n_jobs if client is None else -1, return_as="generator", batch_size=batch_size)
        try:
            yield from runner(delayed(function)(*task) for task in tasks)
        except TimeoutError as exc:
            if client is not None and "no worker" in str(exc):
                raise InputError(f"the Dask cluster at {client.scheduler.address} has no worker after "
                                 f"{CONNECT_TIMEOUT} s; start its workers or run locally", option="cluster") from None
            raise


def run_tasks(function: Callable[..., Any], tasks: Iterable[Sequence[Any]], *, n_jobs: int = 1,
              batch_size: Any = 1) -> List[Any]:
    """``[function(*task) for task in tasks]`` run where this context says (see :func:`iterate_tasks`).

    Parameters
    ----------
    function : callable
        Called once per task with the task's items as arguments.
    tasks : iterable of sequences
        The arguments of each task; each carries its own seed, so results do not depend on where it runs.
    n_jobs : int
        Local worker processes (1: in this process); ignored on a cluster.
    batch_size : int or "auto"
        Tasks sent to a worker at a time (joblib's ``batch_size``).

    Returns
    -------
    list
        The results in task order.
    """
    return list(iterate_tasks(function, tasks, n_jobs=n_jobs, batch_size=batch_size))
