"""Processes of one run on several machines: who they are, how they start, what they share.

A run over several processes (``python -m basinview run``, see
``docs/distributed.md``) is started once per process by any launcher. Each
process learns its place from the environment (:func:`cluster_from_env`):

* ``BASINVIEW_COORDINATOR`` (``host:port`` of process 0's coordinator),
  ``BASINVIEW_PROCESS_COUNT`` and ``BASINVIEW_PROCESS_ID`` (0 to count - 1):
  the plain way, for a shell on each host;
* otherwise, under SLURM (``srun``), JAX reads ``SLURM_*`` itself
  (``jax.distributed.initialize()`` without arguments detects Slurm and Open MPI);
* otherwise the run is one process and nothing is initialised.

:func:`start_cluster` calls ``jax.distributed.initialize`` before any JAX
computation, with CPU collectives over gloo and timeouts of seconds, not
minutes: a process that dies is noticed by the others within
``BASINVIEW_HEARTBEAT_SECONDS`` (default 10). The coordinator binds only to
the address it was given (``127.0.0.1:PORT`` stays on this machine).

The collectives (:func:`gather_rows`, :func:`agree`, :func:`barrier`) are
``jax.experimental.multihost_utils`` calls; with one process they return
their input. A collective that fails because a peer is gone raises a
:class:`ClusterError` that says so.
"""

from __future__ import annotations

import hashlib
import os
import socket
from collections.abc import Callable, Mapping
from typing import Any, NamedTuple, TypeVar

import numpy as np

from .errors import ClusterError

__all__ = [
    "ENV_COORDINATOR",
    "ENV_PROCESS_COUNT",
    "ENV_PROCESS_ID",
    "Cluster",
    "agree",
    "barrier",
    "cluster_from_env",
    "gather_rows",
    "shared_cores",
    "shared_cores_note",
    "start_cluster",
    "unit_share",
]

ENV_COORDINATOR = "BASINVIEW_COORDINATOR"
ENV_PROCESS_COUNT = "BASINVIEW_PROCESS_COUNT"
ENV_PROCESS_ID = "BASINVIEW_PROCESS_ID"
ENV_HEARTBEAT = "BASINVIEW_HEARTBEAT_SECONDS"
ENV_INIT_TIMEOUT = "BASINVIEW_INIT_TIMEOUT_SECONDS"
_MESSAGE_BYTES = 480
T = TypeVar("T")


class Cluster(NamedTuple):
    """Where this process stands in a run.

    Attributes:
        process_id: this process, 0 to ``process_count - 1`` (0 writes the results).
        process_count: processes in the run (1: no cluster).
        coordinator: ``host:port`` of the coordinator, ``"slurm"`` when JAX
            reads it from SLURM's environment, ``""`` for one process.
    """

    process_id: int = 0
    process_count: int = 1
    coordinator: str = ""

    @property
    def is_writer(self) -> bool:
        """Whether this process gathers and writes the results (process 0)."""
        return self.process_id == 0


def _int_env(env: Mapping[str, str], name: str, low: int) -> int:
    text = env.get(name, "")
    try:
        value = int(text)
    except ValueError:
        raise ClusterError(
            f"{name}={text!r} is not an integer; set it to a whole number of at least {low}."
        ) from None
    if value < low:
        raise ClusterError(f"{name} must be at least {low}; got {value}.")
    return value


def cluster_from_env(env: Mapping[str, str] | None = None) -> Cluster:
    """This process's place in the run, read from the environment (see module doc).

    Raises:
        ClusterError: when only some of the ``BASINVIEW_*`` variables are set,
            or they are not numbers in range.
    """
    env = os.environ if env is None else env
    names = (ENV_COORDINATOR, ENV_PROCESS_COUNT, ENV_PROCESS_ID)
    given = [n for n in names if env.get(n)]
    if given:
        missing = [n for n in names if n not in given]
        if missing:
            raise ClusterError(
                f"{', '.join(given)} set but {', '.join(missing)} not; a run over several "
                f"processes needs all three (e.g. {ENV_COORDINATOR}=10.0.0.1:8476 "
                f"{ENV_PROCESS_COUNT}=2 {ENV_PROCESS_ID}=0 on the first host)."
            )
        address = env[ENV_COORDINATOR]
        host, _, port = address.rpartition(":")
        if not host or not port.isdigit() or not 0 < int(port) < 65536:
            raise ClusterError(
                f"{ENV_COORDINATOR}={address!r} must be HOST:PORT, e.g. 127.0.0.1:8476 (the "
                "address of process 0 and a free port there)."
            )
        count = _int_env(env, ENV_PROCESS_COUNT, 1)
        pid = _int_env(env, ENV_PROCESS_ID, 0)
        if pid >= count:
            raise ClusterError(
                f"{ENV_PROCESS_ID}={pid} but {ENV_PROCESS_COUNT}={count}; ids run from 0 to "
                f"{count - 1}."
            )
        return Cluster(pid, count, address)
    if env.get("SLURM_JOB_ID") and env.get("SLURM_NTASKS", "1") not in ("", "1"):
        count = _int_env(env, "SLURM_NTASKS", 1)
        pid = _int_env(env, "SLURM_PROCID", 0)
        return Cluster(pid, count, "slurm")
    return Cluster()


def start_cluster(cluster: Cluster, env: Mapping[str, str] | None = None) -> Cluster:
    """Initialise ``jax.distributed`` for ``cluster`` (nothing for one process).

    Must run before the first JAX computation of the process. CPU collectives
    use gloo. Timeouts (seconds) come from ``BASINVIEW_HEARTBEAT_SECONDS``
    (default 10: a process that stops answering is declared dead after this)
    and ``BASINVIEW_INIT_TIMEOUT_SECONDS`` (default 120: how long to wait for
    every process to join).
    """
    if cluster.process_count == 1:
        return cluster
    import jax

    env = os.environ if env is None else env
    heartbeat = _int_env({ENV_HEARTBEAT: env.get(ENV_HEARTBEAT, "10")}, ENV_HEARTBEAT, 2)
    wait = _int_env({ENV_INIT_TIMEOUT: env.get(ENV_INIT_TIMEOUT, "120")}, ENV_INIT_TIMEOUT, 1)
    jax.config.update("jax_cpu_collectives_implementation", "gloo")
    timeouts: dict[str, Any] = {
        "initialization_timeout": wait,
        "heartbeat_timeout_seconds": heartbeat,
        "shutdown_timeout_seconds": max(heartbeat, 5),
    }
    try:
        if cluster.coordinator == "slurm":
            jax.distributed.initialize(**timeouts)
        else:
            jax.distributed.initialize(
                coordinator_address=cluster.coordinator,
                num_processes=cluster.process_count,
                process_id=cluster.process_id,
                coordinator_bind_address=cluster.coordinator,
                **timeouts,
            )
    except RuntimeError as exc:
        raise ClusterError(
            f"process {cluster.process_id} of {cluster.process_count} could not join the run "
            f"at {cluster.coordinator!r} ({' '.join(str(exc).split())[:300]}). Start every "
            "process with the same coordinator address and process count, and start process 0 "
            "within the initialisation timeout."
        ) from None
    return Cluster(jax.process_index(), jax.process_count(), cluster.coordinator)


def _collective(what: str, fn: Callable[[], T]) -> T:
    try:
        return fn()
    except (ValueError, RuntimeError) as exc:
        text = " ".join(str(exc).split())
        raise ClusterError(
            f"lost contact with another process while {what} ({text[:240]}); that process "
            "stopped or its machine is unreachable. No results were written; see the other "
            "processes' output for the cause and start the run again."
        ) from None


def gather_rows(
    cluster: Cluster, local: Mapping[str, np.ndarray], what: str
) -> dict[str, np.ndarray]:
    """Every process's rows of each array, concatenated in process order (on every process).

    Arrays may have different lengths per process (axis 0) but the same
    dtype and trailing shape. All of them travel as one byte buffer, so a
    gather is two collectives (the row counts, then the padded buffers)
    whatever the number of arrays.
    """
    if cluster.process_count == 1:
        return {k: np.asarray(v) for k, v in local.items()}
    from jax.experimental import multihost_utils

    names = sorted(local)
    arrays = [np.ascontiguousarray(local[k]) for k in names]
    rows = np.array([a.shape[0] for a in arrays] + [sum(a.nbytes for a in arrays)], np.int64)
    counts = _collective(what, lambda: np.asarray(multihost_utils.process_allgather(rows)))
    longest = int(counts[:, -1].max())
    buffer = np.zeros(longest, np.uint8)
    if arrays:
        raw = np.concatenate([a.reshape(-1).view(np.uint8) for a in arrays])
        buffer[: raw.size] = raw
    every = _collective(what, lambda: np.asarray(multihost_utils.process_allgather(buffer)))
    parts: dict[str, list[np.ndarray]] = {k: [] for k in names}
    for p in range(every.shape[0]):
        at = 0
        for j, (name, a) in enumerate(zip(names, arrays)):
            shape = (int(counts[p, j]), *a.shape[1:])
            size = int(np.prod(shape)) * a.dtype.itemsize
            parts[name].append(every[p, at : at + size].view(a.dtype).reshape(shape))
            at += size
    return {k: np.concatenate(v) for k, v in parts.items()}


def _encode(text: str) -> np.ndarray:
    raw = text.encode("utf-8")[:_MESSAGE_BYTES]
    return np.frombuffer(raw.ljust(_MESSAGE_BYTES, b"\0"), dtype=np.uint8).copy()


def agree(cluster: Cluster, what: str, digest: str, error: str = "", *, held: str = "") -> None:
    """Check that every process holds the same ``digest`` and none reports an ``error``.

    Every process calls it at the same point; all raise the same
    :class:`ClusterError` if any process failed (naming it and its message)
    or if the digests differ (naming the processes that disagree with process 0 about
    ``held``, e.g. "settings").
    """
    if cluster.process_count == 1:
        if error:
            raise ClusterError(error)
        return
    from jax.experimental import multihost_utils

    mine = np.concatenate(
        [
            np.array([1 if error else 0], np.uint8),
            np.frombuffer(hashlib.sha256(digest.encode()).digest(), np.uint8),
            _encode(error),
        ]
    )
    every = _collective(what, lambda: np.asarray(multihost_utils.process_allgather(mine)))
    failed = [p for p in range(every.shape[0]) if every[p, 0]]
    if failed:
        p = failed[0]
        message = bytes(every[p, 33:]).rstrip(b"\0").decode("utf-8", "replace")
        raise ClusterError(f"process {p} of {cluster.process_count} failed while {what}: {message}")
    differ = [
        p for p in range(1, every.shape[0]) if not np.array_equal(every[p, 1:33], every[0, 1:33])
    ]
    if differ:
        raise ClusterError(
            f"processes {differ} hold other {held or 'inputs'} than process 0 (fingerprints "
            "differ); "
            "every process must be started with the same settings file, overrides, parameters "
            "and data. Copy the same files to every host and start the run again."
        )


def barrier(cluster: Cluster, name: str) -> None:
    """Wait until every process reaches this point."""
    if cluster.process_count == 1:
        return
    from jax.experimental import multihost_utils

    _collective(name, lambda: multihost_utils.sync_global_devices(name))


def unit_share(units: int, cluster: Cluster) -> tuple[int, int]:
    """The contiguous range ``[lo, hi)`` of ``units`` work units this process computes.

    Units are split as evenly as possible, earlier processes taking the extra ones.

    >>> [unit_share(5, Cluster(p, 2)) for p in (0, 1)]
    [(0, 3), (3, 5)]
    """
    base, extra = divmod(int(units), cluster.process_count)
    p = cluster.process_id
    lo = p * base + min(p, extra)
    return lo, lo + base + (1 if p < extra else 0)


_MASK_CORES = 1024  # cores described per process (an affinity mask of 128 bytes)


def _placement() -> np.ndarray:
    """This process's host (8 bytes of a digest of its name) and allowed cores (a bit mask)."""
    host = hashlib.sha256(socket.gethostname().encode("utf-8")).digest()[:8]
    try:
        cores = os.sched_getaffinity(0)
    except (AttributeError, OSError):  # no affinity on this platform: all cores
        cores = set(range(os.cpu_count() or 1))
    bits = np.zeros(_MASK_CORES, np.uint8)
    bits[[c for c in cores if c < _MASK_CORES]] = 1
    return np.concatenate([np.frombuffer(host, np.uint8), np.packbits(bits)])


def shared_cores(placements: np.ndarray) -> list[list[int]]:
    """Groups of processes on one host whose allowed cores overlap (pure; see below).

    ``placements`` has one row per process: 8 bytes naming its host, then a
    packed bit mask of the cores it may run on (what :func:`_placement`
    returns). Each group lists the processes (in order) of one host that
    share a core with another process of the group; hosts where every
    process has cores of its own give no group.

    >>> host = np.zeros(8, np.uint8)
    >>> mask = lambda *cores: np.packbits(np.isin(np.arange(1024), cores).astype(np.uint8))
    >>> rows = np.stack([np.concatenate([host, mask(0, 1)]), np.concatenate([host, mask(1)])])
    >>> shared_cores(rows)
    [[0, 1]]
    >>> rows = np.stack([np.concatenate([host, mask(0)]), np.concatenate([host, mask(1)])])
    >>> shared_cores(rows)
    []
    """
    rows = np.asarray(placements, np.uint8)
    hosts = [bytes(r[:8]) for r in rows]
    masks = np.unpackbits(rows[:, 8:], axis=1).astype(bool)
    groups = []
    for host in dict.fromkeys(hosts):
        members = [p for p, h in enumerate(hosts) if h == host]
        clash = sorted(
            {p for p in members for q in members if p != q and np.any(masks[p] & masks[q])}
        )
        if clash:
            groups.append(clash)
    return groups


def shared_cores_note(cluster: Cluster) -> str:
    """A warning when processes of this run share a machine's cores, else ``""`` (collective).

    One process of one device already spreads its work over every core it
    may use, so two such processes on one machine compete for the same
    cores: on a 2-core machine, two unpinned processes ran a basin map at
    0.96x of one process, two pinned to a core each at 1.71x
    (``docs/distributed.md``). Every process calls it at the same point.
    """
    if cluster.process_count == 1:
        return ""
    from jax.experimental import multihost_utils

    mine = _placement()
    every = _collective(
        "comparing the processes' cores",
        lambda: np.asarray(multihost_utils.process_allgather(mine)),
    )
    groups = shared_cores(every)
    if not groups:
        return ""
    named = "; ".join("processes " + ", ".join(str(p) for p in g) for g in groups)
    return (
        f"{named} run on one machine and may use the same cores, so they compete for them "
        "(each process already uses every core it may). Give each process its own cores "
        "(taskset -c 0-7 ... / taskset -c 8-15 ..., or srun --cpu-bind=cores), or on one "
        "machine run one process with --devices N. See docs/distributed.md."
    )


def digest_of(*parts: Any) -> str:
    """A SHA-256 over the text of ``parts`` (what :func:`agree` compares)."""
    h = hashlib.sha256()
    for part in parts:
        h.update(repr(part).encode("utf-8"))
        h.update(b"\0")
    return h.hexdigest()
