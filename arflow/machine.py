"""How many CPUs this process may use: CPU affinity and container (cgroup) quotas.

``os.cpu_count()`` reports the host's CPUs, which overstates what a process in
a container or pinned by ``taskset`` gets; starting more worker processes than
that only adds memory and context switches. :func:`available_cpus` takes the
smallest of

* the CPUs in the process's affinity mask (``os.sched_getaffinity``),
* the cgroup v2 quota (``cpu.max``: ``quota period``, ``max`` = none) of the
  process's own cgroup and its ancestors,
* the cgroup v1 quota (``cpu.cfs_quota_us`` / ``cpu.cfs_period_us``, -1 = none),

rounded up (a quota of 1.5 CPUs gives 2), and at least 1.
"""

from __future__ import annotations

import math
import os
from pathlib import Path

__all__ = ["available_cpus", "resolve_workers"]

_CGROUP_ROOT = Path("/sys/fs/cgroup")


def _affinity() -> int:
    try:
        return max(len(os.sched_getaffinity(0)), 1)
    except (AttributeError, OSError):  # not Linux
        return max(os.cpu_count() or 1, 1)


def _quota_v2(text: str) -> float | None:
    parts = text.split()
    if len(parts) < 1 or parts[0] == "max":
        return None
    try:
        quota = float(parts[0])
        period = float(parts[1]) if len(parts) > 1 else 100_000.0
    except ValueError:
        return None
    return quota / period if quota > 0 and period > 0 else None


def _read(path: Path) -> str | None:
    try:
        return path.read_text(encoding="ascii").strip()
    except (OSError, UnicodeDecodeError):
        return None


def cgroup_cpu_limit(proc_cgroup: str | None = None, root: Path = _CGROUP_ROOT) -> float | None:
    """The CPU quota (in CPUs, fractional) of this process's cgroup, or None when unlimited/unknown.

    ``proc_cgroup``: the text of ``/proc/self/cgroup`` (read when None);
    ``root``: the cgroup mount point (both parameters exist for tests).
    """
    text = proc_cgroup if proc_cgroup is not None else _read(Path("/proc/self/cgroup"))
    if not text:
        return None
    limits: list[float] = []
    for line in text.splitlines():
        parts = line.split(":", 2)
        if len(parts) != 3:
            continue
        _, controllers, rel = parts
        rel = rel.lstrip("/")
        if controllers == "":  # cgroup v2: the quota of the cgroup and of every ancestor applies
            here = root / rel if rel else root
            while True:
                got = _read(here / "cpu.max")
                q = _quota_v2(got) if got else None
                if q is not None:
                    limits.append(q)
                if here == root or root not in here.parents:
                    break
                here = here.parent
        elif "cpu" in controllers.split(","):  # cgroup v1
            for base in (root / "cpu,cpuacct", root / "cpu", root / "cpuacct,cpu"):
                for d in ((base / rel) if rel else base, base):
                    quota, period = _read(d / "cpu.cfs_quota_us"), _read(d / "cpu.cfs_period_us")
                    try:
                        qv, pv = float(quota or "-1"), float(period or "0")
                    except ValueError:
                        continue
                    if qv > 0 and pv > 0:
                        limits.append(qv / pv)
                        break
    return min(limits) if limits else None


def available_cpus() -> int:
    """CPUs this process may use (affinity and container quota; at least 1)."""
    n = _affinity()
    q = cgroup_cpu_limit()
    if q is not None:
        n = min(n, max(math.ceil(q - 1e-9), 1))
    return max(n, 1)


def resolve_workers(workers: int | None) -> int:
    """The number of worker processes to use: ``workers`` when given, else :func:`available_cpus`."""
    if workers is None:
        return available_cpus()
    return max(int(workers), 1)
