"""Process-wide CPU memory settings, applied when tinyrnnt is imported.

- oneDNN keeps one compiled primitive (with its workspace) per input shape, up
  to 1024 by default; length-bucketed batches have many shapes, which grew a
  training process by over a gigabyte. A small cache keeps the recent shapes.
- glibc raises its mmap threshold after large frees, so later large tensors
  come from the heap and fragment it; a fixed threshold returns them to the
  system when freed.

Both are ordinary environment/allocator settings; a user's own values win.
"""

from __future__ import annotations

import ctypes
import os
import sys

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
