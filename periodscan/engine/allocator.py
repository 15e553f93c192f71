"""Let a worker process keep the memory it frees instead of handing it back after every batch.

With glibc's default thresholds, the activation buffers a small model frees after each batch
can be returned to the kernel and faulted back in on the next one. On the project's 2-core
machine a 60-epoch run of the demo model took about 560,000 minor page faults in a loky worker
(about 3,000 per epoch, a sixth of its time in the kernel) and epochs of 33-38 ms; with the two
thresholds below raised, 5-30 faults and 25-28 ms (benchmarks/results/speed_profile.md).
Arithmetic and results are unchanged. Only worker processes that periodscan starts call this
(it changes the whole process's allocator); on anything but glibc it does nothing.
"""

from __future__ import annotations

import ctypes
import platform

# mallopt parameter numbers from glibc's <malloc.h> (stable since glibc 2.0).
M_TRIM_THRESHOLD = -1
M_MMAP_THRESHOLD = -3
# Freed memory kept at the top of the heap before it is trimmed back to the OS.
TRIM_BYTES = 512 * 2**20
# Blocks below this come from the heap rather than their own mmap (and stay when freed): larger
# than the activation buffers of the CPU-sized models periodscan trains.
MMAP_BYTES = 32 * 2**20

_applied = False


def keep_freed_memory() -> bool:
    """Raise glibc's trim and mmap thresholds once per process; True when they are in force."""
    global _applied
    if _applied:
        return True
    if platform.system() != "Linux" or platform.libc_ver()[0] != "glibc":
        return False
    try:
        libc = ctypes.CDLL("libc.so.6")
        _applied = (libc.mallopt(M_TRIM_THRESHOLD, TRIM_BYTES) == 1
                    and libc.mallopt(M_MMAP_THRESHOLD, MMAP_BYTES) == 1)
    except (OSError, AttributeError):
        return False
    return _applied
