"""Keep large freed buffers in the process heap during a batch run (glibc only).

The job allocates and frees arrays of tens of megabytes per chunk. By default
glibc returns such blocks to the operating system at once and every new
array pays page faults again; on small virtual machines that cost about a
quarter of a 100,000-series run (measured with ``bench/warehouse_scale.py``).
Raising glibc's mmap and trim thresholds keeps the memory for reuse. Resident
memory then stays near the run's peak until the process ends, which is what a
scheduled batch job wants; the library call :func:`arflow.forecast` does not do
this, only the job (``arflow run``) and its worker processes.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import sys

_M_TRIM_THRESHOLD = -1
_M_TOP_PAD = -2
_M_MMAP_THRESHOLD = -3
_tuned = False


def tune_for_batch() -> bool:
    """Set the thresholds once per process; returns False where it does not apply."""
    global _tuned
    if _tuned:
        return True
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    mallopt.restype = ctypes.c_int
    ok = bool(mallopt(_M_MMAP_THRESHOLD, 1 << 30))  # 1 GiB: big arrays come from the heap
    ok &= bool(mallopt(_M_TRIM_THRESHOLD, 2**31 - 1))
    ok &= bool(mallopt(_M_TOP_PAD, 256 << 20))
    _tuned = ok
    return ok
