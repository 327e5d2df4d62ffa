"""Spreading the batch axis of surfaces and descent runs over several devices.

Grid points of a surface and runs of a sweep are independent, so the batch
axis splits across devices without any communication: each device runs the
same compiled program on its share, and the results are gathered on the
host. On a CPU, JAX shows one device by default, which computes on one
core; :func:`use_all_cores` makes JAX show one CPU device per core so that
every core works on its own share of the batch.

``use_all_cores()`` must run before the first JAX computation of the
process (in a notebook: right after the imports, before building a
:class:`~basinview.core.Problem`). Without a code change, the environment
variable ``JAX_NUM_CPU_DEVICES=2`` (or ``XLA_FLAGS=--xla_force_host_platform_device_count=2``)
set before Python starts does the same.

Every share has the same shapes as a one-device call would use, so the
numbers do not depend on how many devices there are.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from typing import Any

import jax
import numpy as np
from jax.sharding import Mesh, NamedSharding, PartitionSpec

from .errors import ParameterError

__all__ = [
    "AXIS",
    "available_cores",
    "batch_devices",
    "replicated",
    "shard_batch",
    "use_all_cores",
]

AXIS = "batch"
"""Name of the mesh axis along which batches are split."""


def available_cores() -> int:
    """CPU cores this process may run on (its affinity set, else ``os.cpu_count()``)."""
    try:
        return max(len(os.sched_getaffinity(0)), 1)
    except AttributeError:  # pragma: no cover - not on Linux
        return max(os.cpu_count() or 1, 1)


def use_all_cores(count: int | None = None) -> int:
    """Show JAX one CPU device per core, so batches run on every core.

    Call it once, before the first JAX computation of the process::

        import basinview.core as bv
        bv.use_all_cores()          # before any Problem, array or jit call

    Args:
        count: number of CPU devices; default: the cores available to this
            process.

    Returns:
        The number of CPU devices JAX shows.

    Raises:
        ParameterError: when JAX has already started with another device
            count (restart the kernel and call this first, or set
            ``JAX_NUM_CPU_DEVICES`` in the environment before starting Python).
    """
    wanted = available_cores() if count is None else count
    if isinstance(wanted, bool) or not isinstance(wanted, (int, np.integer)) or wanted < 1:
        raise ParameterError(f"count must be a positive integer; got {count!r}.")
    wanted = int(wanted)
    try:
        jax.config.update("jax_num_cpu_devices", wanted)
    except RuntimeError:
        have = len(jax.devices("cpu"))
        if have == wanted:
            return have
        raise ParameterError(
            f"JAX has already started with {have} CPU device(s), so use_all_cores() cannot "
            f"give it {wanted} any more: the device count is fixed by the first JAX "
            "computation. Restart the kernel and call basinview.core.use_all_cores() right "
            "after the imports, or set the environment variable "
            f"JAX_NUM_CPU_DEVICES={wanted} before starting Python."
        ) from None
    return wanted


def batch_devices(devices: Any = None) -> tuple[Any, ...]:
    """The devices a batch is split over.

    Args:
        devices: ``None`` for every local device of the default backend, an
            integer ``k`` for the first ``k`` of them, or a sequence of
            ``jax.Device``.
    """
    local = tuple(jax.local_devices())
    if devices is None:
        return local
    if isinstance(devices, (int, np.integer)) and not isinstance(devices, bool):
        if not 1 <= devices <= len(local):
            raise ParameterError(
                f"devices must be between 1 and {len(local)} (the devices JAX shows); got "
                f"{devices}. To use more CPU cores call basinview.core.use_all_cores() "
                "before any JAX computation."
            )
        return local[: int(devices)]
    if (
        isinstance(devices, Sequence)
        and devices
        and all(isinstance(d, jax.Device) for d in devices)
    ):
        if len(set(devices)) != len(devices):
            raise ParameterError("devices lists the same device twice.")
        return tuple(devices)
    raise ParameterError(
        "devices must be None (all devices), a positive integer, or a list of jax devices; "
        f"got {devices!r}."
    )


def _mesh(devices: tuple[Any, ...]) -> Mesh:
    return Mesh(np.array(devices, dtype=object), (AXIS,))


def replicated(devices: tuple[Any, ...]) -> NamedSharding:
    """A sharding that keeps one full copy on each of ``devices``."""
    return NamedSharding(_mesh(devices), PartitionSpec())


def split(devices: tuple[Any, ...], axis: int = 0) -> NamedSharding:
    """A sharding that splits dimension ``axis`` evenly over ``devices``."""
    spec = (None,) * axis + (AXIS,)
    return NamedSharding(_mesh(devices), PartitionSpec(*spec))


def shard_batch(
    fn: Callable[..., Any],
    devices: tuple[Any, ...],
    in_batch: Sequence[int | None],
    out_batch: Any,
) -> Callable[..., Any]:
    """``fn`` run on every device over its share of the batch, as one jitted call.

    Args:
        fn: a function of local (per-device) arrays.
        devices: the devices; with one device ``fn`` is simply jitted.
        in_batch: for each positional argument, the batch dimension of its
            leaves, or ``None`` for arguments every device needs whole.
        out_batch: the batch dimension of each output leaf (a pytree prefix
            of the output with integers or ``None``).
    """
    if len(devices) == 1:
        return jax.jit(fn)

    def spec(dim: int | None) -> PartitionSpec:
        return PartitionSpec() if dim is None else PartitionSpec(*((None,) * dim + (AXIS,)))

    in_specs = tuple(spec(d) for d in in_batch)
    out_specs = jax.tree_util.tree_map(spec, out_batch, is_leaf=lambda x: x is None)
    mapped = jax.shard_map(
        fn, mesh=_mesh(devices), in_specs=in_specs, out_specs=out_specs, check_vma=False
    )
    return jax.jit(mapped)
