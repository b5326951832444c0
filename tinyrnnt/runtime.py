"""Process-wide CPU memory settings, applied when tinyrnnt is imported.

- oneDNN keeps one compiled primitive (with its workspace) per input shape, up
  to 1024 by default; length-bucketed batches have many shapes, which grew a
  training process by over a gigabyte. A small cache keeps the recent shapes.
- glibc raises its mmap threshold after large frees, so later large tensors
  come from the heap and fragment it; a fixed threshold returns them to the
  system when freed.

Both are ordinary environment/allocator settings; a user's own values win.
`peak_rss_mb` is the process's own peak memory, for the benchmarks.
"""

from __future__ import annotations

import ctypes
import os
import resource
import sys
from pathlib import Path

ONEDNN_CACHE = "16"
MMAP_THRESHOLD = 256 * 1024  # bytes
_M_MMAP_THRESHOLD = -3  # glibc mallopt parameter (malloc.h)


def apply() -> None:
    os.environ.setdefault("ONEDNN_PRIMITIVE_CACHE_CAPACITY", ONEDNN_CACHE)
    if sys.platform.startswith("linux") and "MALLOC_MMAP_THRESHOLD_" not in os.environ:
        try:
            ctypes.CDLL("libc.so.6").mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD)
        except (OSError, AttributeError):  # not glibc: nothing to tune
            pass


def peak_rss_mb() -> float:
    """This process's peak resident size since its program started, MB.

    subtle: not getrusage's ru_maxrss, which a spawned child inherits from the parent it was forked
    from (Linux keeps it across fork and execve, getrusage(2)), so a measuring process spawned by a
    large parent reported the parent's peak. VmHWM in /proc/self/status (proc(5)) is the high-water
    mark of the address space the program got at execve. ru_maxrss only where /proc is missing.
    """
    status = Path("/proc/self/status")
    if status.is_file():
        for line in status.read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024  # kB
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
