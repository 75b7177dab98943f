"""The process's CPU policy, applied before torch is imported.

- ``OMP_WAIT_POLICY=PASSIVE`` unless the user set it: an OpenMP worker that waits for
  work sleeps instead of spinning. On a machine where another process holds a core, a
  spinning pool fights it for that core and every parallel region waits for the
  slowest thread (measured: 10-23 % of quiet throughput with the default policy, see
  tests/benchmarks/bench_train.py). OpenMP reads the variable once, when the runtime
  loads with torch, so :func:`prepare` must run before the first ``import torch``.
- the thread count follows the cores this process may actually use: its CPU
  affinity (``os.sched_getaffinity``) capped by a cgroup v2 CPU quota
  (``/sys/fs/cgroup/cpu.max``), divided among the ranks that ``torchrun`` started on
  this machine (``LOCAL_WORLD_SIZE``); ``--threads N`` overrides it.

No torch import here: the CLI calls :func:`prepare` at its entry.
"""

from __future__ import annotations

import math
import os
from pathlib import Path

CPU_MAX = Path("/sys/fs/cgroup/cpu.max")
_chosen: dict[str, int | None] = {"threads": None}


def cgroup_cpu_limit(path: Path = CPU_MAX) -> int | None:
    """Cores allowed by a cgroup v2 CPU quota (``"QUOTA PERIOD"``, rounded up), or None
    when there is no quota (``"max ..."``) or no such file."""
    try:
        quota, period = path.read_text().split()[:2]
        if quota == "max":
            return None
        return max(1, math.ceil(int(quota) / int(period)))
    except (OSError, ValueError):
        return None


def available_cores() -> int:
    """The cores this process may run on: its affinity, capped by the cgroup quota."""
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not on Linux
        cores = os.cpu_count() or 1
    limit = cgroup_cpu_limit()
    return max(1, min(cores, limit) if limit else cores)


def local_ranks() -> int:
    """Processes ``torchrun`` started on this machine (1 outside it)."""
    try:
        return max(1, int(os.environ.get("LOCAL_WORLD_SIZE", "1")))
    except ValueError:
        return 1


def default_threads() -> int:
    """Threads for torch: ``--threads`` when given, else the available cores shared
    among the local ranks."""
    if _chosen["threads"]:
        return int(_chosen["threads"])
    return max(1, available_cores() // local_ranks())


def prepare(threads: int | None = None) -> int:
    """Apply the policy; call before torch is imported. Returns the thread count.

    Sets ``OMP_WAIT_POLICY=PASSIVE`` where the user has not set it, and remembers
    ``threads`` (from ``--threads``) for :func:`default_threads`. With an explicit
    ``threads`` it also sets ``OMP_NUM_THREADS`` and ``MKL_NUM_THREADS`` (so the
    OpenMP pool starts at that size), and torch's count when torch is already loaded.
    """
    os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
    if threads is not None:
        if threads < 1:
            raise ValueError("threads must be at least 1")
        _chosen["threads"] = threads
        os.environ["OMP_NUM_THREADS"] = os.environ["MKL_NUM_THREADS"] = str(threads)
        import sys

        torch = sys.modules.get("torch")
        if torch is not None:
            torch.set_num_threads(threads)
    return default_threads()
