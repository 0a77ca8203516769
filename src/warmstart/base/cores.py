"""How many CPU cores this process may really use (no torch here).

``os.cpu_count()`` counts the host's logical CPUs. A training step wants one thread per physical
core it may use: fewer when the process is pinned to some CPUs (its affinity mask), when a
container's CPU quota (cgroup ``cpu.max``) allows less, and half when two logical CPUs share one
core (SMT). Oversubscribing costs: measured on 2 cores, 4 torch threads run the demo's U-Net step
at 0.86x of 2 threads, 1 thread at 0.58x (``tools/bench_pretrain.py --threads``). Written by hand because no
well-kept library combines the three (psutil counts physical cores of the whole host and knows no
quota).
"""
from __future__ import annotations

import math
import os
from pathlib import Path

__all__ = ["usable_cores", "allowed_cpus", "physical_cores", "quota_cores"]


def allowed_cpus() -> list[int]:
    """Logical CPUs in this process's affinity mask (all of them where the OS has no masks)."""
    try:
        return sorted(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return list(range(os.cpu_count() or 1))


def physical_cores(cpus: list[int], sysfs: str | os.PathLike[str] = "/sys/devices/system/cpu") -> int:
    """Physical cores among ``cpus``: logical CPUs that list the same SMT siblings count once.

    Falls back to ``len(cpus)`` where the topology files cannot be read.
    """
    groups = set()
    for cpu in cpus:
        topo = Path(sysfs) / f"cpu{cpu}" / "topology"
        for name in ("core_cpus_list", "thread_siblings_list"):
            try:
                groups.add((topo / name).read_text().strip())
                break
            except OSError:
                continue
        else:
            return len(cpus)
    return max(1, len(groups))


def quota_cores(cgroup: str | os.PathLike[str] = "/sys/fs/cgroup") -> int | None:
    """CPUs a cgroup quota allows, rounded up (cgroup v2 ``cpu.max``, else v1); None when unlimited."""
    root = Path(cgroup)
    try:
        quota, period = (root / "cpu.max").read_text().split()[:2]
        if quota != "max" and int(period) > 0:
            return max(1, math.ceil(int(quota) / int(period)))
        return None
    except (OSError, ValueError):
        pass
    try:
        quota_us = int((root / "cpu" / "cpu.cfs_quota_us").read_text())
        period_us = int((root / "cpu" / "cpu.cfs_period_us").read_text())
    except (OSError, ValueError):
        return None
    return max(1, math.ceil(quota_us / period_us)) if quota_us > 0 and period_us > 0 else None


def usable_cores(sysfs: str | os.PathLike[str] = "/sys/devices/system/cpu",
                 cgroup: str | os.PathLike[str] = "/sys/fs/cgroup") -> int:
    """Physical cores of the affinity mask, limited by the cgroup quota: the intra-op thread count
    a CPU training step should use.

    Examples
    --------
    >>> usable_cores() >= 1
    True
    """
    n = physical_cores(allowed_cpus(), sysfs)
    q = quota_cores(cgroup)
    return max(1, min(n, q) if q else n)
